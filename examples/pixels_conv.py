"""A masked-convolution pixel model (raster order) on scikit-image's bundled grey images.

Scenario: the (invented) Orrin Ridge field station archives 8-bit grey frames from its
inspection cameras; here scikit-image's sample images stand in for them: six to train on,
three held out (coins, clock, page) to pack and bench against PNG, JPEG-LS, JPEG XL.

    python examples/pixels_conv.py [WORKDIR]      (about 3 minutes to train on one CPU core)

Ends with pack, unpack, verify, probe and bench through the lcodec command line.
"""
import math
import os
import subprocess
import sys

import numpy as np
import skimage.data as sd
import torch
from PIL import Image

from lcodec.training import kit

work = sys.argv[1] if len(sys.argv) > 1 else "pixels-run"
seconds = float(sys.argv[2]) if len(sys.argv) > 2 else 180
os.makedirs(os.path.join(work, "test"), exist_ok=True)
torch.set_num_threads(1)
torch.manual_seed(0)
np.random.seed(0)
train = [torch.from_numpy(getattr(sd, n)().astype(np.int64)) for n in ("camera", "moon", "brick", "grass", "gravel", "cell")]
test = {n: getattr(sd, n)() for n in ("coins", "clock", "page")}

# -- the model: centre-excluded conv over the symbols, centre-included residual blocks ---
C = 48
net = kit.HeddleNet((0, 0), 256, kit.SymbolEmbed(256, 8), [
    kit.RasterConv(8, C, (3, 5), include_centre=False),
    kit.Residual(kit.RasterConv(C, C, (3, 5), include_centre=True)),
    kit.Residual(kit.RasterConv(C, C, (2, 3), include_centre=True)),
    kit.RasterConv(C, 256, (1, 1), act="logits")])


def crops(n, size=40):
    out = []
    for _ in range(n):
        im = train[np.random.randint(len(train))]
        r, c = np.random.randint(0, im.shape[0] - size), np.random.randint(0, im.shape[1] - size)
        out.append(im[r:r + size, c:c + size])
    return torch.stack(out)


# -- our own loop: Adam on random crops for a fixed time ---------------------------------
opt = torch.optim.Adam(net.parameters(), 2e-3)
check = crops(32)
import time  # noqa: E402
t0, step = time.time(), 0
while time.time() - t0 < seconds:
    net.train()
    opt.zero_grad()
    kit.nll(net, crops(12)).backward()
    opt.step()
    step += 1
    if step % 100 == 0:
        net.eval()
        with torch.no_grad():
            print(f"step {step}: {float(kit.nll(net, check)) / math.log(2):.3f} bits per pixel on training crops")

# -- audit on held-out crops, export, and the archive -----------------------------------
held = torch.from_numpy(np.stack([a[:24, :24] for a in test.values()]).astype(np.int64))
rep = kit.audit(net, held)
model = os.path.join(work, "frames.lcmodel")
kit.export(net, model, note="masked convolutions, 8-bit grey")
for n, a in test.items():
    Image.fromarray(a).save(os.path.join(work, "test", n + ".pgm"))


def lcodec(*args):
    print("$ lcodec", " ".join(args), flush=True)
    subprocess.run([sys.executable, "-m", "lcodec", *args], check=True)


arc = os.path.join(work, "test.lcodec")
lcodec("pack", os.path.join(work, "test"), "-m", model, "-o", arc, "--force", "--jobs", "2")
lcodec("unpack", arc, "-m", model, "-o", os.path.join(work, "back"), "--force", "--jobs", "2")
lcodec("verify", arc, "-m", model, "--against", os.path.join(work, "test"), "--jobs", "2")
lcodec("probe", model, "--shape", "16x16", "--count", "4")
lcodec("bench", "--kind", "image", os.path.join(work, "test"), "-m", model)
