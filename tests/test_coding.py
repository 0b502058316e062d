"""The coding layer against information theory, and the adaptive model against known sources."""
import numpy as np
import pytest
from scipy.stats import entropy

from lcodec.coding.coder import decode_frame, encode_frame, lane_layout, active_lanes, step_widths
from lcodec.models.strata import Strata

FRAME_FIXED_BYTES = 8  # range/ANS coder flush: at most two 32-bit words beyond the NLL (docs/FORMAT.md)


class FixedTable:
    """A model with one known table for every symbol (an i.i.d. source's true distribution)."""

    def __init__(self, freqs, coder="queue"):
        self.freqs = np.asarray(freqs, np.float64)
        self.coder = coder

    def teacher_chunks(self, data, starts, lengths, chunk_steps=4096):
        from lcodec.coding.coder import active_lanes
        act = active_lanes(lengths, int(lengths[0]) if len(lengths) else 0)
        for t0 in range(0, len(act), chunk_steps):
            syms = np.concatenate([data[starts[:m] + t] for t, m in enumerate(act[t0:t0 + chunk_steps], t0)]).astype(np.int32)
            yield syms, np.broadcast_to(self.freqs, (len(syms), len(self.freqs)))

    def stepper(self, lengths):
        tab = np.broadcast_to(self.freqs, (len(lengths), len(self.freqs)))
        return lambda prev, m_prev, m: tab[:m]


def _iid(n, p, seed):
    rng = np.random.default_rng(seed)
    return rng.choice(len(p), size=n, p=p).astype(np.uint8)


@pytest.mark.parametrize("coder", ["queue", "stack"])
def test_iid_source_codes_within_half_percent_of_entropy(coder):
    # reference: Shannon's source coding theorem; H from scipy.stats.entropy
    freqs = np.array([5000, 2000, 1500, 800, 400, 200, 90, 10] + [0] * 248, np.float64)
    freqs[8:] = 0
    p = freqs[:8] / freqs[:8].sum()
    data = _iid(200_000, p, 1)
    H = entropy(p, base=2)
    tab = freqs.copy()
    tab[tab == 0] = 1e-9  # constriction still gives unused symbols its smallest probability
    m = FixedTable(tab[:8], coder)
    payload, nll = encode_frame(m, data.tobytes(), lanes=16, coder=coder)
    bits = 8 * len(payload)
    assert bits <= 1.005 * len(data) * H
    assert bits >= 0.99 * len(data) * H  # nothing beats the entropy by more than chance
    assert decode_frame(m, payload, len(data), 16, coder) == data.tobytes()


def test_coded_size_tracks_model_nll_on_real_text(stdlib_text):
    # bound stated in docs/FORMAT.md: coded <= NLL * 1.001 + FRAME_FIXED_BYTES, inputs >= 64 KiB
    data = stdlib_text[: 1 << 17]
    for coder in ("queue", "stack"):
        payload, nll = encode_frame(Strata(), data, lanes=16, coder=coder)
        assert len(payload) <= nll / 8 * 1.001 + FRAME_FIXED_BYTES
        assert decode_frame(Strata(), payload, len(data), 16, coder) == data


def test_two_state_markov_source_entropy_rate():
    # reference: entropy rate of a stationary Markov chain, H = sum_i pi_i H(P_i)
    # (Cover & Thomas, Elements of Information Theory, ch. 4)
    a, b = 0.1, 0.3  # P(0->1), P(1->0)
    pi0 = b / (a + b)
    h = lambda q: float(entropy([q, 1 - q], base=2))
    rate = pi0 * h(a) + (1 - pi0) * h(b)
    n = 1 << 20
    rng = np.random.default_rng(7)
    u = rng.random(n)
    x = np.empty(n, np.uint8)
    s = 0
    for i in range(n):  # plain loop on purpose: the source is defined step by step
        s = (1 if u[i] < a else 0) if s == 0 else (0 if u[i] < b else 1)
        x[i] = s
    data = (x + ord("a")).tobytes()
    payload, nll = encode_frame(Strata(), data, lanes=64)
    assert 8 * len(payload) <= 1.02 * n * rate
    assert 8 * len(payload) >= 0.99 * n * rate


def test_lane_layout_covers_every_byte_once():
    for n in (0, 1, 5, 63, 64, 65, 1000):
        for lanes in (1, 3, 64):
            starts, lengths = lane_layout(n, lanes)
            assert lengths.sum() == n
            assert all(lengths[i] >= lengths[i + 1] for i in range(len(lengths) - 1))
            cover = np.concatenate([np.arange(s, s + l) for s, l in zip(starts, lengths)]) if n else np.array([])
            assert (np.sort(cover) == np.arange(n)).all()
            act = active_lanes(lengths, int(lengths[0]) if n else 0)
            assert act.sum() == n
            # the decoder's loops take the same widths as three numbers (step_widths)
            lo, nl, n_hi = step_widths(lengths).tolist()
            assert [nl if t < lo else n_hi for t in range(len(act))] == act.tolist()


class _PythonLoop:
    """The same model with its compiled decode loop hidden: decode_frame falls back to the
    Python loop over steps, the reference the compiled loop must match."""

    def __init__(self, inner):
        self.inner = inner

    def stepper(self, lengths):
        step = self.inner.stepper(lengths)

        def plain(*a):
            return step(*a)
        plain.close = step.close
        return plain


# lanes 1-4: the coder hands the step's symbols back packed in one integer (coder.PACKED);
# 5 and 16: through the symbols-by-step array
@pytest.mark.parametrize("lanes", [1, 2, 3, 4, 5, 16])
def test_compiled_decode_loop_matches_the_python_loop(stdlib_text, lanes):
    data = stdlib_text[:30_000]
    m = Strata()
    payload, _ = encode_frame(m, data, lanes)
    assert decode_frame(m, payload, len(data), lanes) == data
    assert decode_frame(_PythonLoop(m), payload, len(data), lanes) == data
    # damaged words: both loops refuse or both give the same bytes (never one of each)
    bad = bytearray(payload)
    bad[len(bad) // 2] ^= 0x5A
    outs = []
    for model in (m, _PythonLoop(m)):
        try:
            outs.append(decode_frame(model, bytes(bad), len(data), lanes))
        except Exception as e:  # noqa: BLE001 - the type is what is compared
            outs.append(type(e))
    assert outs[0] == outs[1]


@pytest.mark.parametrize("lanes", [1, 2, 3, 5])
def test_compiled_loop_counts_sub_frame_checks_across_packed_steps(stdlib_text, lanes):
    """The compiled loop calls the range decoder directly between sub-frame checks and
    hands over to the checked decoder at each one: a frame crossing a check decodes, and a
    damaged one is refused by both loops alike."""
    from lcodec.coding import CHECK_EVERY
    data = (stdlib_text * 3)[:CHECK_EVERY + 999]
    m = Strata()
    payload, _ = encode_frame(m, data, lanes, checks=True)
    assert decode_frame(m, payload, len(data), lanes, checks=True) == data
    assert decode_frame(_PythonLoop(m), payload, len(data), lanes, checks=True) == data
    with pytest.raises(ValueError):  # the words of another frame length: a check fails
        decode_frame(m, payload[:len(payload) // 3], len(data), lanes, checks=True)
