"""`lcodec train`: fit a weft model on a corpus with quantisation-aware training, then
export the integer model and measure it.

Training runs in ordinary float torch, with the integer path simulated in the forward
pass (weights, embeddings and hidden activations rounded to int8/uint7 grids with a
straight-through gradient), so the exported integer model loses little. A validation
split (by file) is held out; training stops at the time limit or when validation stops
improving; the command ends with the exported integer model's validation bits per byte,
computed from the very tables the coder would use.

Only this module imports torch; decoding never needs it.
"""
from __future__ import annotations

import math
import os
import random
import time

import numpy as np

from ..errors import UsageError
from ..format import modelfile
from ..version import __version__
from .curves import write_curve_png  # noqa: F401  (also lcodec.training.train.write_curve_png, as before)
from .listing import corpus_record
from ..models.weft import HASH_KEYS, LUT_STEPS_PER_NAT, PAD, Weft, context_rows

PRESETS = {
    # name: window, embed, hidden, [hashed contexts: orders, 2**bits rows each, width],
    # batch, learning rate (figures in docs/notes/model-weft.md)
    "weft": dict(window=16, embed=8, hidden=192, hash_orders=[2, 3, 4, 5, 6, 8], hash_bits=17, hash_embed=16,
                 batch=4096, lr=3e-3),
    "small": dict(window=16, embed=12, hidden=192, batch=1024, lr=3e-3),
    "tiny": dict(window=8, embed=8, hidden=64, batch=512, lr=3e-3),  # for tests
    "tiny-hashed": dict(window=8, embed=4, hidden=32, hash_orders=[2, 3, 5], hash_bits=10, hash_embed=4,
                        batch=512, lr=3e-3),  # for tests
}
INPUT_SCALE = 1 / 32  # the int8 grid of every embedding value when hashed contexts are on
DEFAULT_PRESET = "braid"
LUT_LEN = LUT_STEPS_PER_NAT * 24  # down to exp(-24): below 2**-34, floored at 1 anyway


def read_corpus(paths: list[str], max_bytes: int | None = None) -> list[tuple[str, bytes]]:
    """Files under the given files/folders, sorted, skipping empty ones."""
    found = []
    for p in paths:
        if os.path.isdir(p):
            for dp, dns, fns in os.walk(p):
                dns.sort()
                for n in sorted(fns):
                    found.append(os.path.join(dp, n))
        elif os.path.isfile(p):
            found.append(p)
        else:
            raise UsageError(f"{p}: no such file or folder")
    out, total = [], 0
    for f in found:
        if os.path.islink(f):
            continue
        with open(f, "rb") as fh:
            data = fh.read()
        if data:
            out.append((f, data))
            total += len(data)
        if max_bytes and total >= max_bytes:
            break
    if not out:
        raise UsageError("the training corpus holds no non-empty files")
    return out


class Positions:
    """Every byte of a set of files as (context window, symbol), contexts within the file."""

    def __init__(self, files: list[bytes], window: int):
        self.buf = np.frombuffer(b"".join(files), np.uint8).astype(np.int16)
        lens = np.array([len(f) for f in files], np.int64)
        self.start = np.repeat(np.concatenate([[0], np.cumsum(lens)[:-1]]), lens)
        self.n = len(self.buf)
        self.window = window

    def batch(self, idx: np.ndarray):
        W = self.window
        pos = idx[:, None] - W + np.arange(W)[None, :]
        ok = pos >= self.start[idx][:, None]
        ctx = np.where(ok, self.buf[np.maximum(pos, 0)], PAD)
        return ctx.astype(np.int64), self.buf[idx].astype(np.int64)


