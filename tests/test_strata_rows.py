"""strata's rows (a 64-byte line for a few bytes seen, a big row past SMALL) against a
Python-integer reference of the plain recipe: 256 counts per row, halved at 255, and the
blend of orders from the uniform distribution up."""
import numpy as np
import pytest

from lcodec.models import strata as S


def _ref_update(rows, slots, checks, sym):
    for k in range(len(slots) - 1, -1, -1):
        r = rows.setdefault(slots[k], {"tag": None})
        if r["tag"] != checks[k]:
            r.update(tag=checks[k], cnt=[0] * 256)
        cnt = r["cnt"]
        if cnt[sym] >= S.COUNT_LIMIT:
            r["cnt"] = cnt = [(v + 1) >> 1 if v > 1 else v for v in cnt]
        c = cnt[sym]
        cnt[sym] = c + 1
        if c:
            break


def _ref_predict(rows, slots, checks, disc):
    one = 1 << S.P_BITS
    p = [one >> 8] * 256
    for k in range(len(slots)):
        r = rows.get(slots[k])
        if r is None or r["tag"] != checks[k] or sum(r["cnt"]) == 0:
            continue
        a1, a2, a3 = disc[k][0], disc[k][1] - disc[k][0], disc[k][2] - disc[k][1]
        d = [a1 * (c >= 1) + a2 * (c >= 2) + a3 * (c >= 3) for c in r["cnt"]]
        esc = sum(d)
        inv = (1 << 32) // (sum(r["cnt"]) * S.F)
        p = [(((c * S.F - d[s]) * one + esc * p[s]) * inv) >> 32 for s, c in enumerate(r["cnt"])]
    return p


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_rows_and_blend_match_python_integers(seed):
    rng = np.random.default_rng(seed)
    n_rows, max_order, steps = 6, 2, 5000
    lines, _, _, gen = S._pool_take(n_rows, S.big_rows_for(steps, max_order))
    nxt = np.zeros(2, np.int64)
    disc = np.array([[10, 14, 20], [12, 17, 23], [13, 18, 24]], np.int64)
    p = np.zeros(256, np.int64)
    keep = np.empty((S.SMALL, 3), np.int64)
    seen, vals = np.zeros((3, 256), np.int64), np.empty(256, np.int64)
    rows, halved = {}, False
    try:
        for t in range(steps):
            # one byte (halvings in short rows), many bytes (rows move to big rows), one byte
            # again (halvings in big rows), a few bytes
            u = t % 2500
            sym = int(7 if u < 700 or 1000 <= u < 2200 else (rng.integers(0, 256) if u < 1000 else rng.integers(60, 70)))
            # order 0: one row of its own (as in the model); above: rows shared at random,
            # each slot's own context, and now and then another one taking it over
            slots = np.array([0, *rng.choice(np.arange(1, n_rows), max_order, replace=False)], np.int64)
            checks = np.array([(gen << 32) | (2 * int(r) + 1 + int(r > 0 and rng.random() < 0.002)) for r in slots],
                              np.uint64)
            top = rows.get(int(slots[-1]))
            halved |= bool(top and top["tag"] == checks[-1] and top["cnt"][sym] >= S.COUNT_LIMIT)
            S._update(lines, slots[None], checks[None], 0, max_order, sym, nxt, seen)
            _ref_update(rows, slots.tolist(), checks.tolist(), sym)
            if t % 23 == 0 or t == steps - 1:
                S._predict(lines, slots[None], checks[None], 0, max_order, disc, p, keep, seen, vals)
                assert p.tolist() == _ref_predict(rows, slots.tolist(), checks.tolist(), disc.tolist()), t
                meta = lines[0]
                for r, ref in rows.items():
                    assert [int(meta[r, f]) for f in (S.TOT, S.DIST)] == [sum(ref["cnt"]), sum(c > 0 for c in ref["cnt"])]
        assert nxt[1] > 3 and halved  # rows moved to big rows, and counts were halved
    finally:
        S._pool_give((lines,))


def test_emit_is_the_exact_float_of_each_count():
    """The coder's table is p + 1 as float64; _emit converts through int32 (a vector
    operation) instead of int64. It must equal Python's own int -> float for every value
    up to the int32 limit, the edges included; the models' values stay far below it (the
    next test)."""
    from numba import njit

    @njit
    def emit(p, out):
        S._emit(p, out)

    rng = np.random.default_rng(7)
    for hi in (2, 1 << 21, 1 << 24, (1 << 31) - 1):
        p = rng.integers(0, hi, 256).astype(np.int64)
        p[0], p[1] = 0, hi - 1
        out = np.empty(256, np.float64)
        emit(p, out)
        assert [float(x) for x in out] == [float(int(x) + 1) for x in p]


def test_the_models_tables_stay_far_below_the_int32_limit(stdlib_text):
    """_emit's int32 conversion needs every p + 1 below 2**31. A table's total is about
    2**P_BITS (2**20), so no entry comes near; checked on real text for strata and for the
    default braid recipe (the golden tiny model, escape weights, repeats and secondary
    estimation on)."""
    import os

    from lcodec.coding.coder import lane_layout
    from lcodec.models import load_model

    data = np.frombuffer(stdlib_text[:60_000], np.uint8)
    golden = os.path.join(os.path.dirname(__file__), "golden", "braid-mixed-tiny.lcmodel")
    for model in (S.Strata(), load_model(golden)):
        for lanes in (1, 16):
            starts, lengths = lane_layout(len(data), lanes)
            top = max(float(tab.max()) for _, tab in model.teacher_chunks(data, starts, lengths))
            assert 1 < top < 2.0 ** 24, (model, lanes, top)
