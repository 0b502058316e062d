"""weft's second inference backend: the same integer forward pass in torch (float32
matrix products on integer values, exact while every partial sum stays below 2**24).

Optional: `Weft.set_backend("torch")` / `Tessel.set_backend("torch")` load this module by
name; the tests compare its tables with the numpy backend's. Nothing on the decoding
path imports it, so decoding never needs torch.
"""
from __future__ import annotations

import numpy as np
import torch

from .weft import context_rows


class TorchKernels:
    """The same integer forward pass with torch (float32 matmul on integer values)."""

    name = "torch"

    def __init__(self, params, arrays):
        self.torch = torch
        self.p = params
        self.emb = torch.from_numpy(arrays["emb"].astype(np.int64))
        self.hemb = torch.from_numpy(arrays["hemb"]) if "hemb" in arrays else None
        self.w1 = torch.from_numpy(arrays["w1"].astype(np.float32))
        self.b1 = torch.from_numpy(arrays["b1"].astype(np.int64))
        self.w2 = torch.from_numpy(arrays["w2"].astype(np.float32))
        self.b2 = torch.from_numpy(arrays["b2"].astype(np.int64))
        self.lut = torch.from_numpy(arrays["lut"].astype(np.int64))

    def tables(self, ctx: np.ndarray) -> np.ndarray:
        t, p = self.torch, self.p
        with t.no_grad():
            c = t.from_numpy(np.ascontiguousarray(ctx, np.int64))
            x = self.emb[c].reshape(len(ctx), -1).to(t.float32)
            if self.hemb is not None:
                rows = t.from_numpy(context_rows(ctx, p["hash_orders"], p["hash_bits"]))
                x = t.cat([x, self.hemb[rows].reshape(len(ctx), -1).to(t.float32)], dim=1)
            acc = (x @ self.w1).to(t.int64) + self.b1  # exact: partial sums < 2**24
            h = t.clamp((acc * p["m1"] + (1 << (p["s1"] - 1))) >> p["s1"], 0, 127).to(t.float32)
            logit = (h @ self.w2).to(t.int64) + self.b2  # exact: partial sums < 2**24
            z = logit.max(dim=1, keepdim=True).values - logit
            idx = t.clamp((z * p["mo"] + (1 << (p["so"] - 1))) >> p["so"], max=len(self.lut) - 1)
            return self.lut[idx].numpy().astype(np.float64)
