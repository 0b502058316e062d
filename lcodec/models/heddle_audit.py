"""The checks behind `lcodec probe` and `kit.audit`, on a heddle graph (no torch):

  causality   change the symbol at each position q of some records and see which tables
              move: a moved table at a position p <= q is a broken pair (p needs q);
  passes      the parallel (teacher) pass and the step (decoder) pass give the same tables;
  threads     the same tables with 1 and 2 BLAS threads, and with the records batched
              whole, one by one and in two uneven parts;
  nll         the integer tables' NLL on the records (bits per symbol);
  speed       symbols/s of a real decode (the step pass with the range decoder).
"""
from __future__ import annotations

import time

import numpy as np

from .heddle import Graph, Heddle


def _records(graph: Graph, records, n: int, seed: int, shape=None) -> tuple[np.ndarray, int, int]:
    H, W = shape or ((graph.H, graph.W) if graph.P else (8, 8))
    if records is None:
        rng = np.random.default_rng(seed)
        records = rng.integers(0, graph.A, size=(n, H * W))
    records = np.asarray(records, np.int64).reshape(len(records), -1)
    if records.shape[1] != H * W:
        raise ValueError(f"records must hold {H * W} symbols each")
    return records, H, W


def causal_pairs(graph: Graph, records, H: int, W: int, seed: int = 0, limit: int = 64) -> list:
    """(p, q) pairs where changing the symbol at q moves the table at p <= q (perturbation)."""
    rng = np.random.default_rng(seed)
    base = graph.parallel(records, H, W, width=graph.A)
    pairs = []
    for q in range(H * W):
        alt = records.copy()
        alt[:, q] = (alt[:, q] + rng.integers(1, graph.A, size=len(alt))) % graph.A
        moved = np.any(graph.parallel(alt, H, W, width=graph.A) != base, axis=(0, 2))
        for p in np.flatnonzero(moved[:q + 1]):
            pairs.append((int(p), q))
            if len(pairs) >= limit:
                return pairs
    return pairs


def step_tables(graph: Graph, records, H: int, W: int) -> np.ndarray:
    B, P = records.shape
    step = graph.stepper(B, H, W, width=graph.A)
    out = np.empty((B, P, graph.A))
    prev = None
    for q in range(P):
        out[:, q] = step(q, prev)
        prev = records[:, q]
    return out


def thread_check(graph: Graph, records, H: int, W: int) -> dict:
    """Tables with 1 and 2 BLAS threads and several batch shapes, against the first."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        ref = graph.parallel(records, H, W, width=graph.A)
    with threadpool_limits(limits=2, user_api="blas"):
        two = graph.parallel(records, H, W, width=graph.A)
    ones = np.concatenate([graph.parallel(r[None], H, W, width=graph.A) for r in records[:8]])
    cut = max(1, len(records) // 3)
    parts = np.concatenate([graph.parallel(records[:cut], H, W, width=graph.A),
                            graph.parallel(records[cut:], H, W, width=graph.A)])
    return {"threads 1 == 2": bool(np.array_equal(ref, two)),
            "one record at a time": bool(np.array_equal(ref[:len(ones)], ones)),
            "two uneven batches": bool(np.array_equal(ref, parts))}


def integer_bits(graph: Graph, records, H: int, W: int) -> float:
    """Bits per symbol of the records under the integer tables."""
    tab = graph.parallel(records, H, W, width=graph.A)
    chosen = np.take_along_axis(tab, np.minimum(records, graph.A - 1)[:, :, None], axis=2)[:, :, 0]
    return float(-np.log2(chosen / tab.sum(axis=2)).mean())


def decode_speed(model: Heddle, records) -> float:
    """Symbols/s of a decode of the records as one byte frame (range decoder included)."""
    from ..coding import decode_frame, encode_frame

    data = np.asarray(records, np.uint8).tobytes()
    lanes = model.lanes_for(len(data)) or 1
    payload, _ = encode_frame(model, data, lanes, "queue")
    t0 = time.perf_counter()
    out = decode_frame(model, payload, len(data), lanes, "queue")
    dt = time.perf_counter() - t0
    if out != data:
        raise AssertionError("decode gave other bytes")
    return len(data) / dt


def run(graph: Graph, records=None, n: int = 16, seed: int = 0, speed: bool = True, echo=print, shape=None) -> dict:
    """Every check on a graph; returns the figures and prints a short report."""
    records, H, W = _records(graph, records, n, seed, shape)
    rep = {"record": [H, W], "alphabet": graph.A, "records": len(records)}
    plan = graph.plan(H, W)
    rep["static_pairs"] = plan.violations[:64]
    pairs = causal_pairs(graph, records[:8], H, W, seed)
    rep["causal_pairs"] = pairs
    rep["causal"] = not pairs and not plan.violations
    echo(f"autoregressive (perturbing each of {H * W} positions): "
         + ("yes" if not pairs else "NO, broken pairs (position <- position it depends on): "
            + ", ".join(f"{p}<-{q}" for p, q in pairs[:12])))
    if plan.violations:
        echo("  the graph's own dependencies: " + ", ".join(f"{p}<-{q}" for p, q in plan.violations[:12]))
        rep["ok"] = False
        return rep
    par = graph.parallel(records, H, W, width=graph.A)
    rep["parallel_equals_step"] = bool(np.array_equal(par, step_tables(graph, records, H, W)))
    echo(f"parallel pass == step pass: {'yes' if rep['parallel_equals_step'] else 'NO'}")
    rep["same_tables"] = thread_check(graph, records, H, W)
    echo("same tables: " + ", ".join(f"{k}: {'yes' if v else 'NO'}" for k, v in rep["same_tables"].items()))
    rep["integer_bits_per_symbol"] = integer_bits(graph, records, H, W)
    echo(f"integer NLL: {rep['integer_bits_per_symbol']:.4f} bits per symbol on {len(records)} records")
    if speed and graph.P:
        model = Heddle.__new__(Heddle)
        model.graph, model.params, model.R = graph, None, graph.P
        rep["decode_symbols_per_s"] = decode_speed(model, np.minimum(records, 255))
        echo(f"decode speed: {rep['decode_symbols_per_s']:,.0f} symbols/s (one frame, this process)")
    rep["ok"] = rep["causal"] and rep["parallel_equals_step"] and all(rep["same_tables"].values())
    return rep
