"""Entropy coding of one frame: lanes, integer tables, constriction.

A frame of n symbols is split into `lanes` contiguous segments (lane b gets n // lanes
symbols, plus one for the first n % lanes lanes), coded in lockstep: step t codes
symbol t of every lane still active. Lanes are what lets one coder call serve many
symbols, in the decoder too, where the tables of step t depend on the symbols of
steps < t.

The model hands over tables as float64 arrays holding positive integers (exact below
2**53); constriction rescales and quantises them itself with plain IEEE float64
arithmetic, identically in encoder and decoder (constriction is pinned in
pyproject.toml; the golden containers in tests/golden prove it in every CI run).

Two coders:
  queue  constriction's range coder: encodes in decode order, so the encoder streams
         tables chunk by chunk and keeps none; the choice for adaptive models.
  stack  constriction's ANS coder: decodes in reverse of encoding, so the encoder must
         hold every table of the frame first; the choice for models whose tables come
         from one parallel pass.
Both produce a sequence of 32-bit words, stored little-endian.

Sub-frame checks (container version 3, queue coder only): after every CHECK_EVERY
symbols of a frame, in coding order, the encoder codes two check symbols under a uniform
table over 256 values, (0xA7 ^ (j & 0xFF), 0x3D ^ ((j >> 8) & 0xFF)) for the j-th check
(j = 0, 1, ...). The decoder decodes them at the same places and stops at the first that
differs (`SubframeCheckFailed`): coded words that are damaged, spliced, made up, or
exhausted long before the frame's claimed length (the range decoder then reads zeros)
stop the decoder within CHECK_EVERY symbols, not at the claimed length. Each check costs
16 bits, 2 bytes per 64 Ki symbols; a made-up stream passes one with probability 2**-16.
"""
from __future__ import annotations

import ctypes
import itertools

import numpy as np
import constriction

from .. import errors
from ..errors import PENDING_SIGNALS
from ..fsio import signals_held

CODERS = {"queue": 1, "stack": 2}
_FAMILY = constriction.stream.model.Categorical(perfect=False)


def _first_numpy_call() -> None:
    """constriction's first call with a numpy array loads numpy's array interface into its
    Rust side; a KeyboardInterrupt raised by our signal handler inside that load made it
    panic (a 4-line message on stderr before ours, seen once when a SIGINT landed at
    start-up: docs/notes/2026-12-05-hardening.md). So that first call is made here, once
    per process, with SIGINT and SIGTERM held back (delivered when the call returns): a
    one-symbol round trip, which also checks the coder's answer."""
    with signals_held():
        tab = np.ones((1, 256), np.float64)
        enc = constriction.stream.queue.RangeEncoder()
        enc.encode(np.array([7], np.int32), _FAMILY, tab)
        got = constriction.stream.queue.RangeDecoder(enc.get_compressed()).decode(_FAMILY, tab)
    if int(got[0]) != 7:
        raise RuntimeError("constriction's range coder failed a one-symbol round trip")


_first_numpy_call()

CHECK_EVERY = 1 << 16  # symbols between sub-frame checks
_UNIFORM2 = np.ones((2, 256), np.float64)


class SubframeCheckFailed(ValueError):
    """A sub-frame check decoded to the wrong values: the coded words are not what the
    encoder wrote for this frame (or they ran out)."""

    def __init__(self, j: int, symbols: int):
        super().__init__(f"sub-frame check {j} failed after {symbols:,} symbols; decoding stopped")
        self.j, self.symbols = j, symbols

    def __reduce__(self):  # so that it travels back from a forked band worker as itself
        return type(self), (self.j, self.symbols)


def check_values(j: int) -> np.ndarray:
    return np.array([0xA7 ^ (j & 0xFF), 0x3D ^ ((j >> 8) & 0xFF)], np.int32)


