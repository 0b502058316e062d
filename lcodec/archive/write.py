"""Code and write: a plan's frames go to a runner, their records are written in order.

    pack(data) / pack_stats(data)      bytes -> archive bytes (in memory)
    pack_paths(paths)                  files and folders -> archive bytes (in memory)
    pack_to(paths, output, resume=...) files and folders -> an archive file, streaming

Any runner codes any frame (archive/runners.py: this process, --jobs, --cluster) and the
archive is the same bytes whoever coded it. Writing is one pass: a header of its final
length, each record as it comes back (in frame order), then the header again with its
SHA-256 fields. A resumable job (`resume`) keeps its partial archive and a journal
beside the output. One archive per file is archive/perfile.py.
"""
from __future__ import annotations

import hashlib
import io
import json
import os
import time

from ..errors import DataError, UsageError
from ..format import container as C
from ..frames import ImageWork
from ..fsio import OutFile, _remove_quietly, atomic_write
from ..models import resolve
from . import runners
from .plan import DEFAULT_FRAME_SIZE, PackStats, _check_frame_size, _frame_items, _member_plan, _Plan, _plan_inputs, _Source, make_plan

def _run_plans(plans, runner, stats: PackStats, on_open, on_record, on_close, progress=None, on_batch=None):
    """Code every plan's frames with `runner`, in order: on_open(plan) before its first
    record, on_record(plan, record) for each frame, on_close(plan) after its last (the
    plan's SHA-256 fields are final by then)."""
    items = _frame_items(plans)

    def work_of(it):
        return it[2] if isinstance(it[2], (bytes, ImageWork)) else None

    def size_of(it):
        return len(it[2]) if isinstance(it[2], (bytes, ImageWork)) else 0

    work = runners.batches(items, work_of=work_of, size_of=size_of)
    for metas, results in runner.imap(runners.encode_batch, work):
        for (kind, plan, raw), res in zip(metas, results):
            if kind == "open":
                plan.next_index = plan.skip_frames
                on_open(plan)
            elif kind == "close":
                on_close(plan)
            elif res is None:
                stats.kept_frames += 1
                stats.kept_bytes += raw
            else:
                record, nll, stored, figures = res
                # version 3: the record names its frame and its archive (coded anywhere, sealed here)
                record = C.seal_record(record, plan.next_index, plan.archive_id)
                plan.next_index += 1
                on_record(plan, record)
                if figures is not None:
                    stats.images.append(figures)
                stats.frames += 1
                stats.stored_frames += stored
                stats.nll_bits += nll
                stats.coded_bytes += len(record)
                if progress:
                    progress(len(raw))
        if on_batch:
            on_batch()


def _write_plan_to(f, plan: _Plan, runner, stats: PackStats, progress=None) -> None:
    """Stream one archive into the seekable binary file `f`: a header of the final length,
    the records as they are coded, then the header again with its SHA-256 fields."""
    base = f.tell()

    def on_open(p):
        f.write(p.header())

    def on_close(p):
        head = p.header()
        end = f.tell()
        f.seek(base)
        f.write(head)
        f.seek(end)

    _run_plans([plan], runner, stats, on_open, lambda p, rec: f.write(rec), on_close, progress)


def _pack(pieces: list[bytes], members, model, frame_size: int, progress, jobs: int = 1,
          cluster=None, pixels: bool = True) -> tuple[bytes, PackStats]:
    """In-memory packing (the bytes API)."""
    _check_frame_size(frame_size)
    t0 = time.perf_counter()
    m = resolve(model)
    file_members = [mm for mm in members if not mm.is_dir] if members is not None else [None]
    sources = [_Source(len(p), data=p, member=mm) for p, mm in zip(pieces, file_members)]
    return _pack_plan(make_plan(sources, members, frame_size, m, pixels), m, jobs, cluster, progress, t0)


def _pack_plan(plan: _Plan, m, jobs: int, cluster, progress, t0: float) -> tuple[bytes, PackStats]:
    """Code one plan into archive bytes in memory (the bytes API)."""
    stats = PackStats(raw_bytes=plan.content_size)
    buf = io.BytesIO()
    with runners.runner(m, plan.lone_image_jobs(jobs, cluster), cluster) as r:
        _write_plan_to(buf, plan, r, stats, progress)
    blob = buf.getvalue()
    stats.coded_bytes = len(blob)
    stats.encode_s = time.perf_counter() - t0
    return blob, stats