def _build(torch, cfg):
    nn = torch.nn
    W, E, H = cfg["window"], cfg["embed"], cfg["hidden"]
    K, D = len(cfg.get("hash_orders", ())), cfg.get("hash_embed", 0)

    from .kit.layers import fake_quant as fq  # the kit's fake quantisation (straight-through rounding)

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.emb = nn.Embedding(cfg.get("emb_rows", 257), E)
            if K:  # rows no training context reaches stay zero: "nothing known here"
                self.hemb = nn.Embedding(K << cfg["hash_bits"], D, sparse=True)
                nn.init.zeros_(self.hemb.weight)
            self.l1 = nn.Linear(W * E + K * D, H)
            self.l2 = nn.Linear(H, 256)
            self.register_buffer("h_max", torch.tensor(4.0))
            nn.init.normal_(self.emb.weight, std=0.5)

        def scales(self):
            # With hashed contexts both embeddings share one fixed grid (their values meet
            # in one integer product; a max over the large table every step would cost more
            # than the step).
            e = INPUT_SCALE if K else self.emb.weight.detach().abs().max() / 127 + 1e-12
            return {"e": e,
                    "w1": self.l1.weight.detach().abs().max() / 127 + 1e-12,
                    "w2": self.l2.weight.detach().abs().max() / 127 + 1e-12,
                    "h": self.h_max / 127}

        def forward(self, ctx, rows=None, quant=True):
            s = self.scales()
            e = fq(self.emb.weight, s["e"], -127, 127) if quant else self.emb.weight
            x = e[ctx].reshape(len(ctx), -1)
            if K:
                he = self.hemb(rows)
                he = fq(he, s["e"], -127, 127) if quant else he
                x = torch.cat([x, he.reshape(len(ctx), -1)], dim=1)
            w1 = fq(self.l1.weight, s["w1"], -127, 127) if quant else self.l1.weight
            h = torch.relu(x @ w1.t() + self.l1.bias)
            if self.training:  # track the activation range the integer grid must cover
                with torch.no_grad():
                    self.h_max.mul_(0.99).add_(0.01 * torch.quantile(h.detach().flatten()[:65536], 0.999).clamp(min=1e-3))
            if quant:
                h = fq(h, s["h"], 0, 127)
            w2 = fq(self.l2.weight, s["w2"], -127, 127) if quant else self.l2.weight
            return h @ w2.t() + self.l2.bias

    return Net()


def export(net, cfg) -> tuple[dict, dict]:
    """Float QAT network -> integer parameters and arrays of a weft model."""
    s = {k: float(v) for k, v in net.scales().items()}
    emb = np.clip(np.round(net.emb.weight.detach().numpy() / s["e"]), -127, 127).astype(np.int8)
    extra_params, extra_arrays = {}, {}
    if cfg.get("hash_orders"):
        extra_params = {k: cfg[k] for k in HASH_KEYS}
        extra_arrays["hemb"] = np.clip(np.round(net.hemb.weight.detach().numpy() / s["e"]), -127, 127).astype(np.int8)
    w1 = np.clip(np.round(net.l1.weight.detach().numpy().T / s["w1"]), -127, 127).astype(np.int8)
    w2 = np.clip(np.round(net.l2.weight.detach().numpy().T / s["w2"]), -127, 127).astype(np.int8)
    acc_scale = s["e"] * s["w1"]  # value of one unit of acc
    b1 = np.round(net.l1.bias.detach().numpy() / acc_scale).astype(np.int64)
    logit_scale = s["h"] * s["w2"]  # value (nats) of one unit of logit
    b2 = np.round(net.l2.bias.detach().numpy() / logit_scale).astype(np.int64)
    s1 = 24
    m1 = int(round(acc_scale / s["h"] * (1 << s1)))
    while m1 >= 1 << 30 and s1 > 1:
        s1 -= 1
        m1 = int(round(acc_scale / s["h"] * (1 << s1)))
    so = 24
    mo = int(round(logit_scale * LUT_STEPS_PER_NAT * (1 << so)))
    while mo >= 1 << 30 and so > 1:
        so -= 1
        mo = int(round(logit_scale * LUT_STEPS_PER_NAT * (1 << so)))
    lut = np.maximum(1, np.round((1 << 20) * np.exp(-np.arange(LUT_LEN) / LUT_STEPS_PER_NAT))).astype(np.int32)
    lim = (1 << 24) - 1
    params = {"window": cfg["window"], "embed": cfg["embed"], "hidden": cfg["hidden"],
              "m1": max(m1, 1), "s1": s1, "mo": max(mo, 1), "so": so, **extra_params}
    arrays = {"emb": emb, "w1": w1, "b1": np.clip(b1, -lim, lim).astype(np.int32), "w2": w2,
              "b2": np.clip(b2, -lim, lim).astype(np.int32), "lut": lut, **extra_arrays}
    return params, arrays


