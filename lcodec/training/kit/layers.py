"""The layer kit: torch layers whose forward pass simulates the integer model heddle runs.

Every layer quantises as it trains (fake quantisation; rounding passes gradients straight
through): weights to -127..127 on a scale of their own (per output unit, per tensor for
logits), biases to the grid of their accumulator, activations to 0..127 on a scale the
layer tracks (a running 99.9th percentile). `export` turns the same numbers into the
integers of a model file (lcodec/models/heddle.py), whose inference is exact.

Tensors between layers: a *grid* (B, C, H, W) for a record of H x W positions, or *flat*
(B, U). Each layer takes and returns (tensor, scale): the real value of an integer
activation is integer * scale.

The 2**24 bound holds by construction: a layer refuses a fan-in (inputs that can reach one
output through its mask) above MAX_FAN_IN = floor((2**24 - 1) / 127**2) = 1040, so with
|x| <= 127 and |w| <= 127 every partial sum of its product stays below 2**24.
"""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

ACT_MAX = 127
MAX_FAN_IN = ((1 << 24) - 1) // (ACT_MAX * ACT_MAX)  # 1040
EPS = 1e-12


class _RoundSTE(torch.autograd.Function):
    @staticmethod
    def forward(ctx, x):
        return torch.round(x)

    @staticmethod
    def backward(ctx, g):
        return g


def ste_round(x):
    """round(x) forward, identity backward (straight-through)."""
    return _RoundSTE.apply(x)


def fake_quant(x, scale, lo, hi):
    """scale * clamp(round(x / scale), lo, hi), gradients straight through the rounding."""
    return torch.clamp(ste_round(x / scale), lo, hi) * scale


def _check_fan_in(n: int, what: str) -> None:
    if n > MAX_FAN_IN:
        raise ValueError(f"{what}: {n} inputs reach one output; at most {MAX_FAN_IN} keep every partial sum "
                         "below 2**24 (127 * 127 * inputs)")


class _ActScale(nn.Module):
    """The scale of a layer's 0..127 output: a running 99.9th percentile of its ReLU values
    while training, fixed otherwise."""

    def __init__(self):
        super().__init__()
        self.register_buffer("top", torch.tensor(0.0))

    def scale(self):
        return torch.clamp(self.top, min=1e-4) / ACT_MAX

    def observe(self, y):
        if self.training:
            with torch.no_grad():
                v = y.detach().flatten()[:1 << 16].float()
                q = torch.quantile(v, 0.999).clamp(min=1e-3)
                self.top.copy_(q if float(self.top) == 0.0 else 0.99 * self.top + 0.01 * q)


class _Weighted(nn.Module):
    """Shared parts of the weighted layers: quantised weights, bias on the accumulator grid,
    ReLU requantised to 0..127 ("relu") or raw logits in nats ("logits")."""

    def _setup(self, act: str):
        if act not in ("relu", "logits"):
            raise ValueError("act must be 'relu' or 'logits'")
        self.act = act
        self.out_scale = _ActScale()

    def weight_scale(self):
        """Per output unit (relu) or one for the tensor (logits: the head needs one grid)."""
        w = (self.weight * self.mask).detach()
        per = w.abs().reshape(w.shape[0], -1).amax(dim=1)
        if self.act == "logits":
            per = per.max().expand_as(per)
        return per / ACT_MAX + EPS

    def quant_weight(self):
        sw = self.weight_scale()
        shape = (-1,) + (1,) * (self.weight.dim() - 1)
        return fake_quant(self.weight * self.mask, sw.reshape(shape), -ACT_MAX, ACT_MAX), sw

    def quant_bias(self, s_in, sw):
        g = s_in * sw
        return fake_quant(self.bias, g, -(1 << 24) + 1, (1 << 24) - 1)

    def finish(self, acc):
        if self.act == "logits":
            return acc, None
        y = torch.relu(acc)
        self.out_scale.observe(y)
        s = self.out_scale.scale()
        return fake_quant(y, s, 0, ACT_MAX), s