class CheckedEncoder:
    """A range encoder that codes a sub-frame check after every `every` symbols."""

    def __init__(self, enc, every: int = CHECK_EVERY):
        self.enc, self.every, self.left, self.j = enc, every, every, 0

    def encode(self, syms, family, tab) -> None:
        k, pos = len(syms), 0
        while k - pos >= self.left:
            end = pos + self.left
            self.enc.encode(np.ascontiguousarray(syms[pos:end]), family, np.ascontiguousarray(tab[pos:end]))
            self.enc.encode(check_values(self.j), _FAMILY, _UNIFORM2)
            self.j, self.left, pos = self.j + 1, self.every, end
        if pos < k:
            self.enc.encode(np.ascontiguousarray(syms[pos:]), family, np.ascontiguousarray(tab[pos:]))
            self.left -= k - pos

    def get_compressed(self):
        return self.enc.get_compressed()


class CheckedDecoder:
    """The decoder side of CheckedEncoder: raises SubframeCheckFailed at the first check
    that does not decode to its values."""

    def __init__(self, dec, every: int = CHECK_EVERY):
        self.dec, self.every, self.left, self.j = dec, every, every, 0

    def decode(self, family, tab):
        k = len(tab)
        if k < self.left:
            self.left -= k
            return self.dec.decode(family, tab)
        parts, pos = [], 0
        while k - pos >= self.left:
            end = pos + self.left
            parts.append(np.asarray(self.dec.decode(family, np.ascontiguousarray(tab[pos:end]))))
            got = np.asarray(self.dec.decode(_FAMILY, _UNIFORM2), np.int32)
            if not np.array_equal(got, check_values(self.j)):
                raise SubframeCheckFailed(self.j, (self.j + 1) * self.every)
            self.j, self.left, pos = self.j + 1, self.every, end
        if pos < k:
            parts.append(np.asarray(self.dec.decode(family, np.ascontiguousarray(tab[pos:]))))
            self.left -= k - pos
        return np.concatenate(parts) if parts else np.empty(0, np.int32)


def lane_layout(n: int, lanes: int) -> tuple[np.ndarray, np.ndarray]:
    """Start offsets and lengths of each lane (lengths are non-increasing)."""
    lanes = max(1, min(lanes, n)) if n else 1
    base, extra = divmod(n, lanes)
    lengths = np.full(lanes, base, np.int64)
    lengths[:extra] += 1
    starts = np.zeros(lanes, np.int64)
    starts[1:] = np.cumsum(lengths)[:-1]
    return starts, lengths


def _nll_bits(syms: np.ndarray, tab: np.ndarray) -> float:
    """Model NLL of the coded symbols under the integer tables (reporting only)."""
    if len(syms) == 0:
        return 0.0
    chosen = tab[np.arange(len(syms)), syms]
    return float(-np.log2(chosen / tab.sum(axis=1)).sum())


def encode_frame(model, data: bytes, lanes: int, coder: str = "queue", checks: bool = False) -> tuple[bytes, float]:
    """Code `data` with `model`; returns (payload, model NLL in bits). checks: code
    sub-frame checks (queue only; container version 3)."""
    arr = np.frombuffer(data, np.uint8)
    starts, lengths = lane_layout(len(arr), lanes)
    nll = 0.0
    if coder == "queue":
        enc = constriction.stream.queue.RangeEncoder()
        if checks:
            enc = CheckedEncoder(enc)
        for syms, tab in model.teacher_chunks(arr, starts, lengths):
            if len(syms):
                tab = np.ascontiguousarray(tab, np.float64)
                enc.encode(np.ascontiguousarray(syms, np.int32), _FAMILY, tab)
                nll += _nll_bits(syms, tab)
        words = enc.get_compressed()
    elif coder == "stack":
        if checks:
            raise ValueError("sub-frame checks need the queue coder")
        all_syms, all_tabs = [], []
        for syms, tab in model.teacher_chunks(arr, starts, lengths):
            all_syms.append(np.ascontiguousarray(syms, np.int32).copy())
            all_tabs.append(np.ascontiguousarray(tab, np.float64).copy())
            nll += _nll_bits(syms, tab)
        enc = constriction.stream.stack.AnsCoder()
        for syms, tab in zip(reversed(all_syms), reversed(all_tabs)):
            if len(syms):
                enc.encode_reverse(syms, _FAMILY, tab)
        words = enc.get_compressed()
    else:
        raise ValueError(f"unknown coder {coder!r}")
    return np.asarray(words, "<u4").tobytes(), nll


