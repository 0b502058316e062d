"""`audit(model, records)`: the probe's checks (lcodec/models/heddle_audit.py) on a model
still in torch, plus what only torch can say: causality of the float model itself (each
position perturbed, the logits that move named), and its float NLL against the integer
model's."""
from __future__ import annotations

import math

import numpy as np
import torch

from ...models import heddle_audit
from ...models.heddle import Graph
from .export import graph_of
from .helpers import nll


@torch.no_grad()
def float_pairs(model, x: torch.Tensor, limit: int = 64) -> list:
    """(p, q): the float model's logits at position p <= q move when the symbol at q changes."""
    model.eval()
    B, H, W = x.shape
    A = model.alphabet
    base = model(x)
    gen = torch.Generator().manual_seed(0)
    order = model.order or list(range(H * W))
    rank = torch.empty(H * W, dtype=torch.long)
    rank[torch.tensor(order)] = torch.arange(H * W)
    pairs = []
    for q in order:
        alt = x.clone().reshape(B, -1)
        alt[:, q] = (alt[:, q] + torch.randint(1, A, (B,), generator=gen)) % A
        moved = (model(alt.reshape(B, H, W)) != base).any(dim=-1).any(dim=0).reshape(-1)
        for p in torch.nonzero(moved & (rank <= rank[q])).flatten().tolist():
            pairs.append((p, q))
            if len(pairs) >= limit:
                return pairs
    return pairs


def audit(model, records, speed: bool = True, echo=print) -> dict:
    """Check a HeddleNet on records (B, H, W) of symbols; returns the figures."""
    x = torch.as_tensor(np.asarray(records), dtype=torch.long)
    if model.record != (0, 0) and tuple(x.shape[1:]) != model.record:
        raise ValueError(f"records must be {model.record}")
    fp = float_pairs(model, x[:8])
    echo("float model autoregressive: " + ("yes" if not fp else "NO, broken pairs (position <- position it "
                                             "depends on): " + ", ".join(f"{p}<-{q}" for p, q in fp[:12])))
    params, arrays = graph_of(model)
    graph = Graph(params, arrays, check_causal=False)
    H, W = x.shape[1:]
    if model.record == (0, 0):
        graph.H, graph.W = 0, 0
    rec = x.reshape(len(x), -1).numpy()
    if model.order is not None:  # the exported graph codes records laid out in coding order
        rec, H, W = rec[:, model.order], 1, H * W
    rep = heddle_audit.run(graph, rec, speed=speed and graph.P > 0, echo=echo) if graph.P else \
        _image_run(graph, rec, H, W, echo)
    rep["float_pairs"] = fp
    with torch.no_grad():
        model.eval()
        rep["float_bits_per_symbol"] = float(nll(model, x)) / math.log(2)
    if "integer_bits_per_symbol" in rep:
        gap = rep["integer_bits_per_symbol"] / rep["float_bits_per_symbol"] - 1
        rep["integer_gap"] = gap
        echo(f"float NLL {rep['float_bits_per_symbol']:.4f}, integer {rep['integer_bits_per_symbol']:.4f} bits per "
             f"symbol ({100 * gap:+.2f}%)")
    rep["ok"] = rep.get("ok", False) and not fp
    return rep


def _image_run(graph, rec, H, W, echo):
    """The probe's checks for an image-sized model on records of one H x W size."""
    rep = {"record": [H, W], "alphabet": graph.A, "records": len(rec)}
    plan = graph.plan(H, W)
    pairs = heddle_audit.causal_pairs(graph, rec[:4], H, W)
    rep["causal_pairs"], rep["causal"] = pairs, not pairs and not plan.violations
    echo("autoregressive (integer model): " + ("yes" if rep["causal"] else
                                               "NO: " + ", ".join(f"{p}<-{q}" for p, q in pairs[:12])))
    if plan.violations:
        return rep
    par = graph.parallel(rec, H, W, width=graph.A)
    rep["parallel_equals_step"] = bool(np.array_equal(par, heddle_audit.step_tables(graph, rec, H, W)))
    rep["same_tables"] = heddle_audit.thread_check(graph, rec, H, W)
    rep["integer_bits_per_symbol"] = heddle_audit.integer_bits(graph, rec, H, W)
    echo(f"parallel pass == step pass: {'yes' if rep['parallel_equals_step'] else 'NO'}; same tables: "
         + ", ".join(f"{k}: {'yes' if v else 'NO'}" for k, v in rep["same_tables"].items()))
    rep["ok"] = rep["causal"] and rep["parallel_equals_step"] and all(rep["same_tables"].values())
    return rep
