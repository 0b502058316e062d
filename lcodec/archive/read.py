"""Read: an archive's frames decoded in order, every checksum checked, handed to a sink.

    decode_stream(blob, sink)   frames -> sink as they come (bounded memory), on any runner
    decode(blob)                everything in memory (a `Decoded`), threads optional
    unpack / unpack_to_file / unpack_to_dir   the content back, written atomically

Every frame kind reads the same way: a frame's content is checked by its CRC-32C, a
member's by its SHA-256 at its end, the whole content's at the end. A pixel record (an
image frame whose content is the image's samples and metadata, not its file's bytes) is
rebuilt into an image file only when it reaches a sink that writes files, after its
frame's checks passed. Verification and `info` are archive/verify.py; salvage of
damaged archives is archive/salvage.py.
"""
from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass, field

from ..errors import CeilingError, DataError, UsageError, raise_pending
from ..format import container as C
from ..frames import decode_record, frame_fields, image_guarantee
from ..fsio import OutFile, _remove_quietly, safe_member_path
from ..inputs.images import rebuild
from ..models import for_identity
from ..models.tessel_common import limit_blas, one_blas_thread
from . import runners
from .plan import KEPT_MODE_BITS

@dataclass
class Decoded:
    container: C.Container
    frames: list  # bytes per frame, or None where the frame is damaged
    problems: list = field(default_factory=list)
    records: set = field(default_factory=set)  # frames whose content is a pixel record (pixel-exact)

    def output_bytes(self, first: int, n: int) -> bytes:
        """The bytes to write for frames first..first+n-1: the content, or for a pixel
        record the image file rebuilt from it."""
        data = b"".join(self.frames[first:first + n])
        if n == 1 and first in self.records:
            return rebuilt(first, data)
        return data

    def member_ranges(self):
        """(member, first frame index, frame count) for each member."""
        out, i = [], 0
        fs = self.container.frame_size
        for m in self.container.members or []:
            n = 0 if m.is_dir else -(-m.size // fs)
            out.append((m, i, n))
            i += n
        return out


def _check_member_table(cont: C.Container) -> None:
    if cont.members is None:
        return
    kinds = {}
    for mem in cont.members:
        safe_member_path(mem.path)
        if mem.path in kinds:
            raise DataError(f"member table damaged (member path {mem.path!r} appears twice)")
        kinds[mem.path] = mem.is_dir
    for path in kinds:
        parts = path.split("/")
        for i in range(1, len(parts)):
            if kinds.get("/".join(parts[:i])) is False:
                raise DataError(f"member table damaged (member {path!r} lies under "
                                f"{'/'.join(parts[:i])!r}, which is a file)")


def _decoded_frames(cont: C.Container, m, jobs: int, cluster, workers: int = 1):
    """(frame, raw or None, problem or None) for every frame in order. --jobs 1 decodes
    here, one frame at a time (with workers > 1: that many threads, a bounded window
    ahead; a lone frame's image bands side by side); otherwise a runner decodes a bounded
    window ahead. A lone frame with --jobs N is decoded here, its image bands by N workers
    (a pool would give the one frame to one worker)."""
    if jobs is not None and jobs > 1 and cluster is None and len(cont.frames) == 1:
        jobs, workers = 1, jobs
    if (jobs is None or jobs <= 1) and cluster is None and workers > 1 and len(cont.frames) > 1:
        yield from _threaded_frames(cont, m, workers)
        return
    if (jobs is None or jobs <= 1) and cluster is None:
        for fr in cont.frames:
            try:
                yield fr, decode_record(m, fr, max(1, workers)), None
            except DataError as e:
                yield fr, None, str(e)
        return
    with runners.runner(m, jobs, cluster) as r:
        results = r.imap(runners.decode_batch, runners.batches(cont.frames, frame_fields, lambda fr: fr.raw_len))
        try:
            for frames, outs in results:
                for fr, (raw, problem) in zip(frames, outs):
                    yield fr, raw, problem
        finally:
            results.close()


def _threaded_frames(cont: C.Container, m, workers: int):
    from collections import deque
    from concurrent.futures import ThreadPoolExecutor

    def one(fr):
        try:
            return decode_record(m, fr), None
        except DataError as e:
            return None, str(e)

    pool = ThreadPoolExecutor(workers)
    ahead = deque()
    frames = iter(cont.frames)
    # BLAS on one thread, set here in the calling thread too (kept for the process: tessel)
    with one_blas_thread():
        try:
            for fr in frames:
                ahead.append((fr, pool.submit(one, fr)))
                if len(ahead) >= 2 * workers:
                    f0, fut = ahead.popleft()
                    yield (f0, *fut.result())
            while ahead:
                f0, fut = ahead.popleft()
                yield (f0, *fut.result())
        finally:
            pool.shutdown(wait=True, cancel_futures=True)


DEFAULT_CEILING = 64 << 30  # the output ceiling unpack and verify apply unless told otherwise


def check_ceiling(blob, ceiling: int | None) -> None:
    """Refuse, before anything is decoded, an archive whose header claims more content than
    `ceiling` bytes (None: no ceiling). The claim bounds the work too: every frame's raw
    length is checked against it, and sub-frame checks (version 3) stop a frame whose
    coded words run out long before its claimed length."""
    if ceiling is None:
        return
    size = C.read_header(blob)[0]["content_size"]
    if size > ceiling:
        raise CeilingError(f"the archive would decode to {size:,} bytes, more than the output ceiling of "
                           f"{ceiling:,} bytes (raise it with --output-ceiling SIZE, or 'none')")


def _check_workers(jobs, cluster, workers: int) -> None:
    if workers > 1 and (cluster is not None or jobs not in (None, 0, 1)):
        raise UsageError("give --threads or --jobs/--cluster, not both")


def _archive_model(blob, model):
    """The model an archive needs (checked against the one given), loaded once. Damage in
    the container is a DataError."""
    return for_identity(C.read_container(blob).identity, model)


class Sink:
    """Where streamed decoding puts each member's bytes (single-file archives: one member None)."""

    def begin(self, mem): pass

    def data(self, mem, raw, n: int): pass  # raw is None for a damaged frame of n bytes

    def record(self, mem, index: int, raw: bytes) -> None:
        """A member's one frame holds a pixel record (checked): files get the image rebuilt."""
        out = rebuilt(index, raw)
        self.data(mem, out, len(out))

    def end(self, mem, ok: bool): pass


def decode_stream(blob, sink: Sink, model=None, progress=None, keep_going: bool = False, jobs: int = 1,
                  cluster=None, workers: int = 1, ceiling: int | None = None) -> tuple[C.Container, list]:
    """Decode every frame in order, handing each to `sink` as it comes (nothing is kept),
    and check every checksum: each frame's CRC-32C, each member's SHA-256 (at its end),
    the content's SHA-256 (at the end). Returns (container, problems); without
    keep_going the first problem raises DataError. An archive claiming more than `ceiling`
    bytes is refused first (CeilingError)."""
    _check_workers(jobs, cluster, workers)
    cont = C.read_container(blob)
    check_ceiling(blob, ceiling)
    m = for_identity(cont.identity, model)
    _check_member_table(cont)
    problems = []
    ranges = [(None, 0, len(cont.frames))] if cont.members is None else Decoded(cont, []).member_ranges()
    content = hashlib.sha256()
    frames = _decoded_frames(cont, m, jobs, cluster, workers)
    try:
        for mem, first, n in ranges:
            sink.begin(mem)
            h = hashlib.sha256() if mem is not None else None
            damaged = False
            for _ in range(n):
                fr, raw, problem = next(frames)
                if problem:
                    if not keep_going:
                        raise DataError(problem)
                    problems.append(problem)
                    damaged = True
                    sink.data(mem, None, fr.raw_len)
                else:
                    if h is not None:
                        h.update(raw)
                    content.update(raw)
                    if n == 1 and image_guarantee(fr) == "pixel-exact":
                        sink.record(mem, fr.index, raw)
                    else:
                        sink.data(mem, raw, len(raw))
                if progress:
                    progress(fr.raw_len)
            ok = not damaged
            if mem is not None:
                if damaged:
                    problems.append(f"member {mem.path}: damaged (frames {first}..{first + n - 1})")
                elif h.digest() != mem.sha256:
                    msg = f"member {mem.path}: SHA-256 of the decoded content does not match"
                    if not keep_going:
                        raise DataError(msg)
                    problems.append(msg)
                    ok = False
            sink.end(mem, ok)
    finally:
        frames.close()
    if not problems and content.digest() != cont.content_sha256:
        msg = "SHA-256 of the whole decoded content does not match the header"
        if not keep_going:
            raise DataError(msg)
        problems.append(msg)
    return cont, problems


def decode(blob, model=None, progress=None, keep_going: bool = False, workers: int = 1) -> Decoded:
    """Decode every frame and check every checksum. With keep_going, damaged frames are
    recorded in `problems` (and left as None) instead of raising at the first one. With
    workers > 1, frames (a lone frame: its image bands) are decoded by that many threads
    (the output is the same)."""
    cont = C.read_container(blob)
    m = for_identity(cont.identity, model)
    _check_member_table(cont)
    out = Decoded(cont, [])
    bands = workers if len(cont.frames) == 1 else 1

    def one(fr):
        try:
            return decode_record(m, fr, bands), None
        except DataError as e:
            return None, e

    if workers > 1 and len(cont.frames) > 1:  # frames are independent: decode them side by side
        from concurrent.futures import ThreadPoolExecutor
        limit_blas()  # in the calling thread too: a limit asked in a worker thread alone was
        # not always what the other threads saw (threadpoolctl reported the old setting)
        pool = ThreadPoolExecutor(workers)
        results = pool.map(one, cont.frames)
    else:
        pool, results = None, map(one, cont.frames)
    try:
        for fr, (raw, err) in zip(cont.frames, results):
            if err is not None:
                if not keep_going:
                    raise err
                out.frames.append(None)
                out.problems.append(str(err))
            else:
                out.frames.append(raw)
                if fr.method == C.METHOD_IMAGE and image_guarantee(fr) == "pixel-exact":
                    out.records.add(fr.index)
            if progress:
                progress(fr.raw_len)
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
    if cont.members is not None:
        for mem, first, n in out.member_ranges():
            parts = out.frames[first:first + n]
            if any(p is None for p in parts):
                out.problems.append(f"member {mem.path}: damaged (frames {first}..{first + n - 1})")
            elif C.sha256(b"".join(parts)) != mem.sha256:
                msg = f"member {mem.path}: SHA-256 of the decoded content does not match"
                if not keep_going:
                    raise DataError(msg)
                out.problems.append(msg)
    if not out.problems and C.sha256(b"".join(out.frames)) != cont.content_sha256:
        msg = "SHA-256 of the whole decoded content does not match the header"
        if not keep_going:
            raise DataError(msg)
        out.problems.append(msg)
    return out


class _Collect(Sink):
    def __init__(self):
        self.parts = []

    def data(self, mem, raw, n):
        self.parts.append(raw if raw is not None else bytes(n))


def unpack(blob, model=None, progress=None, jobs: int = 1, cluster=None, workers: int = 1,
           ceiling: int | None = DEFAULT_CEILING) -> bytes:
    """Archive bytes -> the original bytes (single-content archives)."""
    _check_workers(jobs, cluster, workers)
    check_ceiling(blob, ceiling)
    model = _archive_model(blob, model)
    if is_multi(blob):
        n = len(decode(blob, model).container.members)  # damage first (DataError), as always
        raise UsageError(f"this archive holds {n} members; unpack it into a folder")
    sink = _Collect()
    decode_stream(blob, sink, model, progress, jobs=jobs, cluster=cluster, workers=workers)
    return b"".join(sink.parts)


class _ToFile(Sink):
    def __init__(self, f):
        self.f = f

    def data(self, mem, raw, n):
        self.f.write(raw)


def unpack_to_file(blob, output, model=None, force: bool = False, progress=None, jobs: int = 1,
                   cluster=None, workers: int = 1, ceiling: int | None = DEFAULT_CEILING) -> int:
    """Decode a single-file archive into the file `output` (a path) or a binary stream,
    frame by frame: memory holds a bounded window of frames, never the whole content.
    A path gets the content under a temporary name, renamed into place only after every
    checksum passed; a stream (stdout) gets it only after that too (it is spooled to a
    temporary file first). Returns the content size. An archive claiming more than
    `ceiling` bytes is refused before anything is decoded or written."""
    import shutil
    import tempfile

    _check_workers(jobs, cluster, workers)
    check_ceiling(blob, ceiling)
    if is_multi(blob):
        n = len(C.read_container(blob).members)
        raise UsageError(f"this archive holds {n} members; unpack it into a folder")
    model = _archive_model(blob, model)
    if isinstance(output, (str, os.PathLike)):
        with OutFile(os.fspath(output), force=force) as out:
            cont, _ = decode_stream(blob, _ToFile(out.f), model, progress, jobs=jobs, cluster=cluster,
                                    workers=workers)
        return cont.content_size
    with tempfile.TemporaryFile() as spool:
        cont, _ = decode_stream(blob, _ToFile(spool), model, progress, jobs=jobs, cluster=cluster, workers=workers)
        spool.seek(0)
        shutil.copyfileobj(spool, output, 1 << 20)
    output.flush()
    return cont.content_size


def is_multi(blob) -> bool:
    return bool(C.read_header(blob)[0]["flags"] & C.FLAG_MEMBERS)


class _ToFolder(Sink):
    """Writes each member under `tmp` as its frames arrive."""

    def __init__(self, tmp: str):
        self.tmp, self.f, self.written, self.folders = tmp, None, [], []

    def begin(self, mem):
        rel = safe_member_path(mem.path)
        target = os.path.join(self.tmp, rel)
        if mem.is_dir:
            os.makedirs(target, exist_ok=True)
            self.folders.append(mem)
            return
        os.makedirs(os.path.dirname(target), exist_ok=True)
        self.target = target
        self.f = open(target, "wb")

    def data(self, mem, raw, n):
        self.f.write(raw)

    def end(self, mem, ok):
        if mem.is_dir:
            return
        self.f.flush()
        os.fsync(self.f.fileno())
        self.f.close()
        self.f = None
        os.chmod(self.target, mem.mode & KEPT_MODE_BITS)
        if mem.mtime_ns:
            os.utime(self.target, ns=(mem.mtime_ns, mem.mtime_ns))
        self.written.append(mem.path)

    def close(self):
        if self.f is not None:
            self.f.close()
            self.f = None


def unpack_to_dir(blob, out_dir: str, model=None, force: bool = False, progress=None, jobs: int = 1,
                  cluster=None, workers: int = 1, ceiling: int | None = DEFAULT_CEILING) -> list[str]:
    """Decode a multi-member archive into `out_dir` (created; must not exist unless force).
    Members are decoded frame by frame and written under a temporary folder as they come;
    only when every checksum passed is it renamed into place (or, with force into an
    existing folder, its files moved in); returns the member paths written. An archive
    claiming more than `ceiling` bytes is refused before anything is decoded or written."""
    _check_workers(jobs, cluster, workers)
    check_ceiling(blob, ceiling)
    if not is_multi(blob):
        C.read_container(blob)  # a damaged archive is a DataError, as before
        raise UsageError("this archive holds a single file; unpack it to a file name")
    model = _archive_model(blob, model)
    exists = os.path.lexists(out_dir)
    if exists and not force:
        raise UsageError(f"{out_dir} exists; pass --force to write into it")
    if exists and not os.path.isdir(out_dir):
        raise UsageError(f"{out_dir} exists and is not a folder")
    parent = os.path.dirname(os.path.abspath(out_dir))
    tmp = os.path.join(parent, f".{os.path.basename(os.path.abspath(out_dir))}.part-{os.getpid()}")
    sink = _ToFolder(tmp)
    try:
        os.makedirs(tmp)
        cont, _ = decode_stream(blob, sink, model, progress, jobs=jobs, cluster=cluster, workers=workers)
        written, folders = sink.written, sink.folders
        raise_pending()  # a signal whose exception was lost (errors.raise_pending): no final name
        if not exists:
            os.rename(tmp, out_dir)
        else:  # --force into an existing folder: move each file into place
            for mem in cont.members:  # never write through a link inside out_dir
                _refuse_links(out_dir, mem.path)
            for mem in folders:
                os.makedirs(os.path.join(out_dir, safe_member_path(mem.path)), exist_ok=True)
            for rel_path in written:
                rel = safe_member_path(rel_path)
                dst = os.path.join(out_dir, rel)
                os.makedirs(os.path.dirname(dst), exist_ok=True)
                os.replace(os.path.join(tmp, rel), dst)
            _remove_quietly(tmp)
        apply_folder_modes(out_dir, folders)
    except OSError as e:
        sink.close()
        _remove_quietly(tmp)
        raise UsageError(f"cannot write into {out_dir}: {e.strerror or e}") from None
    except BaseException:  # damage, a refused link, an interrupt: no temporary folder left behind
        sink.close()
        _remove_quietly(tmp)
        raise
    return written


def apply_folder_modes(out_dir: str, folders) -> None:
    """Folder modes and times last, deepest first: writing into a folder changes its time,
    and a read-only folder mode would block writing its files."""
    for mem in sorted(folders, key=lambda m: m.path.count("/"), reverse=True):
        p = os.path.join(out_dir, safe_member_path(mem.path))
        os.chmod(p, mem.mode & KEPT_MODE_BITS)
        if mem.mtime_ns:
            os.utime(p, ns=(mem.mtime_ns, mem.mtime_ns))


def _refuse_links(out_dir: str, member_path: str) -> None:
    parts = member_path.split("/")
    for i in range(1, len(parts) + 1):
        p = os.path.join(out_dir, *parts[:i])
        if os.path.islink(p):
            raise UsageError(f"{p} is a symbolic link; lcodec does not write through links "
                             f"(remove it, or unpack into a new folder)")


def rebuilt(index: int, record: bytes) -> bytes:
    """The image file a (checked) pixel record stands for."""
    try:
        return rebuild(record)
    except (ValueError, KeyError, TypeError):
        raise DataError(f"frame {index}: its pixel record cannot be rebuilt into an image file") from None