# Decoders in use by a model's compiled decode loop, by key (_Live). The loop runs the
# model's step and asks step_symbols for the step's symbols without leaving compiled code
# between steps (one call per step, where a Python loop paid the dispatch of every model
# array, 5-15 us, per step). The call goes through ASK, a C function pointer (a ctypes
# callback) that the loop receives as an argument: 0.2 us a call, where numba's object
# mode took 1.0 us, and nothing for numba to compile when a process starts (object mode
# was compiled afresh in every process, 0.1 s, and pulled in all of numba's lowering
# registries, another 0.25 s and 15 MB). Only integers cross: the tables are an array both
# sides already hold (bind_tables); a step of at most PACKED symbols returns them packed
# in its integer (8 bits each, lane 0 lowest), where storing them into the symbols by step
# cost another 0.35 us, most of a one-lane step's Python side.
_LIVE: dict = {}
_KEYS = itertools.count(1)
PACKED = 4  # steps of at most this many symbols return them in step_symbols' integer


class _Live:
    """One decode loop's side of step_symbols: the range decoder (and its sub-frame
    checks, counted here so that a step between two checks calls the decoder directly),
    the first exception, the table buffer and its view for the last step's width, the
    symbols by step."""

    __slots__ = ("dec", "checked", "err", "tab", "m", "view", "by_step")

    def __init__(self, dec, by_step):
        self.checked = dec if isinstance(dec, CheckedDecoder) else None
        self.dec = dec.dec if self.checked is not None else dec
        self.err, self.tab, self.m, self.view, self.by_step = None, None, -1, None, by_step


def bind_tables(key: int, tab: np.ndarray) -> None:
    """The array a model's decode loop writes each step's tables into (rows 0..m-1)."""
    live = _LIVE[key]
    live.tab, live.m, live.view = tab, -1, None


def step_symbols(key: int, m: int, t: int) -> int:
    """Decode step t's m symbols under the bound tables. m <= PACKED: returns them packed
    (8 bits each, lane 0 in the lowest bits); else writes them to row t of the symbols by
    step and returns m. -1 when the coded data cannot be decoded (the exception is kept for
    decode_frame to raise)."""
    live = _LIVE[key]
    if PENDING_SIGNALS:  # a signal whose exception was lost at the callback's edge (_ask)
        live.err = errors.pending_interruption()
        return -1
    if live.m != m:
        live.m, live.view = m, live.tab[:m]
    try:
        ch = live.checked
        if ch is None or m < ch.left:
            if ch is not None:
                ch.left -= m
            got = live.dec.decode(_FAMILY, live.view)
        else:
            got = ch.decode(_FAMILY, live.view)
    except Exception as e:  # noqa: BLE001 - raised again by decode_frame, outside compiled code
        live.err = e
        return -1
    if m == 1:
        return got.item()
    if m == 2:
        a, b = got.tolist()
        return a | b << 8
    if m <= PACKED:
        v = 0
        for i, x in enumerate(got.tolist()):
            v |= x << (8 * i)
        return v
    live.by_step[t, :m] = got
    return m


STEP_CALL = ctypes.CFUNCTYPE(ctypes.c_int64, ctypes.c_int64, ctypes.c_int64, ctypes.c_int64)


def _ask(key: int, m: int, t: int) -> int:
    """ASK's Python side: step_symbols(key, m, t) + 1, so that 0 is the one answer that
    stops the loop. ctypes answers 0 by itself when an exception escapes a callback (it
    reports it to sys.unraisablehook and goes on): that happens only to a signal's
    exception raised at this function's edge, which PENDING_SIGNALS keeps for
    decode_frame to raise."""
    try:
        return step_symbols(key, m, t) + 1
    except BaseException as e:  # noqa: BLE001 - a signal's exception inside the call: kept, raised by decode_frame
        live = _LIVE.get(key)
        if live is not None and live.err is None:
            live.err = e
        return 0


ASK = STEP_CALL(_ask)  # kept alive here for the life of the process: compiled loops hold its address


