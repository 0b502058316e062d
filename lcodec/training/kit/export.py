"""`export(model, path)`: a HeddleNet (layers.py) to a heddle model file (data only: JSON,
integer arrays, SHA-256; lcodec/format/modelfile.py), and `integer_tables`, the same
integer forward pass written independently in torch (the tests hold the runtime to it).

Integers from the trained floats (the fake quantisation of layers.py made exact):
    weights   w_int = clamp(round(w / s_w), -127, 127)      s_w per output unit (per tensor for logits)
    biases    b_int = round(b / (s_in * s_w))               on the accumulator's grid
    requant   m / 2**s = s_in * s_w / s_out, m < 2**31      (heddle's relu)
    residual  ma / 2**s = s_x / s_out, mb / 2**s = s_f / s_out
    head      mo / 2**so = s_in * s_w * 32                  (logit units to 1/32-nat steps)
    lut[k]    = max(1, round(2**24 * exp(-k / 32)))         the softmax on a 1/32-nat grid
"""
from __future__ import annotations

import math

import numpy as np
import torch
import torch.nn.functional as F

from ...format import modelfile
from ...version import __version__
from .layers import ACT_MAX, DegreeLinear, Dropout, HeddleNet, RasterConv, Residual

LUT_STEPS_PER_NAT = 32
LUT_TOP = 1 << 24
LUT_LEN = int(math.ceil(LUT_STEPS_PER_NAT * math.log(LUT_TOP))) + 8
BIAS_LIMIT = (1 << 24) - 1


def exp_table() -> np.ndarray:
    k = np.arange(LUT_LEN)
    return np.maximum(1, np.round(LUT_TOP * np.exp(-k / LUT_STEPS_PER_NAT))).astype(np.int32)


def multipliers(ratios) -> tuple[np.ndarray, int]:
    """(m, s) with m / 2**s close to each ratio, every m in 1..2**31-1, s in 1..40."""
    r = np.asarray(ratios, np.float64).reshape(-1)
    top = float(r.max()) if r.size else 1.0
    s = 40
    while s > 1 and top * 2.0 ** s >= (1 << 31) - 1:
        s -= 1
    m = np.clip(np.round(r * 2.0 ** s), 1, (1 << 31) - 1).astype(np.int64)
    return m, s


def _weighted(layer, s_in: float, i: int, arrays: dict, order=None, reads_grid=False) -> tuple[dict, float | None]:
    w = (layer.weight * layer.mask).detach().double()
    sw = layer.weight_scale().double()
    shape = (-1,) + (1,) * (w.dim() - 1)
    wi = torch.clamp(torch.round(w / sw.reshape(shape)), -ACT_MAX, ACT_MAX).to(torch.int8).numpy()
    bi = torch.clamp(torch.round(layer.bias.detach().double() / (s_in * sw)), -BIAS_LIMIT, BIAS_LIMIT)
    arrays[f"{i}.w"] = wi.T.copy() if isinstance(layer, DegreeLinear) else wi
    arrays[f"{i}.b"] = bi.numpy().astype(np.int32)
    if order is not None:  # to coding order: input positions of a grid, output positions of logits
        w = arrays[f"{i}.w"]
        P = len(order)
        if reads_grid:
            w = w.reshape(P, -1, w.shape[1])[order].reshape(-1, w.shape[-1])
        if layer.act == "logits":
            w = w.reshape(w.shape[0], P, -1)[:, order].reshape(w.shape[0], -1)
            arrays[f"{i}.b"] = arrays[f"{i}.b"].reshape(P, -1)[order].reshape(-1)
        arrays[f"{i}.w"] = np.ascontiguousarray(w)
    op = {"op": "conv" if isinstance(layer, RasterConv) else "linear", "act": layer.act}
    if layer.act == "logits":
        op["shift"] = 1
        return op, float(sw[0]) * s_in
    s_out = float(layer.out_scale.scale())
    m, s = multipliers((s_in * sw / s_out).numpy())
    arrays[f"{i}.m"] = m.astype(np.int32)
    op["shift"] = s
    return op, s_out


