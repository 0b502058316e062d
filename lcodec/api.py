"""Python API; the CLI is a thin layer over these functions.

    blob = lcodec.pack(data)                 # bytes -> archive bytes (built-in adaptive model)
    data = lcodec.unpack(blob)               # and back, every checksum verified
    blob, stats = lcodec.pack_stats(data)    # plus model NLL, sizes, frame counts
    blob = lcodec.pack_paths(["logs/"])      # files and folders -> one multi-member archive
    lcodec.unpack_to_dir(blob, "restored/")  # members -> files under a folder
    report = lcodec.verify(blob, against="logs/")
    lcodec.info(blob)                        # header, members, frames, model identity (a dict)

    lcodec.api.pack_to(["logs/"], "logs.lcodec", jobs=4, resume=True)   # streaming, to a file
    lcodec.api.pack_each(["logs/"], "packed/")                          # one archive per file
    lcodec.api.unpack_to_file(blob, "restored.log")                     # streaming, from a file

`model` is None (the built-in adaptive model), a model file's path, or a model object.
Every function takes the same frames through the same pipeline (lcodec/archive/), for
byte models and pixel models alike; `jobs` (worker processes) and `cluster` (a dask
scheduler's address or a distributed.Client) choose where frames are coded, never what
the archive holds. Errors: lcodec.errors.DataError (damaged/mismatching data),
ModelError (wrong or missing model), UsageError (a bad request), CeilingError (the
archive claims more content than `ceiling` bytes: unpack and verify refuse it before
decoding anything; default DEFAULT_CEILING, None for no ceiling).

This module only gathers names; the code lives in the layers below it (DEVELOPERS.md).
"""
from __future__ import annotations

from .archive.perfile import EACH_JOURNAL, EACH_KIND, EACH_MANIFEST, EACH_MANIFEST_KIND, pack_each
from .archive.plan import DEFAULT_FRAME_SIZE, KEPT_MODE_BITS, PackStats
from .archive.read import (DEFAULT_CEILING, Decoded, Sink, apply_folder_modes, check_ceiling, decode, decode_stream,
                           is_multi, unpack, unpack_to_dir, unpack_to_file)
from .archive.verify import VerifyReport, info, verify
from .archive.write import JOURNAL_EVERY_S, JOURNAL_KIND, pack, pack_paths, pack_stats, pack_to
from .frames import LANE_BYTES, MAX_LANES, choose_lanes, decode_one, frame_lanes, image_guarantee, is_pixel_model
from .frames import code_frame as _code_frame



def code_frame(model, raw: bytes) -> tuple[bytes, float, bool]:
    """One byte frame -> (its record, model NLL in bits, stored?), wherever it runs."""
    return _code_frame(model, raw)[:3]


_Sink = Sink  # the name decode_stream's sinks subclassed before the layout by layers

__all__ = [
    "DEFAULT_CEILING", "DEFAULT_FRAME_SIZE", "check_ceiling", "EACH_JOURNAL", "EACH_KIND", "EACH_MANIFEST", "EACH_MANIFEST_KIND", "JOURNAL_EVERY_S",
    "JOURNAL_KIND", "KEPT_MODE_BITS", "LANE_BYTES", "MAX_LANES", "Decoded", "PackStats", "Sink", "VerifyReport",
    "apply_folder_modes", "choose_lanes", "code_frame", "decode", "decode_one", "decode_stream", "frame_lanes",
    "image_guarantee", "info", "is_multi", "is_pixel_model", "pack", "pack_each", "pack_paths", "pack_stats",
    "pack_to", "unpack", "unpack_to_dir", "unpack_to_file", "verify",
]