def pack_stats(data: bytes, model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None,
               jobs: int = 1, cluster=None, pixels: bool = True) -> tuple[bytes, PackStats]:
    """Pack one byte string; returns (archive bytes, PackStats). With a pixel model, an
    image is coded as pixels unless pixels=False (then as bytes, byte-exact)."""
    return _pack([bytes(data)], None, model, frame_size, progress, jobs, cluster, pixels)


def pack(data: bytes, model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None, jobs: int = 1,
         cluster=None, pixels: bool = True) -> bytes:
    """Pack one byte string into an archive (bytes)."""
    return pack_stats(data, model, frame_size, progress, jobs, cluster, pixels)[0]


def pack_paths(paths: list[str], model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None,
               on_skip=None, jobs: int = 1, cluster=None, pixels: bool = True) -> tuple[bytes, PackStats]:
    """Pack files and folders into one multi-member archive; returns (blob, stats)."""
    _check_frame_size(frame_size)
    t0 = time.perf_counter()
    m = resolve(model)
    return _pack_plan(_member_plan(list(paths), frame_size, m, on_skip, pixels=pixels), m, jobs, cluster, progress, t0)


def pack_to(paths: list[str], output, model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None,
            on_skip=None, jobs: int = 1, cluster=None, force: bool = False, resume: bool = False,
            pixels: bool = True) -> PackStats:
    """Pack files and folders straight into the archive file `output` (a path), streaming:
    frames are read, coded (in `jobs` processes or on `cluster`) and written as they go;
    memory holds a bounded window of frames, never the whole input or output. One regular
    file makes a single-file archive, anything else a member archive (as `lcodec pack`).
    The archive appears under its name only when complete. With `resume`, the partial
    archive and a journal are kept under fixed names beside the output so that a run that
    was killed can be continued by the same call, recoding only unfinished frames.
    With a pixel model, image files become image frames (archive/plan.py) on the same path."""
    _check_frame_size(frame_size)
    t_load = time.perf_counter()  # encode_s counts the model's loading, as before
    model = m = resolve(model)

    if not isinstance(output, (str, os.PathLike)):  # a stream (stdout): spool, then copy
        import shutil
        import tempfile

        if resume:
            raise UsageError("--resume needs an output file name")
        with tempfile.TemporaryDirectory() as d:
            tmp = os.path.join(d, "archive")
            stats = pack_to(paths, tmp, model, frame_size, progress, on_skip, jobs, cluster, pixels=pixels)
            with open(tmp, "rb") as f:
                shutil.copyfileobj(f, output, 1 << 20)
            output.flush()
        return stats
    output = os.fspath(output)
    t0 = t_load
    folder, base = os.path.dirname(os.path.abspath(output)), os.path.basename(output)
    own = {os.path.join(folder, n) for n in (f".{base}.lcodec-partial", f".{base}.lcodec-journal")}
    plan = _plan_inputs(list(paths), frame_size, m, on_skip, exclude=own, pixels=pixels)
    stats = PackStats(raw_bytes=plan.content_size)
    journal = _Journal(output, plan) if resume else None
    out = OutFile(output, force=force, tmp_name=journal.partial_name if journal else None,
                  resume=bool(journal and journal.usable))
    try:
        f = out.f
        start = journal.prepare(out, plan) if journal else 0
        with runners.runner(m, plan.lone_image_jobs(jobs, cluster), cluster) as r:
            if journal is None:
                _write_plan_to(f, plan, r, stats, progress)
            else:
                _write_resumable(f, plan, r, stats, journal, start, progress)
        out.commit()
        if journal:
            journal.remove()
    except BaseException:
        if journal:
            out.keep = True  # a resumable job keeps its partial archive and journal
        out.abort()
        raise
    stats.coded_bytes = os.path.getsize(output)
    stats.encode_s = time.perf_counter() - t0
    return stats