def graph_of(model: HeddleNet) -> tuple[dict, dict]:
    """(params, arrays) of a heddle model file for a trained HeddleNet (in eval mode)."""
    model.eval()
    ops, arrays = [], {}
    emb = model.embed
    s_e = float(emb.scale())
    arrays["0.table"] = torch.clamp(torch.round(emb.weight.detach().double() / s_e), -ACT_MAX, ACT_MAX
                                    ).to(torch.int8).numpy()
    ops.append({"op": "embed", "shifts": [list(s) for s in emb.shifts]})
    state = {"idx": 0, "scale": s_e, "logit_unit": None}

    def add(layer):
        i = len(ops)
        if isinstance(layer, Dropout):
            return
        if isinstance(layer, Residual):
            x_idx, x_scale = state["idx"], state["scale"]
            for inner in layer.block:
                add(inner)
            so = float(layer.out_scale.scale())
            (ma, mb), s = multipliers([x_scale / so, state["scale"] / so])
            ops.append({"op": "add", "in": [x_idx, state["idx"]], "ma": int(ma), "mb": int(mb), "shift": s})
            state.update(idx=len(ops) - 1, scale=so)
            return
        if not isinstance(layer, (DegreeLinear, RasterConv)):
            raise ValueError(f"export: {type(layer).__name__} is not a layer of the kit")
        op, out = _weighted(layer, state["scale"], i, arrays, model.order, state["idx"] == 0)
        op["in"] = state["idx"]
        ops.append(op)
        if layer.act == "logits":
            state.update(idx=i, scale=None, logit_unit=out)
        else:
            state.update(idx=i, scale=out)

    for layer in model.layers:
        add(layer)
    if state["logit_unit"] is None:
        raise ValueError("export: the last layer must give logits (act='logits')")
    mo, so = multipliers([state["logit_unit"] * LUT_STEPS_PER_NAT])
    ops.append({"op": "head", "in": state["idx"], "mo": int(mo[0]), "so": so})
    arrays["lut"] = exp_table()
    H, W = model.record
    if model.order is not None:
        H, W = 1, H * W  # positions are ranks now: a record of one row in coding order
    return {"record": [H, W], "alphabet": model.alphabet, "ops": ops}, arrays


def export(model: HeddleNet, path: str, **meta) -> str:
    """Write `model` as a heddle model file at `path` (atomically); returns its SHA-256.
    `meta` adds descriptive keys (say, a validation NLL); no paths, no training data."""
    params, arrays = graph_of(model)
    if model.order is not None:
        meta.setdefault("coding_order", model.order)
    from ...models.heddle import Graph

    Graph(params, arrays)  # the runtime's own checks (bounds, shapes, causality) before writing
    return modelfile.dump(path, {"name": "heddle", "params": params}, arrays, lcodec_version=__version__,
                          quantisation="int8 weights and embeddings, 0..127 activations, softmax on a "
                                       "1/32-nat grid (lut)",
                          contents="the graph and its integer weights; no training data, no paths", **meta)


def integer_tables(params: dict, arrays: dict, x: torch.Tensor) -> torch.Tensor:
    """The integer forward pass of a heddle graph in torch (int64, and float64 products of
    integers far below 2**53): tables (B, H, W, alphabet). An implementation independent of
    the numpy runtime, for the tests."""
    A = params["alphabet"]
    B, H, W = x.shape
    x = torch.clamp(x.long(), max=A)
    vals = []
    for i, op in enumerate(params["ops"]):
        k = op["op"]
        if k == "embed":
            tab = torch.from_numpy(arrays[f"{i}.table"].astype(np.int64))
            parts = []
            for dy, dx in op["shifts"]:
                pad = F.pad(x, (max(-dx, 0), max(dx, 0), max(-dy, 0), max(dy, 0)), value=A)
                parts.append(pad[:, max(dy, 0):max(dy, 0) + H, max(dx, 0):max(dx, 0) + W])
            e = tab[torch.stack(parts, dim=-1)]
            vals.append(e.reshape(B, H, W, -1).permute(0, 3, 1, 2))  # grid (B, C, H, W)
        elif k in ("conv", "linear"):
            u = vals[op["in"]]
            w = torch.from_numpy(arrays[f"{i}.w"].astype(np.float64))
            b = torch.from_numpy(arrays[f"{i}.b"].astype(np.int64))
            if k == "conv":
                kh, kw = w.shape[2], w.shape[3]
                acc = F.conv2d(F.pad(u.double(), (kw // 2, kw // 2, kh - 1, 0)), w).round().long()
                acc = acc + b.reshape(1, -1, 1, 1)
                mshape = (1, -1, 1, 1)
            else:
                flat = u.permute(0, 2, 3, 1).reshape(B, -1) if u.dim() == 4 else u
                acc = (flat.double() @ w).round().long() + b
                mshape = (1, -1)
            if op["act"] == "relu":
                m = torch.from_numpy(arrays[f"{i}.m"].astype(np.int64)).reshape(mshape)
                s = op["shift"]
                acc = torch.clamp((acc * m + (1 << (s - 1))) >> s, 0, ACT_MAX)
            vals.append(acc)
        elif k == "add":
            a, c = vals[op["in"][0]], vals[op["in"][1]]
            s = op["shift"]
            vals.append(torch.clamp((a * op["ma"] + c * op["mb"] + (1 << (s - 1))) >> s, 0, ACT_MAX))
        else:
            lg = vals[op["in"]]
            lg = lg.permute(0, 2, 3, 1) if lg.dim() == 4 else lg.reshape(B, H, W, A)
            z = lg.max(dim=-1, keepdim=True).values - lg
            lut = torch.from_numpy(arrays["lut"].astype(np.int64))
            idx = torch.clamp((z * op["mo"] + (1 << (op["so"] - 1))) >> op["so"], max=len(lut) - 1)
            return lut[idx]
    raise ValueError("graph without a head")
