"""Loss and sampling helpers for a HeddleNet; the training loop stays the user's."""
from __future__ import annotations

import torch
import torch.nn.functional as F


def nll(model, x: torch.Tensor, reduction: str = "mean") -> torch.Tensor:
    """Negative log-likelihood in nats per symbol of records x (B, H, W), teacher forced:
    every position's distribution from one pass over the true symbols."""
    logits = model(x)
    return F.cross_entropy(logits.reshape(-1, logits.shape[-1]), x.reshape(-1).long(), reduction=reduction)


def bits_per_symbol(model, x: torch.Tensor) -> float:
    """The float model's NLL in bits per symbol (no gradients)."""
    with torch.no_grad():
        return float(nll(model, x)) / float(torch.log(torch.tensor(2.0)))


@torch.no_grad()
def sample(model, n: int, record=None, temperature: float = 1.0, seed: int = 0) -> torch.Tensor:
    """n records drawn from the model in raster order (one pass per position), to see what
    it learned. `record` (H, W) is needed for an image-sized model."""
    H, W = record or model.record
    if H * W == 0:
        raise ValueError("give the record size of an image-sized model")
    g = torch.Generator().manual_seed(seed)
    was = model.training
    model.eval()
    x = torch.zeros(n, H, W, dtype=torch.long)
    for p in (getattr(model, "order", None) or range(H * W)):
        r, c = divmod(p, W)
        logits = model(x)[:, r, c, :] / max(temperature, 1e-6)
        x[:, r, c] = torch.multinomial(torch.softmax(logits, -1), 1, generator=g)[:, 0]
    model.train(was)
    return x