class SymbolEmbed(nn.Module):
    """Embeddings of symbols at fixed offsets from each position: output position p holds
    concat_k emb[x[p + shift_k]] (a PAD row where p + shift_k is outside the record).

    Args:
        alphabet: symbols 0..alphabet-1 (others read the PAD row).
        dim: values per embedding.
        shifts: (rows, cols) offsets; the default [(0, 0)] embeds the symbol at p itself
            (the masked layers after it keep the model causal); `causal_window(k)` gives the
            k previous positions of a row.
    Shapes: x (B, H, W) long -> (B, dim * len(shifts), H, W).
    """

    def __init__(self, alphabet: int, dim: int, shifts=((0, 0),)):
        super().__init__()
        self.alphabet, self.dim, self.shifts = alphabet, dim, [tuple(s) for s in shifts]
        self.weight = nn.Parameter(torch.randn(alphabet + 1, dim) * 0.5)

    @property
    def width(self):
        return self.dim * len(self.shifts)

    def scale(self):
        return self.weight.detach().abs().max() / ACT_MAX + EPS

    def forward(self, x):
        s = self.scale()
        table = fake_quant(self.weight, s, -ACT_MAX, ACT_MAX)
        x = torch.clamp(x, max=self.alphabet)
        B, H, W = x.shape
        parts = []
        for dy, dx in self.shifts:
            pad = F.pad(x, (max(-dx, 0), max(dx, 0), max(-dy, 0), max(dy, 0)), value=self.alphabet)
            parts.append(pad[:, max(dy, 0):max(dy, 0) + H, max(dx, 0):max(dx, 0) + W])
        e = table[torch.stack(parts, dim=-1)]  # (B, H, W, shifts, dim)
        return e.reshape(B, H, W, -1).permute(0, 3, 1, 2), s


def causal_window(k: int):
    """Shifts of the k previous positions of a row (nearest first), for SymbolEmbed."""
    return [(0, -j) for j in range(1, k + 1)]


