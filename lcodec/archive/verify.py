"""Verify and describe: `verify` decodes everything and checks every checksum (and, when
asked, the originals, read in step, never whole); `info` describes an archive without
decoding anything.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field

from ..errors import DataError, UsageError
from ..format import container as C
from ..frames import image_guarantee
from ..fsio import safe_member_path
from ..inputs.images import analyse
from ..inputs.layout import FLAG_NETS_ONLY, read_descriptor
from ..models import identity_text
from .read import DEFAULT_CEILING, _archive_model, _check_workers, Sink, check_ceiling, decode_stream

@dataclass
class VerifyReport:
    ok: bool
    problems: list
    content_bytes: int
    frames: int
    members: int
    guarantees: dict = field(default_factory=dict)  # "byte-exact image"/"pixel-exact image" -> count


class _Compare(Sink):
    """Compares the decoded bytes with the originals as they come (read in step, never whole)."""

    def __init__(self, against: str | None, multi: bool, members):
        self.against, self.multi, self.f, self.problems, self.differs = against, multi, None, [], False
        self.root, self.records = against, 0
        if against is None:
            return
        if not multi:
            if not os.path.isfile(against):
                raise UsageError(f"{against}: not a file (this archive holds a single file)")
        else:
            single_top = {m.path.split("/")[0] for m in members}
            if len(single_top) == 1 and os.path.basename(os.path.normpath(against)) == next(iter(single_top)):
                self.root = os.path.dirname(os.path.normpath(against)) or "."

    def begin(self, mem):
        self.differs, self.f = False, None
        if self.against is None:
            return
        if mem is None:
            self.path = self.against
        else:
            self.path = os.path.join(self.root, safe_member_path(mem.path))
            if mem.is_dir:
                if not os.path.isdir(self.path):
                    self.problems.append(f"member {mem.path}: no such folder under {self.against}")
                return
            if not os.path.isfile(self.path):
                self.problems.append(f"member {mem.path}: no such file under {self.against}")
                self.differs = None
                return
        try:
            self.f = open(self.path, "rb")
        except OSError as e:
            raise UsageError(f"cannot read {self.path}: {e.strerror or e}") from None

    def data(self, mem, raw, n):
        if self.f is not None and not self.differs:
            if raw is None or self.f.read(n) != raw:
                self.differs = True

    def record(self, mem, index, raw):
        """A pixel record equals the record made from the original (the same samples and
        metadata), not the original's bytes."""
        self.records += 1
        if self.f is not None and not self.differs:
            info = analyse(self.f.read())
            self.differs = info is None or info.guarantee != "pixel-exact" or info.content != raw

    def end(self, mem, ok):
        if self.f is None:
            return
        if not self.differs and self.f.read(1):
            self.differs = True
        self.f.close()
        self.f = None
        if self.differs:
            what = "decoded pixels or metadata differ" if self.records else "decoded content differs"
            self.problems.append(f"{what} from {self.against}" if mem is None
                                 else f"member {mem.path}: differs from {self.path}")


def verify(blob, model=None, against: str | None = None, progress=None, jobs: int = 1,
           cluster=None, workers: int = 1, ceiling: int | None = DEFAULT_CEILING) -> VerifyReport:
    """Decode everything, check every checksum (and the original, if given); never raises
    DataError for damage: it is reported in `problems`. Frames are decoded and checked as
    they come (in `jobs` processes or on `cluster`); nothing is kept. An archive claiming
    more than `ceiling` bytes raises CeilingError before anything is decoded."""
    _check_workers(jobs, cluster, workers)
    try:
        cont = C.read_container(blob)
        check_ceiling(blob, ceiling)
        model = _archive_model(blob, model)
    except DataError as e:
        return VerifyReport(False, [str(e)], 0, 0, 0)
    cmp = _Compare(against, cont.members is not None, cont.members)
    try:
        cont, problems = decode_stream(blob, cmp, model, progress, keep_going=True, jobs=jobs, cluster=cluster,
                                       workers=workers)
    except DataError as e:
        return VerifyReport(False, [str(e)], 0, 0, 0)
    finally:
        if cmp.f is not None:
            cmp.f.close()
    problems = list(problems)
    if against is not None and not problems:
        problems += cmp.problems
    return VerifyReport(not problems, problems, cont.content_size, len(cont.frames), len(cont.members or []),
                        _image_counts(cont, problems))