def integer_bpb(model: Weft, pos: Positions, idx: np.ndarray) -> float:
    bits = 0.0
    for i in range(0, len(idx), 8192):
        ctx, sym = pos.batch(idx[i:i + 8192])
        tab = model.tables(ctx)
        bits += float(-np.log2(tab[np.arange(len(sym)), sym] / tab.sum(1)).sum())
    return bits / len(idx)


def train(corpus: list[str], out: str, time_limit: float = 600.0, preset: str = DEFAULT_PRESET,
          seed: int = 0, max_bytes: int | None = None, echo=print, force: bool = False,
          memory: int | None = None, record_names: bool = False) -> dict:
    """memory: braid presets only, bytes of training text kept as the corpus memory (None:
    the preset's default, 0: none). The model file records the corpus's file count, bytes
    and listing digest, never a path; record_names adds the files' relative names
    (training/listing.py)."""
    from . import braid_train

    if preset in braid_train.PRESETS:
        if os.path.lexists(out) and not force:
            raise UsageError(f"{out} exists; pass --force to overwrite it")
        if memory is not None and not 0 <= memory <= braid_train.R.MAX_TEXT:
            raise UsageError(f"--memory must be 0..{braid_train.R.MAX_TEXT:,} bytes")
        return braid_train.train_braid(read_corpus(corpus, max_bytes), corpus, out, time_limit, preset, seed, echo,
                                       memory=memory, record_names=record_names)
    if memory is not None:
        raise UsageError(f"--memory goes with the braid presets ({', '.join(braid_train.PRESETS)}), not {preset!r}")
    try:
        import torch
    except ImportError:
        raise UsageError("training needs torch: run scripts/setup.sh (installs torch==2.13.0)") from None
    if preset not in PRESETS:
        raise UsageError(f"unknown preset {preset!r} (have: {', '.join([*braid_train.PRESETS, *PRESETS])})")
    if os.path.lexists(out) and not force:
        raise UsageError(f"{out} exists; pass --force to overwrite it")
    cfg = PRESETS[preset]
    t_start = time.perf_counter()
    random.seed(seed)
    np.random.seed(seed)
    torch.manual_seed(seed)
    files = read_corpus(corpus, max_bytes)
    order = list(range(len(files)))
    random.Random(seed).shuffle(order)
    n_val = max(1, len(files) // 10) if len(files) > 1 else 0
    val_ids, train_ids = set(order[:n_val]), order[n_val:]
    train_files = [files[i][1] for i in train_ids]
    val_files = [files[i][1] for i in sorted(val_ids)] or [files[0][1][-max(1, len(files[0][1]) // 10):]]
    W = cfg["window"]
    tr, va = Positions(train_files, W), Positions(val_files, W)
    rng = np.random.default_rng(seed)
    val_idx = np.sort(rng.choice(va.n, size=min(va.n, 200_000), replace=False))
    echo(f"training weft/{preset} on {tr.n:,} bytes ({len(train_files)} files); validating on "
         f"{len(val_idx):,} bytes of {len(val_files)} held-out files; time limit {time_limit:.0f} s")
    net = _build(torch, cfg)
    hashed = bool(cfg.get("hash_orders"))

    def inputs(ctx):  # the network's inputs for a batch of context windows
        rows = torch.from_numpy(context_rows(ctx, cfg["hash_orders"], cfg["hash_bits"])) if hashed else None
        return torch.from_numpy(ctx), rows

    dense = [p for n, p in net.named_parameters() if not n.startswith("hemb.")]
    opts = [torch.optim.Adam(dense, lr=cfg["lr"])]
    if hashed:  # sparse rows: only the rows a batch touched are updated
        opts.append(torch.optim.SparseAdam([net.hemb.weight], lr=cfg["lr"]))
    vctx, vsym = va.batch(np.sort(rng.permutation(val_idx)[:50_000]))
    vin, vsym = inputs(vctx), torch.from_numpy(vsym)
    best, best_state, curve, bad, step = math.inf, None, [], 0, 0
    last_eval = time.perf_counter()
    run_loss, run_n = 0.0, 0
    log2e = 1 / math.log(2)
    while True:
        net.train()
        idx = rng.integers(0, tr.n, size=cfg["batch"])
        ctx, sym = tr.batch(idx)
        loss = torch.nn.functional.cross_entropy(net(*inputs(ctx)), torch.from_numpy(sym))
        # learning rate decays linearly to 5% at the time limit
        frac = max(0.05, 1 - (time.perf_counter() - t_start) / time_limit)
        for opt in opts:
            for g in opt.param_groups:
                g["lr"] = cfg["lr"] * frac
            opt.zero_grad()
        loss.backward()
        for opt in opts:
            opt.step()
        run_loss += float(loss.detach()) * log2e
        run_n += 1
        step += 1
        now = time.perf_counter()
        elapsed = now - t_start
        if now - last_eval >= max(5.0, min(30.0, time_limit / 20)) or elapsed >= time_limit:
            net.eval()
            with torch.no_grad():
                vb = float(torch.nn.functional.cross_entropy(net(*vin), vsym)) * log2e
            curve.append({"seconds": round(elapsed, 1), "step": step, "train_bpb": run_loss / run_n, "val_bpb": vb})
            echo(f"  {elapsed:6.0f} s  step {step:7d}  train {run_loss / run_n:.3f}  validation {vb:.3f} bits per byte")
            run_loss, run_n, last_eval = 0.0, 0, now
            if vb < best - 1e-3:
                best, bad = vb, 0
                best_state = {k: v.clone() for k, v in net.state_dict().items()}
            else:
                bad += 1
            if elapsed >= time_limit or bad >= 4:
                if bad >= 4:
                    echo("  validation stopped improving")
                break
    if best_state is not None:
        net.load_state_dict(best_state)
    net.eval()
    params, arrays = export(net, cfg)
    model = Weft(params, arrays)
    int_bpb = integer_bpb(model, va, val_idx)
    with torch.no_grad():
        fl = 0.0
        for i in range(0, len(val_idx), 8192):
            c, s_ = va.batch(val_idx[i:i + 8192])
            fl += float(torch.nn.functional.cross_entropy(net(*inputs(c)), torch.from_numpy(s_), reduction="sum")) * log2e
        float_bpb = fl / len(val_idx)
    meta = {
        "lcodec_version": __version__,
        "preset": preset,
        "seed": seed,
        "quantisation": "int8 weights and embeddings, uint7 hidden activations, softmax on a 1/32-nat grid (lut)",
        "training": {"files": len(train_files), "bytes": tr.n, "seconds": round(time.perf_counter() - t_start, 1),
                     "steps": step, "corpus": corpus_record(corpus, files, record_names)},
        "validation": {"files": len(val_files), "bytes": int(len(val_idx)), "float_qat_bpb": round(float_bpb, 4),
                       "integer_bpb": round(int_bpb, 4)},
        "learning_curve": curve,
    }
    png = write_curve_png(curve, out + ".curve.png", f"weft/{preset}: bits per byte during training")
    if png:
        meta["learning_curve_png"] = os.path.basename(png)
    sha = modelfile.dump(out, {"name": "weft", "params": params}, arrays, **meta)
    echo(f"exported integer model: validation {int_bpb:.4f} bits per byte (float QAT {float_bpb:.4f}); "
         f"{os.path.getsize(out):,} bytes, sha256 {sha[:16]}... -> {out}")
    return {"sha256": sha, "integer_bpb": int_bpb, "float_bpb": float_bpb, "curve": curve, "meta": meta}


# -- pixel models (lcodec train --kind image) ---------------------------------------------------
IMAGE_PRESETS = {
    # name: embed per slot, hidden, batch, learning rate (figures in docs/notes/model-weft.md)
    "small": dict(embed=8, hidden=128, batch=2048, lr=3e-3),
    "tiny": dict(embed=2, hidden=16, batch=512, lr=5e-3),  # for tests
}


ADAPT_K = 4096  # prior strength of the adaptive counts (figures in docs/notes/model-weft.md)
STRUCTURE_K = 32  # prior strength of the structure counts (figures in docs/notes/model-weft.md)
AUGMENT_SAMPLES = 1 << 24  # mirrored, flipped and transposed copies join while the training samples stay below this
STRUCTURE_CAP = 12  # evidence cap of the two-member weights, in bits
LAW = {"limit": 255, "cap": 12}  # the law stage of 16-bit samples (figures in docs/notes/model-weft.md)
# A 16-bit sample's high byte carries 0.04-0.12 bit (validation, docs/notes/model-tessel.md,
# "Light high byte"): since 2026-12-05 its network is this wide
# and it skips the adaptive stages (README "Images" has the figures); 0 gives it the others' width
# and every stage, as before
HIGH_HIDDEN = 16
# Since 2026-12-05 the encoder codes an image with the networks alone (no per-image stages, about
# a third less decoding work) unless the stages make its coded samples at least this many
# ten-thousandths smaller (model parameter stages_min_gain; docs/notes/2026-12-05-pixels-same-kind.md)
STAGES_MIN_GAIN = 25
ADAPT_GRID = (0, 256, 1024, 4096, 16384)


def augmented(images: list, budget: int = AUGMENT_SAMPLES) -> list:
    """Extra training images: each image mirrored left-right, then each flipped top-bottom,
    then each transposed, in that order for as long as the samples of the originals and the
    copies taken stay within `budget` (so a large corpus gets fewer copies, never more
    memory). The causal neighbourhood is not symmetric, so every copy shows the network
    contexts the original does not."""
    left = budget - sum(v.size for v in images)
    out = []
    for turn in (lambda v: v[:, ::-1], lambda v: v[::-1], lambda v: v.swapaxes(0, 1)):
        for v in images:
            if v.size <= left:
                out.append(np.ascontiguousarray(turn(v)))
                left -= v.size
    return out


def choose_adapt(model, val_images: dict, echo=print, light: dict | None = None) -> dict:
    """Prior strength K of the adaptive counts, per depth: the value of ADAPT_GRID with the
    fewest bits on the validation images (whole images through the encoder's pass). Roles
    marked in `light` have no counts."""
    out = {}
    for deep, imgs in val_images.items():
        roles = tuple(r for r in (("r16h", "r16l") if deep else ("r8",)) if not (light or {}).get(r))
        best = None
        for K in ADAPT_GRID:
            model.adapt = {r: K for r in roles}
            bits = 0.0
            for v in imgs:
                for syms, tab in model.teacher_tables(v, deep):
                    bits += float(-np.log2(tab[np.arange(len(syms)), syms] / tab.sum(1)).sum())
            n = sum(v.size for v in imgs)
            echo(f"  adaptive counts K={K}: {bits / n:.4f} bits per sample on the "
                 f"{'16' if deep else '8'}-bit validation images")
            if best is None or bits < best[1]:
                best = (K, bits)
        out.update({r: best[0] for r in roles})
    model.adapt = {}
    return out


def read_images(paths: list[str], echo=print) -> list[tuple[str, np.ndarray]]:
    """Samples of every image lcodec models under the given files/folders (others skipped)."""
    from ..inputs.images import read_samples

    out = []
    for name, data in read_corpus(paths):
        v = read_samples(data)
        if v is None:
            echo(f"  skipped {name}: not an image lcodec codes as pixels")
            continue
        out.append((name, v))
    if not out:
        raise UsageError("the training folder holds no image lcodec codes as pixels "
                         "(PGM/PPM, NPY, PNG, uncompressed TIFF or DICOM)")
    return out


def train_image(corpus: list[str], out: str, time_limit: float = 120.0, preset: str = "small",
                seed: int = 0, echo=print, force: bool = False, chan_shift: int = 1, adapt_k=str(ADAPT_K),
                structure_k: int = STRUCTURE_K, law: bool = True, augment: bool = True,
                record_names: bool = False, colour: str = "rct-grad", predictor: str = "gap",
                high_hidden: int = HIGH_HIDDEN) -> dict:
    """Fit a tessel pixel model: one network per role present in the corpus (8-bit samples;
    16-bit high and low bytes), quantisation-aware, then export and measure it. With
    `augment`, the training images' mirrored, flipped and transposed copies join the
    training set (`augmented`; never the validation images). high_hidden: a 16-bit high
    byte's network width, which then also skips the adaptive stages (0: as the low byte's)."""
    try:
        import torch
    except ImportError:
        raise UsageError("training needs torch: run scripts/setup.sh (installs torch==2.13.0)") from None
    from ..models.tessel import COLOUR_MODES, COLOUR_RCT, COLOUR_RCT_GRAD, EMB_ROWS, N_SLOTS, Tessel, raster_features

    if colour not in COLOUR_MODES:
        raise UsageError(f"unknown colour mode {colour!r} (have: {', '.join(COLOUR_MODES)})")
    if colour != "shift" and chan_shift != 1:
        raise UsageError(f"colour {colour} goes with chan_shift 1")
    if predictor not in ("med", "gap"):
        raise UsageError(f"unknown predictor {predictor!r} (have: med, gap)")
    mode = {"rct": COLOUR_RCT, "rct-grad": COLOUR_RCT_GRAD}.get(colour, chan_shift)

    if preset not in IMAGE_PRESETS:
        raise UsageError(f"unknown preset {preset!r} (have: {', '.join(IMAGE_PRESETS)})")
    if str(adapt_k) != "auto" and not (str(adapt_k).isdigit() and 0 <= int(adapt_k) <= 1 << 16):
        raise UsageError("--adapt-k must be 0..65536 or 'auto'")
    if type(high_hidden) is not int or not 0 <= high_hidden <= 1024:
        raise UsageError("high_hidden must be 0..1024")
    if type(structure_k) is not int or not 0 <= structure_k <= 1 << 16:
        raise UsageError("--structure-k must be 0..65536")
    if os.path.lexists(out) and not force:
        raise UsageError(f"{out} exists; pass --force to overwrite it")
    cfg = dict(IMAGE_PRESETS[preset], window=N_SLOTS, emb_rows=EMB_ROWS)
    t_start = time.perf_counter()
    np.random.seed(seed)
    torch.manual_seed(seed)
    rng = np.random.default_rng(seed)
    imgs = read_images(corpus, echo)
    groups = {}
    for name, v in imgs:
        groups.setdefault(v.dtype == np.uint16, []).append((name, v))
    data = {}  # role -> (train idx, train syms, val idx, val syms)
    summary, val_images = {}, {}
    for deep, items in groups.items():
        order = list(range(len(items)))
        random.Random(seed).shuffle(order)
        n_val = max(1, len(items) // 10) if len(items) > 1 else 0
        val_ids = set(order[:n_val])
        parts = {"train": [], "val": []}
        for i, (name, v) in enumerate(items):
            if n_val:
                parts["val" if i in val_ids else "train"].append(v)
            else:  # one image: its last eighth of rows is the validation region
                cut = max(1, v.shape[0] * 7 // 8)
                parts["train"].append(v[:cut])
                parts["val"].append(v[cut:] if cut < v.shape[0] else v)
        originals = int(sum(v.size for v in parts["train"]))
        copies = augmented(parts["train"]) if augment else []
        parts["train"] += copies
        feats = {k: [raster_features(np.ascontiguousarray(v), mode, gap=int(predictor == "gap")) for v in vs] for k, vs in parts.items()}
        roles = ("r16h", "r16l") if deep else ("r8",)
        for j, role in enumerate(roles):
            got = {}
            for k, fl in feats.items():
                idx = np.concatenate([f[0][f[2] == (j + 1 if deep else 0)] for f in fl])
                sym = np.concatenate([f[1][f[2] == (j + 1 if deep else 0)] for f in fl])
                got[k] = (idx, sym)
            data[role] = got["train"] + got["val"]
        val_images[deep] = parts["val"]
        summary["16-bit" if deep else "8-bit"] = {
            "train_images": [os.path.basename(items[i][0]) for i in range(len(items)) if i not in val_ids],
            "validation_images": [os.path.basename(items[i][0]) for i in sorted(val_ids)] or "last eighth of rows",
            "train_samples": int(sum(v.size for v in parts["train"])),
            "augmented_copies": len(copies),
            "augmented_samples": int(sum(v.size for v in parts["train"])) - originals,
        }
    for k, s in summary.items():
        echo(f"training tessel/{preset} ({k}) on {s['train_samples']:,} samples ({len(s['train_images'])} images"
             + (f" and {s['augmented_copies']} mirrored, flipped or transposed copies" if s["augmented_copies"] else "")
             + f"); validating on {s['validation_images']}; "
             f"time limit {time_limit:.0f} s")
    light = {r: bool(high_hidden) and r == "r16h" for r in data}  # the high byte's light network
    nets = {r: _build(torch, dict(cfg, hidden=high_hidden) if light[r] else cfg) for r in data}
    opts = {r: torch.optim.Adam(nets[r].parameters(), lr=cfg["lr"]) for r in data}
    val = {}
    for r, (ti, ts, vi, vs) in data.items():
        sel = np.sort(rng.permutation(len(vs))[:50_000])
        val[r] = (torch.from_numpy(vi[sel].astype(np.int64)), torch.from_numpy(vs[sel].astype(np.int64)))
    log2e = 1 / math.log(2)
    best = {r: math.inf for r in data}
    best_state = {r: None for r in data}
    curve, step, bad = [], 0, 0
    last_eval = time.perf_counter()
    run = {r: [0.0, 0] for r in data}
    while True:
        for r, net in nets.items():
            net.train()
            ti, ts = data[r][0], data[r][1]
            b = rng.integers(0, len(ts), size=cfg["batch"])
            loss = torch.nn.functional.cross_entropy(net(torch.from_numpy(ti[b].astype(np.int64))),
                                                     torch.from_numpy(ts[b].astype(np.int64)))
            opts[r].zero_grad()
            loss.backward()
            opts[r].step()
            run[r][0] += float(loss.detach()) * log2e
            run[r][1] += 1
        step += 1
        now = time.perf_counter()
        elapsed = now - t_start
        if now - last_eval >= max(5.0, min(30.0, time_limit / 20)) or elapsed >= time_limit:
            point = {"seconds": round(elapsed, 1), "step": step}
            improved = False
            for r, net in nets.items():
                net.eval()
                with torch.no_grad():
                    vb = float(torch.nn.functional.cross_entropy(net(val[r][0]), val[r][1])) * log2e
                point[r] = {"train_bits": run[r][0] / max(run[r][1], 1), "val_bits": vb}
                run[r] = [0.0, 0]
                if vb < best[r] - 1e-3:
                    best[r], improved = vb, True
                    best_state[r] = {k: v.clone() for k, v in net.state_dict().items()}
            curve.append(point)
            echo(f"  {elapsed:6.0f} s  step {step:7d}  " + "  ".join(
                f"{r}: train {point[r]['train_bits']:.3f} validation {point[r]['val_bits']:.3f}" for r in nets)
                + " bits per symbol")
            last_eval = now
            bad = 0 if improved else bad + 1
            if elapsed >= time_limit or bad >= 4:
                if bad >= 4:
                    echo("  validation stopped improving")
                break
    params = {"embed": cfg["embed"], "hidden": cfg["hidden"], "chan_shift": chan_shift, "roles": {}, "bytes": "o6m",
              "stages_min_gain": STAGES_MIN_GAIN}
    if colour != "shift" and any(v.shape[2] == 3 for _, v in imgs):  # absent means "shift" (older
        params["colour"] = colour  # files); recorded only where it changes something: RGB training images
    if predictor != "med":  # absent means "med"
        params["predictor"] = predictor
    arrays = {}
    for r, net in nets.items():
        if best_state[r] is not None:
            net.load_state_dict(best_state[r])
        net.eval()
        p, a = export(net, cfg)
        params["roles"][r] = {k: p[k] for k in ("m1", "s1", "mo", "so")}
        if light[r]:
            params["roles"][r]["hidden"] = high_hidden
        for k in ("emb", "w1", "b1", "w2", "b2"):
            arrays[f"{r}.{k}"] = a[k]
        arrays["lut"] = a["lut"]
    if structure_k:  # the second stage (structure counts) and the blended first stage
        params["structure"] = {"k": {r: structure_k for r in nets if not light[r]}, "cap": STRUCTURE_CAP, "decay": 0,
                               "blend": 1}
    if "r16h" in nets and law:  # the third stage of 16-bit samples: a two-sided geometric law
        params["law"] = dict(LAW, high_byte=0) if light["r16h"] else dict(LAW)
    model = Tessel(params, arrays)
    if str(adapt_k) == "auto":  # per depth, the grid value best on the validation images
        params["adapt"] = {r: k for r, k in choose_adapt(model, val_images, echo, light).items() if not light[r]}
    else:
        params["adapt"] = {r: int(adapt_k) for r in nets if not light[r]}
    model = Tessel(params, arrays)
    result = {}
    for r in nets:
        vi, vs = data[r][2], data[r][3]
        bits = 0.0
        for i in range(0, len(vs), 8192):
            tab = model.role_tables(r, vi[i:i + 8192])
            s_ = vs[i:i + 8192]
            bits += float(-np.log2(tab[np.arange(len(s_)), s_] / tab.sum(1)).sum())
        with torch.no_grad():
            fl = 0.0
            for i in range(0, len(vs), 8192):
                fl += float(torch.nn.functional.cross_entropy(
                    nets[r](torch.from_numpy(vi[i:i + 8192].astype(np.int64))),
                    torch.from_numpy(vs[i:i + 8192].astype(np.int64)), reduction="sum")) * log2e
        result[r] = {"symbols": int(len(vs)), "integer_bits": round(bits / len(vs), 4),
                     "float_qat_bits": round(fl / len(vs), 4)}
    meta = {
        "lcodec_version": __version__, "kind": "image", "preset": preset, "seed": seed,
        "quantisation": "int8 weights and embeddings, uint7 hidden activations, softmax on a 1/32-nat grid (lut)",
        "training": {"seconds": round(time.perf_counter() - t_start, 1), "steps": step, "sets": summary,
                     "corpus": corpus_record(corpus, read_corpus(corpus), record_names)},
        "validation_bits_per_symbol": result, "learning_curve": curve,
        "archives_name_file": False,  # archives name this file by its SHA-256 alone (models.Loaded.identity)
    }
    sha = modelfile.dump(out, {"name": "tessel", "params": params}, arrays, **meta)
    for r, x in result.items():
        echo(f"exported {r}: validation {x['integer_bits']:.4f} bits per symbol (float QAT {x['float_qat_bits']:.4f})")
    echo(f"model {os.path.getsize(out):,} bytes, sha256 {sha[:16]}... -> {out}")
    return {"sha256": sha, "validation": result, "curve": curve, "meta": meta}