def decode_frame(model, payload: bytes, n: int, lanes: int, coder: str = "queue", checks: bool = False) -> bytes:
    """Inverse of encode_frame. Raises ValueError when the payload cannot be decoded
    (SubframeCheckFailed when a sub-frame check fails: decoding stops there)."""
    if len(payload) % 4:
        raise ValueError("coded payload is not a whole number of 32-bit words")
    words = np.frombuffer(payload, "<u4").astype(np.uint32)
    starts, lengths = lane_layout(n, lanes)
    if coder == "queue":
        dec = constriction.stream.queue.RangeDecoder(words)
        if checks:
            dec = CheckedDecoder(dec)
    elif coder == "stack":
        dec = constriction.stream.stack.AnsCoder(words)
    else:
        raise ValueError(f"unknown coder {coder!r}")
    n_steps = int(lengths[0]) if n else 0
    widths = step_widths(lengths)
    step = model.stepper(lengths)
    # symbols by step and lane; lanes are laid out contiguously at the end (a step is a few
    # microseconds of model work, so the loop does as little else as it can)
    by_step = np.zeros((n_steps, len(lengths)), np.uint8)
    run = getattr(step, "run", None)  # the model's compiled loop over every step, if it has one
    try:
        if run is not None:
            key = next(_KEYS)
            _LIVE[key] = _Live(dec, by_step)
            try:
                done = run(key, widths, by_step)
            finally:
                err = _LIVE.pop(key).err
            if err is None:  # the step whose callback lost a signal's exception stops here
                err = errors.pending_interruption()
            if err is not None:
                raise err
            if done != n_steps:
                raise ValueError("coded payload cannot be decoded")
        else:
            prev = np.zeros(len(lengths), np.int32)
            m_prev = 0
            lo, nl, n_hi = widths.tolist()
            for t in range(n_steps):
                m = nl if t < lo else n_hi
                tab = np.ascontiguousarray(step(prev, m_prev, m), np.float64)
                prev = np.asarray(dec.decode(_FAMILY, tab), np.int32)
                by_step[t, :m] = prev
                m_prev = m
    finally:
        if hasattr(step, "close"):
            step.close()
    out = np.empty(n, np.uint8)
    for b, (a, ln) in enumerate(zip(starts.tolist(), lengths.tolist())):
        out[a:a + ln] = by_step[:ln, b]
    return out.tobytes()


def step_widths(lengths: np.ndarray) -> np.ndarray:
    """The lanes active at each step of a frame laid out by lane_layout, as three numbers
    (int64) [lo, nl, n_hi]: steps t < lo have all nl lanes, steps lo <= t < max(lengths)
    the n_hi lanes longer than lo. The decoder's loops take these instead of active_lanes'
    array, which for a frame claiming 64 MiB in one lane is 512 MB to fill (1.8 s of the
    kernel's page zeroing here, before a sub-frame check could refuse anything)."""
    lengths = np.asarray(lengths)
    if len(lengths) == 0:
        return np.zeros(3, np.int64)
    lo, hi = int(lengths.min()), int(lengths.max())
    if hi - lo > 1:
        raise ValueError("lane lengths differ by more than one: not a lane_layout")
    return np.array([lo, len(lengths), int((lengths > lo).sum())], np.int64)


def active_lanes(lengths: np.ndarray, n_steps: int) -> np.ndarray:
    """Number of lanes still active (length > t) at each step t (int64), as an array (the
    bench's explanations and the tests; the decoder takes step_widths). For a lane_layout
    frame this is step_widths spelled out: one fill and at most one slice."""
    lengths = np.asarray(lengths)
    if len(lengths) == 0 or n_steps == 0:
        return np.zeros(n_steps, np.int64)
    if int(lengths.max()) - int(lengths.min()) > 1:  # not a lane_layout: the general rule
        asc = np.sort(lengths)
        return (len(lengths) - np.searchsorted(asc, np.arange(n_steps), side="right")).astype(np.int64)
    lo, nl, n_hi = step_widths(lengths).tolist()
    out = np.full(n_steps, nl, np.int64)
    out[lo:] = n_hi
    return out
