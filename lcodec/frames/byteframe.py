"""The byte frame kind: a frame's bytes split into lanes and coded with a byte model.

A frame of n bytes is split into up to MAX_LANES contiguous lanes coded in lockstep (one
model call and one coder call per step serve every lane; DEVELOPERS.md, "Lanes"). The
record holds the coded words (method queue or stack, as the model's `coder` says), or
the bytes themselves when coding would not make them smaller (method stored: growth is
the record's own fields only).
"""
from __future__ import annotations

from ..coding import decode_frame, encode_frame
from ..format import container as C

MAX_LANES = 16
LANE_BYTES = 16384  # a lane per 16 KiB of frame, at most MAX_LANES (measured trade-off: DEVELOPERS.md)


def choose_lanes(n: int) -> int:
    return max(1, min(MAX_LANES, n // LANE_BYTES))


def frame_lanes(model, n: int) -> int:
    """Lanes of an n-byte frame coded with `model`: the model's own choice (`lanes_for`),
    else choose_lanes."""
    return (getattr(model, "lanes_for", lambda n: None)(n)) or choose_lanes(n)


def stored_record(raw: bytes) -> bytes:
    return C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw))


def code_bytes(model, raw: bytes) -> tuple[bytes, float, bool]:
    """One byte frame -> (its record, model NLL in bits, stored?). The same bytes wherever
    it runs: the model starts from a fresh state in every frame. The record is in the
    version-1 form, its coded words with sub-frame checks (queue): the writer seals it
    into a version-3 record (format.container.seal_record)."""
    lanes = frame_lanes(model, len(raw))
    coded, nll = encode_frame(model, raw, lanes, model.coder, checks=model.coder == "queue")
    if len(coded) >= len(raw):  # incompressible: store (growth is the record only)
        return stored_record(raw), 8.0 * len(raw), True
    method = C.METHOD_QUEUE if model.coder == "queue" else C.METHOD_STACK
    return C.frame_record(len(raw), coded, method, lanes, C.crc32c(raw)), nll, False


def decode_bytes(model, method: int, payload, raw_len: int, lanes: int, checks: bool = False) -> bytes:
    """A queue or stack record's payload -> its bytes (the coder raises on damaged words,
    SubframeCheckFailed at the first failed sub-frame check)."""
    coder = "queue" if method == C.METHOD_QUEUE else "stack"
    return decode_frame(model, bytes(payload), raw_len, lanes, coder, checks=checks and coder == "queue")