def mask_degrees(positions: int, hidden: int, order=None, seed: int = 0):
    """Degrees in the masked-autoencoder style (Germain et al., 2015) for `positions` symbols
    coded in `order` (a permutation of positions; default natural): input degree of
    position p = its rank + 1; hidden degrees spread evenly over 1..positions-1. Returns
    (input degrees per position, hidden degrees)."""
    order = list(range(positions)) if order is None else list(order)
    if sorted(order) != list(range(positions)):
        raise ValueError("order must be a permutation of the positions")
    din = torch.empty(positions, dtype=torch.long)
    din[torch.tensor(order)] = torch.arange(1, positions + 1)
    span = max(positions - 1, 1)
    dh = torch.tensor([1 + (j * span) // max(hidden, 1) for j in range(hidden)], dtype=torch.long)
    return din, dh


class DegreeLinear(_Weighted):
    """A masked linear layer (masked-autoencoder style). Unit j sees input i when
    out_degrees[j] >= in_degrees[i] (hidden layers) or > (strict=True: the layer that
    gives the logits of each position, whose degree is that position's rank + 1).

    Args:
        in_degrees: degree of every input feature (a grid input is flattened position-major:
            feature p * C + c has the degree of position p; `grid_degrees` repeats them).
        out_degrees: degree of every output unit.
        act: "relu" (0..127 activations) or "logits" (units p * alphabet + a).
    Shapes: (B, C, H, W) or (B, U) -> (B, len(out_degrees)).
    """

    def __init__(self, in_degrees, out_degrees, act: str = "relu", strict: bool = False):
        super().__init__()
        din, dout = torch.as_tensor(in_degrees), torch.as_tensor(out_degrees)
        mask = (dout[:, None] > din[None, :]) if strict else (dout[:, None] >= din[None, :])
        self.register_buffer("mask", mask.float())
        self.register_buffer("in_degrees", din.clone())
        self.register_buffer("out_degrees", dout.clone())
        _check_fan_in(int(mask.sum(dim=1).max()), "DegreeLinear")
        self.weight = nn.Parameter(torch.randn(len(dout), len(din)) / math.sqrt(max(len(din), 1)))
        self.bias = nn.Parameter(torch.zeros(len(dout)))
        self._setup(act)

    def forward(self, x, s_in):
        if x.dim() == 4:
            x = x.permute(0, 2, 3, 1).reshape(x.shape[0], -1)
        w, sw = self.quant_weight()
        acc = x @ w.t() + self.quant_bias(s_in, sw)
        return self.finish(acc)


def grid_degrees(position_degrees, channels: int):
    """Degrees of a grid input flattened position-major (each position's degree, C times)."""
    return torch.as_tensor(position_degrees).repeat_interleave(channels)


class RasterConv(_Weighted):
    """A masked 2-D convolution in raster order (a 1-D one is H = 1, kernel (1, k)).
    The kernel covers kh - 1 rows above and the current row, kw // 2 columns either side;
    it sees every position above, positions left of the centre on the current row, and the
    centre itself only with include_centre=True (the published mask types: centre excluded
    for the first layer over the symbols, included for the layers after it).

    Args:
        cin, cout: channels in and out.
        kernel: (kh, kw), kw odd.
        include_centre: whether the centre tap is used.
        act: "relu" or "logits" (cout = alphabet).
    Shapes: (B, cin, H, W) -> (B, cout, H, W).
    """

    def __init__(self, cin: int, cout: int, kernel=(3, 5), include_centre: bool = True, act: str = "relu"):
        super().__init__()
        kh, kw = kernel
        if kw % 2 == 0 or kh < 1:
            raise ValueError("kernel (rows, cols) needs rows >= 1 and odd cols")
        mask = torch.ones(kh, kw)
        mask[kh - 1, kw // 2 + (1 if include_centre else 0):] = 0
        self.kernel, self.include_centre = (kh, kw), include_centre
        self.register_buffer("mask", mask.expand(cout, cin, kh, kw).clone())
        _check_fan_in(int(mask.sum()) * cin, "RasterConv")
        self.weight = nn.Parameter(torch.randn(cout, cin, kh, kw) / math.sqrt(max(int(mask.sum()) * cin, 1)))
        self.bias = nn.Parameter(torch.zeros(cout))
        self._setup(act)

    def forward(self, x, s_in):
        kh, kw = self.kernel
        w, sw = self.quant_weight()
        xp = F.pad(x, (kw // 2, kw // 2, kh - 1, 0))
        acc = F.conv2d(xp, w, self.quant_bias(s_in, sw))
        return self.finish(acc)


class Residual(nn.Module):
    """y = requant(x + f(x)): a residual sum of the block's input and output (both 0..127
    activations), requantised to 0..127 on a scale of its own.
    Shapes: as the block's (its output must have its input's shape)."""

    def __init__(self, *layers):
        super().__init__()
        self.block = nn.ModuleList(layers)
        self.out_scale = _ActScale()

    def forward(self, x, s_in):
        y, s = x, s_in
        for layer in self.block:
            y, s = layer(y, s)
        if s is None:
            raise ValueError("a residual block must end with a relu layer")
        z = x + y
        self.out_scale.observe(z)
        so = self.out_scale.scale()
        return fake_quant(z, so, 0, ACT_MAX), so


class Dropout(nn.Module):
    """Dropout of activations while training (identity in eval mode and in the exported
    model, which has no op for it). Shapes: unchanged."""

    def __init__(self, p: float = 0.2):
        super().__init__()
        self.p = p

    def forward(self, x, s_in):
        return F.dropout(x, self.p, self.training), s_in


class HeddleNet(nn.Module):
    """An autoregressive model over records of H x W symbols, built from the kit's layers;
    the last layer gives logits (act="logits"): a grid with `alphabet` channels, or flat
    units p * alphabet + a. Its softmax runs through the exponential table once exported
    (`export`); here the logits are plain nats.

    Args:
        record: (H, W); (0, 0) for an image-sized pixel model (convolutions only).
        alphabet: symbols per position (256 for bytes and 8-bit samples).
        embed: the SymbolEmbed.
        layers: the rest, in order (DegreeLinear, RasterConv, Residual, Dropout).
        order: the coding order, a permutation of the positions (order[k] is coded k-th;
            default raster). Another order needs DegreeLinear layers alone (degrees from
            `mask_degrees(..., order)`) and an embedding of each position's own symbol;
            the exported model codes records whose bytes are laid out in coding order
            (`to_coding_order`).
    Shapes: x (B, H, W) long -> logits (B, H, W, alphabet).
    """

    def __init__(self, record, alphabet: int, embed: SymbolEmbed, layers, order=None):
        super().__init__()
        self.record, self.alphabet = tuple(record), alphabet
        self.embed = embed
        self.layers = nn.ModuleList(layers)
        if embed.alphabet != alphabet:
            raise ValueError("the embedding's alphabet differs from the model's")
        P = self.record[0] * self.record[1]
        self.order = None
        if order is not None and list(order) != list(range(P)):
            if sorted(order) != list(range(P)):
                raise ValueError("order must be a permutation of the record's positions")
            if embed.shifts != [(0, 0)] or any(isinstance(m, RasterConv) for m in self.modules()):
                raise ValueError("another coding order needs DegreeLinear layers over each position's own "
                                 "symbol (convolutions and windows are raster-ordered)")
            self.order = [int(v) for v in order]

    def forward(self, x):
        B, H, W = x.shape
        y, s = self.embed(x)
        for layer in self.layers:
            y, s = layer(y, s)
        if s is not None:
            raise ValueError("the last layer must give logits (act='logits')")
        if y.dim() == 4:
            return y.permute(0, 2, 3, 1)
        return y.reshape(B, H, W, self.alphabet)


def to_coding_order(records, order):
    """Records (B, H, W) or (B, P) -> (B, P) with their symbols in coding order: the byte
    layout a model exported with `order` codes."""
    x = torch.as_tensor(records)
    return x.reshape(x.shape[0], -1)[:, list(order)]


def from_coding_order(records, order):
    """Inverse of to_coding_order: (B, P) in coding order -> (B, P) in raster order."""
    x = torch.as_tensor(records)
    out = torch.empty_like(x)
    out[:, list(order)] = x
    return out
