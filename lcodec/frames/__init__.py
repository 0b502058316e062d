"""Frame kinds: how one frame's content becomes a record and back.

Every frame is independent (the model starts from a fresh state), so a frame's record
is a function of its content and the model alone, whoever codes it. The archive layer
plans frames, hands them to a runner and writes the records; it never looks inside a
kind. A work item is `bytes` (a byte frame, frames/byteframe.py) or an `ImageWork` (an
image frame, frames/imageframe.py); a new kind is a new work type here plus its record
method in format/container.py.

    code_frame(model, work)  -> (record, NLL bits, stored?, figures or None)
    decode_one(model, index, method, raw_len, lanes, raw_crc, coded_crc, payload, checks)
                             -> (content bytes, None) or (None, what is wrong)
"""
from __future__ import annotations

from ..coding import SubframeCheckFailed
from ..errors import DataError, ModelError, Terminated, pending_interruption
from ..format import container as C
from ..inputs.layout import FLAG_RECORD, read_descriptor
from .byteframe import LANE_BYTES, MAX_LANES, choose_lanes, code_bytes, decode_bytes, frame_lanes  # noqa: F401
from .imageframe import ImageWork, code_image, decode_image_frame
from .forked import WorkerDied


def is_pixel_model(m) -> bool:
    return bool(getattr(m, "is_image_model", False))


def code_frame(model, work) -> tuple[bytes, float, bool, dict | None]:
    """One frame's work -> (record, NLL bits, stored?, an image's figures or None)."""
    if isinstance(work, ImageWork):
        return code_image(model, work)
    return (*code_bytes(model, work), None)


def _raise_pending() -> None:
    """A signal taken at the edge of the decode loop's callback comes out as some other error (or
    none): raise the interruption instead of calling the frame damaged."""
    stop = pending_interruption()
    if stop is not None:
        raise stop


def decode_one(model, index: int, method: int, raw_len: int, lanes: int, raw_crc: int, coded_crc: int,
               payload, checks: bool = False, threads: int = 1) -> tuple[bytes | None, str | None]:
    """One frame record's fields -> (content bytes, None), or (None, what is wrong).
    checks: the coded words carry sub-frame checks (version 3): decoding stops at the
    first that fails, long before a made-up claimed length is reached. threads: an image
    frame's bands are decoded side by side by that many threads."""
    if C.crc32c(payload) != coded_crc:
        return None, f"frame {index} damaged (CRC-32C of its coded bytes does not match)"
    if method == C.METHOD_STORED:
        raw = bytes(payload)
    elif method == C.METHOD_IMAGE:
        if not is_pixel_model(model):
            return None, f"frame {index} damaged (an image frame in an archive of a byte model)"
        try:
            raw = decode_image_frame(model, payload, raw_len, checks=checks, threads=threads)
        except DataError as e:
            return None, str(e)
        except SubframeCheckFailed as e:
            return None, f"frame {index} damaged ({e})"
        except (ModelError, WorkerDied, KeyboardInterrupt, SystemExit, Terminated):
            raise  # a band worker that died (killed, out of memory) is not damage
        except BaseException:
            _raise_pending()
            return None, f"frame {index} damaged (its coded words cannot be decoded)"
    else:
        try:
            raw = decode_bytes(model, method, payload, raw_len, lanes, checks)
        except (KeyboardInterrupt, SystemExit, Terminated):
            raise
        except SubframeCheckFailed as e:
            return None, f"frame {index} damaged ({e})"
        except BaseException:  # constriction may refuse a damaged payload (a panic is a BaseException)
            _raise_pending()
            return None, f"frame {index} damaged (its coded words cannot be decoded)"
    if C.crc32c(raw) != raw_crc:
        return None, f"frame {index} damaged (CRC-32C of its decoded bytes does not match)"
    return raw, None


def decode_record(model, fr: C.Frame, threads: int = 1) -> bytes:
    """One frame of a read container -> its content; DataError when it is damaged."""
    raw, problem = decode_one(model, fr.index, fr.method, fr.raw_len, fr.lanes, fr.raw_crc, fr.coded_crc,
                              fr.payload, fr.checks, threads)
    if problem:
        raise DataError(problem)
    return raw


def frame_fields(fr: C.Frame) -> tuple:
    """A frame's fields as plain data (what a decoding task carries to a worker)."""
    return (fr.index, fr.method, fr.raw_len, fr.lanes, fr.raw_crc, fr.coded_crc, bytes(fr.payload), fr.checks)


def image_guarantee(fr: C.Frame) -> str | None:
    """"byte-exact" or "pixel-exact" for an image frame (from its plain descriptor), else None."""
    if fr.method != C.METHOD_IMAGE:
        return None
    lay, _ = read_descriptor(fr.payload, fr.raw_len)
    return "pixel-exact" if lay.flags & FLAG_RECORD else "byte-exact"
