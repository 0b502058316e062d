"""A causal byte model (embeddings of a window of earlier bytes, then 1-D masked
convolutions) on text: Python's own standard-library sources stand in for the (invented)
Harrow Peak observatory's pipeline scripts, some to train on and some held out.

    python examples/text_causal.py [WORKDIR] [SECONDS]   (about 3 minutes on one CPU core)

Ends with pack, unpack, verify, probe and bench (against the general compressors).
"""
import math
import os
import shutil
import subprocess
import sys
import sysconfig

import numpy as np
import torch

from lcodec.training import kit

work = sys.argv[1] if len(sys.argv) > 1 else "text-run"
seconds = float(sys.argv[2]) if len(sys.argv) > 2 else 150
torch.set_num_threads(1)
torch.manual_seed(0)
np.random.seed(0)

# -- data: stdlib modules, sorted by name; every 8th held out --------------------------
lib = sysconfig.get_paths()["stdlib"]
files = sorted(f for f in os.listdir(lib) if f.endswith(".py"))
for split in ("train", "test"):
    os.makedirs(os.path.join(work, "corpus", split), exist_ok=True)
for i, f in enumerate(files[:160]):
    shutil.copy(os.path.join(lib, f), os.path.join(work, "corpus", "test" if i % 8 == 7 else "train", f))
text = b"".join(open(os.path.join(work, "corpus", "train", f), "rb").read()
                for f in sorted(os.listdir(os.path.join(work, "corpus", "train"))))
data = torch.from_numpy(np.frombuffer(text, np.uint8).astype(np.int64))

# -- the model: the 6 previous bytes embedded, 1-D convolutions (centre included) --------
R, C = 1024, 96  # records of 1024 bytes: each starts from nothing
net = kit.HeddleNet((1, R), 256, kit.SymbolEmbed(256, 8, kit.causal_window(6)), [
    kit.RasterConv(48, C, (1, 5), include_centre=True),
    kit.Residual(kit.RasterConv(C, C, (1, 5), include_centre=True)),
    kit.RasterConv(C, 256, (1, 1), act="logits")])


def batch(n=16, L=128):
    at = np.random.randint(0, len(data) - L, n)
    return torch.stack([data[a:a + L] for a in at])[:, None, :]  # (n, 1, L)


opt = torch.optim.Adam(net.parameters(), 2e-3)
check = batch(64, 256)
import time  # noqa: E402
t0, step = time.time(), 0
while time.time() - t0 < seconds:
    net.train()
    opt.zero_grad()
    kit.nll(net, batch()).backward()
    opt.step()
    step += 1
    if step % 200 == 0:
        net.eval()
        with torch.no_grad():
            print(f"step {step}: {float(kit.nll(net, check)) / math.log(2):.3f} bits per byte (training text)")

rep = kit.audit(net, batch(4, R))
model = os.path.join(work, "scripts.lcmodel")
kit.export(net, model, note="causal byte model, 6-byte window and 1-D convolutions")


def lcodec(*args):
    print("$ lcodec", " ".join(args), flush=True)
    subprocess.run([sys.executable, "-m", "lcodec", *args], check=True)


test = os.path.join(work, "corpus", "test")
arc = os.path.join(work, "test.lcodec")
lcodec("pack", test, "-m", model, "-o", arc, "--force", "--jobs", "2")
lcodec("unpack", arc, "-m", model, "-o", os.path.join(work, "back"), "--force", "--jobs", "2")
lcodec("verify", arc, "-m", model, "--against", test)
lcodec("probe", model, "--count", "2")
lcodec("bench", os.path.join(work, "corpus"), "-m", model)
