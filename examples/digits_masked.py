"""A masked autoencoder (MADE-style) over 8x8 handwritten digits, built with lcodec's layer kit.

Scenario: the sorting office of the (invented) Tarrow Valley post keeps every scanned
postcode digit at 8x8 pixels, 17 grey levels, and wants the archive as small as it can be.
The data are scikit-learn's bundled digits (1,797 images). 360 held out for the test.

    python examples/digits_masked.py [WORKDIR]      (about 2 minutes on one CPU core)

Ends with pack, unpack, verify, probe and bench through the lcodec command line.
"""
import math
import os
import subprocess
import sys

import numpy as np
import torch
from sklearn.datasets import load_digits

from lcodec.training import kit

work = sys.argv[1] if len(sys.argv) > 1 else "digits-run"
os.makedirs(work, exist_ok=True)
torch.set_num_threads(1)
torch.manual_seed(0)
np.random.seed(0)

# -- data: 17 grey levels (0..16), one byte per pixel; a fixed held-out split ------------
digits = load_digits().images.astype(np.int64)
perm = np.random.default_rng(0).permutation(len(digits))
test, train = torch.from_numpy(digits[perm[:360]]), torch.from_numpy(digits[perm[360:]])
A, E, HIDDEN = 17, 4, 256

# -- the model: embeddings, masked linear layers with degrees (natural order) -------
din, dh = kit.mask_degrees(64, HIDDEN)
net = kit.HeddleNet((8, 8), A, kit.SymbolEmbed(A, E), [
    kit.DegreeLinear(kit.grid_degrees(din, E), dh), kit.Dropout(0.3),
    kit.Residual(kit.DegreeLinear(dh, dh)), kit.Dropout(0.3),
    kit.DegreeLinear(dh, din.repeat_interleave(A), act="logits", strict=True)])


def shifted(x):  # augmentation: half the batches moved by up to one pixel
    if np.random.rand() < 0.5:
        return x
    dy, dx = np.random.randint(-1, 2, 2)
    return torch.roll(x, (int(dy), int(dx)), (1, 2))


# -- the training loop is ours: AdamW, teacher-forced NLL from the kit --------------------
opt = torch.optim.AdamW(net.parameters(), 1e-3, weight_decay=0.1)
for epoch in range(260):
    net.train()
    if epoch == 220:
        opt.param_groups[0]["lr"] = 2e-4
    for batch in torch.randperm(len(train)).split(64):
        opt.zero_grad()
        kit.nll(net, shifted(train[batch])).backward()
        opt.step()
    if epoch % 20 == 19:
        net.eval()
        with torch.no_grad():
            print(f"epoch {epoch + 1}: test {float(kit.nll(net, test)) / math.log(2):.4f} bits per dimension")

# -- audit, export, and the archive ------------------------------------------------------
rep = kit.audit(net, test)
model = os.path.join(work, "digits.lcmodel")
kit.export(net, model, float_bits_per_symbol=round(rep["float_bits_per_symbol"], 5),
           note="masked autoencoder over 8x8 digits, 17 levels")
data = os.path.join(work, "digits-test.bin")  # the 360 test digits, 64 bytes each, in order
open(data, "wb").write(test.numpy().astype(np.uint8).tobytes())
print(kit.sample(net, 4).numpy().reshape(4, 8, 8).transpose(1, 0, 2).reshape(8, 32))  # what it learned


def lcodec(*args):
    print("$ lcodec", " ".join(args), flush=True)
    subprocess.run([sys.executable, "-m", "lcodec", *args], check=True)


arc = os.path.join(work, "digits-test.lcodec")
lcodec("pack", data, "-m", model, "-o", arc, "--force")
lcodec("unpack", arc, "-m", model, "-o", os.path.join(work, "digits-back.bin"), "--force")
lcodec("verify", arc, "-m", model, "--against", data)
lcodec("probe", model, "--records", data)
lcodec("bench", "--kind", "records", data, "-m", model, "--json", os.path.join(work, "bench.json"), "--force")