class _Journal:
    """A resumable one-archive job: the partial archive `.NAME.lcodec-partial` and the
    journal `.NAME.lcodec-journal` (JSON) beside the output. The journal names the inputs
    (paths, modes, sizes, times), the model and frame size, and how many frames (ending at
    which offset) are safely on disk. A resumed run checks all of that, and that each kept
    frame's record CRC-32C of its raw bytes matches the input read again, truncates the
    partial file there and codes only what follows."""

    def __init__(self, output: str, plan: _Plan):
        folder = os.path.dirname(os.path.abspath(output))
        base = os.path.basename(output)
        self.partial_name = f".{base}.lcodec-partial"
        self.path = os.path.join(folder, f".{base}.lcodec-journal")
        self.partial = os.path.join(folder, self.partial_name)
        listing = [[s.path, s.size] for s in plan.sources] if plan.members is None else \
            [[mm.path, mm.mode, mm.size, mm.mtime_ns] for mm in plan.members]
        self.inputs = hashlib.sha256(json.dumps([plan.identity, plan.frame_size, listing]).encode()).hexdigest()
        self.state = None
        try:
            with open(self.path, "rb") as f:
                st = json.loads(f.read())
            if (isinstance(st, dict) and st.get("journal") == JOURNAL_KIND and st.get("inputs") == self.inputs
                    and type(st.get("frames_done")) is int and type(st.get("offset")) is int
                    and os.path.isfile(self.partial) and os.path.getsize(self.partial) >= st["offset"]):
                self.state = st
        except (OSError, ValueError):
            pass
        self.usable = self.state is not None

    def prepare(self, out, plan: _Plan) -> int:
        """Position the partial file; returns the offset coding continues at."""
        f = out.f
        plan.seal()
        head_len = len(plan.header())
        if not self.usable or self.state["frames_done"] == 0 or self.state["offset"] < head_len:
            f.seek(0)
            f.truncate()
            return 0
        done, offset = self.state["frames_done"], self.state["offset"]
        f.seek(0)
        import mmap

        mm = mmap.mmap(f.fileno(), offset, access=mmap.ACCESS_READ)
        pos = [head_len]

        def check(index, raw):
            try:
                fr = C.read_record(memoryview(mm), pos[0], index, None, C.VERSION_BOUND)
            except DataError:
                raise UsageError(f"{self.partial} is damaged at frame {index}; remove it and "
                                 f"{self.path} to start again") from None
            if fr.raw_len != len(raw) or fr.raw_crc != C.crc32c(raw):
                raise UsageError(f"an input changed since the interrupted run (frame {index} differs); "
                                 f"remove {self.partial} and {self.path} to start again")
            if fr.archive_id != plan.archive_id:  # its records name the archive of the old content
                raise UsageError(f"an input changed since the interrupted run (the content's SHA-256 differs); "
                                 f"remove {self.partial} and {self.path} to start again")
            pos[0] = fr.payload_offset + fr.coded_len

        plan.skip_frames = done
        plan.skip_check = check
        self._mm = mm
        f.seek(offset)
        f.truncate()
        return offset

    def save(self, frames_done: int, offset: int) -> None:
        data = json.dumps({"journal": JOURNAL_KIND, "inputs": self.inputs, "frames_done": frames_done,
                           "offset": offset}).encode()
        atomic_write(self.path, data, force=True)

    def remove(self) -> None:
        _remove_quietly(self.path)


JOURNAL_KIND = "lcodec pack journal 1"


JOURNAL_EVERY_S = 0.5  # how often a resumable job syncs its partial archive and journal


def _write_resumable(f, plan: _Plan, runner, stats: PackStats, journal: _Journal, start: int, progress=None):
    done = [plan.skip_frames]
    last = [time.monotonic()]

    def on_open(p):
        if start == 0:
            f.write(p.header())

    def on_record(p, rec):
        f.write(rec)
        done[0] += 1

    def on_batch():
        if time.monotonic() - last[0] >= JOURNAL_EVERY_S and done[0] < p_frames:
            f.flush()
            os.fsync(f.fileno())
            journal.save(done[0], f.tell())
            last[0] = time.monotonic()

    def on_close(p):
        head = p.header()
        end = f.tell()
        f.seek(0)
        f.write(head)
        f.seek(end)

    p_frames = plan.n_frames
    _run_plans([plan], runner, stats, on_open, on_record, on_close, progress, on_batch)
    if getattr(journal, "_mm", None) is not None:
        journal._mm.close()