def _image_counts(cont: C.Container, problems: list) -> dict:
    """"pixel-exact image" / "byte-exact image" -> how many image frames, as decoded."""
    bad = {p for p in problems if p.startswith("frame ")}
    g = {}
    for fr in cont.frames:
        if fr.method != C.METHOD_IMAGE:
            continue
        try:
            ok = not any(p.startswith(f"frame {fr.index} ") for p in bad)
            k = "pixel-exact image" if ok and image_guarantee(fr) == "pixel-exact" else "byte-exact image"
        except DataError:
            k = "byte-exact image"
        g[k] = g.get(k, 0) + 1
    return g


def _frame_info(f: C.Frame) -> dict:
    d = {"index": f.index, "raw_bytes": f.raw_len, "coded_bytes": f.coded_len,
         "method": C.METHOD_NAMES[f.method], "lanes": f.lanes, "crc32c": f"{f.raw_crc:08x}"}
    if f.method == C.METHOD_IMAGE:
        try:
            lay, _ = read_descriptor(f.payload, f.raw_len)
            d["image"] = {"rows": lay.rows, "columns": lay.cols, "channels": lay.channels,
                          "bits_per_sample": 8 * lay.bps, "guarantee": image_guarantee(f),
                          "bits_per_subpixel": 8.0 * f.coded_len / (lay.rows * lay.cols * lay.channels)}
            if lay.replicated:  # coded: one sample per block; unpack repeats it
                d["image"]["replicated"] = [lay.rep_rows, lay.rep_cols]
            if lay.bands > 1:  # coded rows in bands, one coder stream each (decoded side by side)
                d["image"]["bands"] = lay.bands
            if lay.flags & FLAG_NETS_ONLY:  # coded with the model's networks alone: its stages saved too little
                d["image"]["networks_only"] = True
        except DataError as e:
            d["image"] = {"damaged": str(e)}
    return d


def info(blob) -> dict:
    """Header, members, frames and model identity, without decoding anything."""
    cont = C.read_container(blob)
    frames = [_frame_info(f) for f in cont.frames]
    return {
        "format_version": cont.version,
        "archive_id": cont.archive_id.hex() if cont.archive_id is not None else None,  # version 3
        "archive_bytes": cont.file_size,
        "content_bytes": cont.content_size,
        "bits_per_byte": 8.0 * cont.file_size / cont.content_size if cont.content_size else 0.0,
        "content_sha256": cont.content_sha256.hex(),
        "model": cont.identity,
        "model_text": identity_text(cont.identity),
        "frame_size": cont.frame_size,
        "frames": frames,
        "members": None if cont.members is None else [
            {"path": m.path, "bytes": m.size, "mode": f"{m.mode:o}", "sha256": m.sha256.hex(), "folder": m.is_dir,
             "guarantee": g}
            for m, g in zip(cont.members, _member_guarantees(cont))],
        "guarantee": None if cont.members is not None else (
            (image_guarantee(cont.frames[0]) if cont.frames and cont.frames[0].method == C.METHOD_IMAGE else None)
            or "byte-exact"),
    }


def _member_guarantees(cont: C.Container) -> list:
    """Per member: "pixel-exact" (a pixel record, rebuilt into an image file) or "byte-exact"."""
    out, i = [], 0
    for m in cont.members:
        n = 0 if m.is_dir else -(-m.size // cont.frame_size)
        g = "byte-exact"
        if n == 1 and i < len(cont.frames) and cont.frames[i].method == C.METHOD_IMAGE:
            try:
                g = image_guarantee(cont.frames[i])
            except DataError:
                g = "damaged"
        out.append(g)
        i += n
    return out
