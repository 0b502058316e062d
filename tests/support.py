"""Helpers shared by the tests (import as `from support import ...`)."""
import os
import sysconfig

import numpy as np
import pytest

from lcodec.coding import active_lanes, lane_layout


def stdlib_file(rel: str, n: int | None = None) -> bytes:
    """The first n bytes (all by default) of a file of the Python standard library."""
    # reference: the Python standard library's own sources
    p = os.path.join(sysconfig.get_paths()["stdlib"], *rel.split("/"))
    if not os.path.isfile(p):
        pytest.skip(f"{p} is not on this machine")
    with open(p, "rb") as f:
        return f.read()[:n]


def teacher_tables(model, data, lanes, chunk=None):
    """All tables of a frame from the encoder's (parallel, teacher-forced) pass."""
    arr = np.frombuffer(data, np.uint8)
    starts, lengths = lane_layout(len(arr), lanes)
    kw = {} if chunk is None else {"chunk_steps": chunk}
    return np.concatenate([t.copy() for _, t in model.teacher_chunks(arr, starts, lengths, **kw)])


def step_tables(model, data, lanes):
    """All tables of a frame as the decoder computes them, one step at a time."""
    arr = np.frombuffer(data, np.uint8)
    starts, lengths = lane_layout(len(arr), lanes)
    step = model.stepper(lengths)
    prev = np.zeros(len(lengths), np.int32)
    out, m_prev = [], 0
    for t, m in enumerate(active_lanes(lengths, int(lengths[0]))):
        out.append(step(prev, m_prev, int(m)).copy())
        prev[:m] = arr[starts[:m] + t]
        m_prev = int(m)
    if hasattr(step, "close"):
        step.close()
    return np.concatenate(out)


def v3_twin(name: str) -> bytes:
    """tests/golden/v3/NAME.lcodec: the container today's encoder writes (format version 3)
    for the golden NAME.orig with the golden NAME.lcodec's model and frame size (made by
    scripts/make_golden.py). An older golden container must keep decoding; its twin is what
    today's encoder must keep writing."""
    import os
    with open(os.path.join(os.path.dirname(__file__), "golden", "v3", name + ".lcodec"), "rb") as f:
        return f.read()


def markov_chain(seed: int, alphabet: int = 4, n: int = 1 << 17):
    """A random stationary Markov chain over `alphabet` symbols: its transition matrix P,
    its entropy rate H = -sum_i mu_i sum_j P_ij log2 P_ij in bits per symbol (Cover and
    Thomas, Elements of Information Theory, ch. 4; the formula as recalled from memory; mu
    the stationary distribution), and n symbols drawn from it starting at 0."""
    rng = np.random.default_rng(seed)
    P = rng.dirichlet(np.ones(alphabet) * 0.7, size=alphabet)
    evals, evecs = np.linalg.eig(P.T)
    mu = np.real(evecs[:, np.argmin(abs(evals - 1))])
    mu /= mu.sum()
    rate = float(-(mu[:, None] * P * np.log2(P)).sum())
    u = rng.random(n)
    cum = np.cumsum(P, axis=1)
    x = np.zeros(n, np.int64)
    for t in range(1, n):
        x[t] = min(int(np.searchsorted(cum[x[t - 1]], u[t])), alphabet - 1)
    return P, rate, x
