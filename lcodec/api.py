"""Python API; the CLI is a thin layer over these functions.

    blob = lcodec.pack(data)                 # bytes -> archive bytes (built-in adaptive model)
    data = lcodec.unpack(blob)               # and back, every checksum verified
    blob, stats = lcodec.pack_stats(data)    # plus model NLL, sizes, frame counts
    blob = lcodec.pack_paths(["logs/"])      # files and folders -> one multi-member archive
    lcodec.unpack_to_dir(blob, "restored/")  # members -> files under a folder
    report = lcodec.verify(blob, against="logs/")
    lcodec.info(blob)                        # header, members, frames, model identity (a dict)

`model` is None (the built-in adaptive model), a model file's path, or a model object.
Errors: lcodec.errors.DataError (damaged/mismatching data), ModelError (wrong or missing
model), UsageError (a bad request).
"""
from __future__ import annotations

import hashlib
import json
import os
import time
from dataclasses import dataclass, field

from . import container as C
from .coder import encode_frame, decode_frame
from .errors import DataError, UsageError
from .fsio import ARCHIVE_EXT, OutFile, atomic_write, collect_inputs, safe_member_path, _remove_quietly, read_input
from .models import for_identity, identity_text, resolve

DEFAULT_FRAME_SIZE = 1 << 20
MAX_LANES = 16
KEPT_MODE_BITS = 0o777  # permission bits restored; set-id and sticky bits are not
LANE_BYTES = 16384  # a lane per 16 KiB of frame, at most MAX_LANES (measured trade-off: DEVELOPERS.md)


def choose_lanes(n: int) -> int:
    return max(1, min(MAX_LANES, n // LANE_BYTES))


def frame_lanes(model, n: int) -> int:
    """Lanes of an n-byte frame coded with `model`: the model's own choice (`lanes_for`),
    else choose_lanes."""
    return (getattr(model, "lanes_for", lambda n: None)(n)) or choose_lanes(n)


@dataclass
class PackStats:
    raw_bytes: int = 0
    coded_bytes: int = 0
    nll_bits: float = 0.0  # model NLL of the modelled frames, plus 8 bits per stored byte
    frames: int = 0  # frames coded (in this run)
    stored_frames: int = 0
    encode_s: float = 0.0
    kept_frames: int = 0  # a resumed job: frames already coded by the interrupted run
    kept_bytes: int = 0
    images: list = field(default_factory=list)  # one dict per image frame (pixel models)

    @property
    def bits_per_byte(self) -> float:
        return 8.0 * self.coded_bytes / self.raw_bytes if self.raw_bytes else 0.0


def code_frame(model, raw: bytes) -> tuple[bytes, float, bool]:
    """One frame -> (its record, model NLL in bits, stored?). The same bytes wherever it
    runs: the model starts from a fresh state in every frame."""
    lanes = frame_lanes(model, len(raw))
    coded, nll = encode_frame(model, raw, lanes, model.coder)
    if len(coded) >= len(raw):  # incompressible: store (growth is the record only)
        return C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw)), 8.0 * len(raw), True
    method = C.METHOD_QUEUE if model.coder == "queue" else C.METHOD_STACK
    return C.frame_record(len(raw), coded, method, lanes, C.crc32c(raw)), nll, False


@dataclass
class _Source:
    """One file's content to pack: in memory (`data`) or read from `path` frame by frame."""
    size: int
    path: str | None = None
    data: bytes | None = None
    member: C.Member | None = None  # whose SHA-256 is filled in once the content was read


class _Plan:
    """One archive: its sources, members and sizes (all known before any byte is read, so
    the header's length is known and only its SHA-256 fields wait for the content)."""

    def __init__(self, sources: list[_Source], members, frame_size: int, identity: dict):
        self.sources, self.members, self.frame_size, self.identity = sources, members, frame_size, identity
        self.content_size = sum(s.size for s in sources)
        self.n_frames = sum(-(-s.size // frame_size) for s in sources)
        self.content_sha = b"\0" * 32
        self.skip_frames = 0  # frames a resumed run already has in its partial file
        self.skip_check = None  # (index, raw) -> None, raises if a skipped frame's content changed
        self.out = None  # set by the consumer

    def header(self) -> bytes:
        return C.header_bytes(self.content_size, self.content_sha, self.n_frames, self.frame_size,
                              self.identity, self.members)

    def frames(self):
        """The raw frames in order, read lazily, hashing as they go."""
        content = hashlib.sha256()
        single = len(self.sources) == 1 and self.sources[0].member is None
        index = 0
        for src in self.sources:
            h = content if single else hashlib.sha256()
            for raw in _read_frames(src, self.frame_size):
                h.update(raw)
                if not single:
                    content.update(raw)
                if index < self.skip_frames:
                    if self.skip_check:
                        self.skip_check(index, raw)
                    yield len(raw)  # kept from an interrupted run: not coded again
                else:
                    yield raw
                index += 1
            if src.member is not None:
                src.member.sha256 = h.digest()
        self.content_sha = content.digest()


def _read_frames(src: _Source, frame_size: int):
    if src.data is not None:
        for off in range(0, src.size, frame_size):
            yield src.data[off:off + frame_size]
        return
    try:
        with open(src.path, "rb") as f:
            left = src.size
            while left:
                raw = f.read(min(frame_size, left))
                if not raw:
                    raise UsageError(f"{src.path} changed while it was being packed (it became shorter); "
                                     f"nothing was written under the final name")
                left -= len(raw)
                yield raw
            if f.read(1):
                raise UsageError(f"{src.path} changed while it was being packed (it grew); "
                                 f"nothing was written under the final name")
    except OSError as e:
        raise UsageError(f"cannot read {src.path}: {e.strerror or e}") from None


def _frame_items(plans):
    """("open", plan), ("frame", plan, raw bytes, or the length of a kept frame), ...,
    ("close", plan) for each plan."""
    for plan in plans:
        yield ("open", plan, None)
        for raw in plan.frames():
            yield ("frame", plan, raw)
        yield ("close", plan, None)


def _run_plans(plans, runner, stats: PackStats, on_open, on_record, on_close, progress=None, on_batch=None):
    """Code every plan's frames with `runner`, in order: on_open(plan) before its first
    record, on_record(plan, record) for each frame, on_close(plan) after its last (the
    plan's SHA-256 fields are final by then)."""
    from . import scale

    items = _frame_items(plans)
    def work_of(it):
        return it[2] if isinstance(it[2], bytes) else None

    work = scale.batches(items, work_of=work_of, size_of=lambda it: len(it[2]) if isinstance(it[2], bytes) else 0)
    for metas, results in runner.imap(scale.encode_batch, work):
        for (kind, plan, raw), res in zip(metas, results):
            if kind == "open":
                on_open(plan)
            elif kind == "close":
                on_close(plan)
            elif res is None:
                stats.kept_frames += 1
                stats.kept_bytes += raw
            else:
                record, nll, stored = res
                on_record(plan, record)
                stats.frames += 1
                stats.stored_frames += stored
                stats.nll_bits += nll
                stats.coded_bytes += len(record)
                if progress:
                    progress(len(raw))
        if on_batch:
            on_batch()


def _check_frame_size(frame_size: int) -> None:
    if not 1 <= frame_size <= C.MAX_FRAME_RAW:
        raise UsageError(f"frame size must be 1..{C.MAX_FRAME_RAW} bytes")


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


def is_pixel_model(m) -> bool:
    return bool(getattr(m, "is_image_model", False))


def _image_only(jobs=1, cluster=None, resume: bool = False, per_file: bool = False, workers: int = 1) -> None:
    """Pixel models run on the in-memory path of lcodec.imagepack, in this process: refuse
    what only the streaming path of byte models does (see README, "Images")."""
    used = [name for name, on in (("--jobs", jobs not in (None, 0, 1)), ("--cluster", cluster is not None),
                                  ("--resume", resume), ("--per-file", per_file)) if on]
    if used:
        raise UsageError(f"{', '.join(used)} {'works' if len(used) == 1 else 'work'} with byte models only; "
                         f"with a pixel model, leave "
                         f"{'it' if len(used) == 1 else 'them'} out (--threads decodes frames side by side)")


def _pack(pieces: list[bytes], members, model, frame_size: int, progress, jobs: int = 1,
          cluster=None, pixels: bool = True) -> tuple[bytes, PackStats]:
    """In-memory packing (the bytes API)."""
    _check_frame_size(frame_size)
    t0 = time.perf_counter()
    m = resolve(model)
    if is_pixel_model(m):
        from . import imagepack

        _image_only(jobs, cluster)
        return imagepack._pack(pieces, members, m, frame_size, progress, pixels)
    file_members = [mm for mm in members if not mm.is_dir] if members is not None else [None]
    sources = [_Source(len(p), data=p, member=mm) for p, mm in zip(pieces, file_members)]
    return _pack_plan(_Plan(sources, members, frame_size, m.identity), m, jobs, cluster, progress, t0)


def _pack_plan(plan: _Plan, m, jobs: int, cluster, progress, t0: float) -> tuple[bytes, PackStats]:
    """Code one plan into archive bytes in memory (the bytes API)."""
    import io

    from . import scale

    stats = PackStats(raw_bytes=plan.content_size)
    buf = io.BytesIO()
    with scale.runner(m, jobs, cluster) as r:
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


def _plan_inputs(paths: list[str], frame_size: int, identity: dict, on_skip=None, exclude=()) -> _Plan:
    """A plan for files and folders: one regular file alone -> a single-file archive;
    otherwise a member archive. Only sizes and modes are read here (stat)."""
    if len(paths) == 1 and os.path.isfile(paths[0]):  # (a link to a file is followed, as before)
        st = os.stat(paths[0])
        return _Plan([_Source(st.st_size, path=paths[0])], None, frame_size, identity)
    return _member_plan(paths, frame_size, identity, on_skip, exclude)


def _member_plan(paths: list[str], frame_size: int, identity: dict, on_skip=None, exclude=()) -> _Plan:
    """exclude: absolute paths left out of the listing (a resumable job's own partial
    archive and journal, when the output lies inside a packed folder)."""
    items, skipped = collect_inputs(list(paths))
    if exclude:
        items = [it for it in items if os.path.abspath(it[1]) not in exclude]
    for s in skipped:
        if on_skip:
            on_skip(s)
    members, sources = [], []
    for rel, full, st in items:
        if os.path.isdir(full):
            members.append(C.Member(rel, st.st_mode, 0, C.sha256(b""), st.st_mtime_ns))
            continue
        mem = C.Member(rel, st.st_mode, st.st_size, b"\0" * 32, st.st_mtime_ns)
        members.append(mem)
        sources.append(_Source(st.st_size, path=full, member=mem))
    return _Plan(sources, members, frame_size, identity)


def pack_paths(paths: list[str], model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None,
               on_skip=None, jobs: int = 1, cluster=None, pixels: bool = True) -> tuple[bytes, PackStats]:
    """Pack files and folders into one multi-member archive; returns (blob, stats)."""
    _check_frame_size(frame_size)
    t0 = time.perf_counter()
    m = resolve(model)
    if is_pixel_model(m):
        from . import imagepack

        _image_only(jobs, cluster)
        return imagepack.pack_paths(list(paths), m, frame_size, progress, on_skip, pixels)
    return _pack_plan(_member_plan(list(paths), frame_size, m.identity, on_skip), m, jobs, cluster, progress, t0)


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
    A pixel model packs in memory (lcodec.imagepack; no jobs, cluster or resume)."""
    from . import scale

    _check_frame_size(frame_size)
    t_load = time.perf_counter()  # encode_s counts the model's loading, as before
    m = resolve(model)
    if is_pixel_model(m):
        _image_only(jobs, cluster, resume)
        if len(paths) == 1 and os.path.isfile(paths[0]):
            blob, stats = pack_stats(read_input(paths[0]), m, frame_size, progress, pixels=pixels)
        else:
            blob, stats = pack_paths(list(paths), m, frame_size, progress, on_skip, pixels=pixels)
        if isinstance(output, (str, os.PathLike)):
            atomic_write(os.fspath(output), blob, force=force)
        else:
            output.write(blob)
            output.flush()
        return stats
    model = m

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
    plan = _plan_inputs(list(paths), frame_size, m.identity, on_skip, exclude=own)
    stats = PackStats(raw_bytes=plan.content_size)
    journal = _Journal(output, plan) if resume else None
    out = OutFile(output, force=force, tmp_name=journal.partial_name if journal else None,
                  resume=bool(journal and journal.usable))
    try:
        f = out.f
        start = journal.prepare(out, plan) if journal else 0
        with scale.runner(m, jobs, cluster) as r:
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


def pack_each(paths: list[str], out_dir: str, model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None,
              on_skip=None, jobs: int = 1, cluster=None, force: bool = False, resume: bool = False) -> dict:
    """A corpus job: every regular file under `paths` becomes its own single-file archive
    `out_dir/<member path>.lcodec`, and `out_dir/manifest.json` lists them (path,
    archive, sizes, SHA-256 of content and archive, status). Frames of many files are
    coded together (`jobs` processes or `cluster`), so small files keep every worker busy.
    Each archive is written under a temporary name and renamed into place when complete,
    then recorded in the journal `out_dir/.lcodec-journal.jsonl`. With `resume`, a
    member is kept without recoding when the journal (or the manifest of a finished run)
    records it and both its archive and its original still have the recorded SHA-256;
    everything else is coded again. Returns the manifest (a dict)."""
    from . import scale

    _check_frame_size(frame_size)
    t0 = time.perf_counter()
    m = resolve(model)
    if is_pixel_model(m):
        _image_only(jobs, cluster, resume, per_file=True)
    if os.path.lexists(out_dir) and not (force or resume):
        raise UsageError(f"{out_dir} exists; pass --resume to continue a job there, or --force to overwrite it")
    if os.path.lexists(out_dir) and not os.path.isdir(out_dir):
        raise UsageError(f"{out_dir} exists and is not a folder")
    items, skipped = collect_inputs(list(paths))
    for sk in skipped:
        if on_skip:
            on_skip(sk)
    files = [(rel, full, st) for rel, full, st in items if not os.path.isdir(full)]
    out_abs = os.path.abspath(out_dir)
    for _, full, _ in files:
        if os.path.abspath(full).startswith(out_abs + os.sep):
            raise UsageError(f"{out_dir} lies inside the inputs; write the archives somewhere else")
    try:
        os.makedirs(out_dir, exist_ok=True)
    except OSError as e:
        raise UsageError(f"cannot create {out_dir}: {e.strerror or e}") from None
    journal_path = os.path.join(out_dir, EACH_JOURNAL)
    manifest_path = os.path.join(out_dir, EACH_MANIFEST)
    done = _read_each_records(journal_path, manifest_path, m.identity, frame_size) if resume else {}
    ident_text = identity_text(m.identity)
    entries = {}
    stats = PackStats(raw_bytes=sum(st.st_size for _, _, st in files))
    jf = open(journal_path, "a" if resume else "w", encoding="utf-8")
    header_line = {"journal": EACH_KIND, "model": m.identity, "frame_size": frame_size}
    jf.write(json.dumps(header_line, sort_keys=True) + "\n")

    def plans():
        for rel, full, st in files:
            arch_rel = rel + ARCHIVE_EXT
            target = os.path.join(out_dir, *arch_rel.split("/"))
            rec = done.get(rel)
            if rec is not None and _each_still_good(rec, full, st, target):
                entries[rel] = {**rec, "status": "kept"}
                if progress:
                    progress(st.st_size)
                continue
            plan = _Plan([_Source(st.st_size, path=full)], None, frame_size, m.identity)
            plan.rel, plan.target = rel, target
            yield plan

    def on_open(plan):
        os.makedirs(os.path.dirname(plan.target), exist_ok=True)
        if os.path.isdir(plan.target):
            raise UsageError(f"{plan.target} is a folder; it cannot become an archive")
        name = "." + os.path.basename(plan.target) + ".lcodec-partial"
        plan.out = OutFile(plan.target, force=True, tmp_name=name)
        plan.out.f.write(plan.header())

    def on_record(plan, rec):
        plan.out.f.write(rec)

    def on_close(plan):
        f = plan.out.f
        f.seek(0)
        f.write(plan.header())
        plan.out.commit()
        arch_sha, arch_len = _file_sha256(plan.target)
        rec = {"path": plan.rel, "archive": plan.rel + ARCHIVE_EXT, "bytes": plan.content_size,
               "sha256": plan.content_sha.hex(), "archive_bytes": arch_len, "archive_sha256": arch_sha}
        jf.write(json.dumps(rec, sort_keys=True) + "\n")
        jf.flush()
        os.fsync(jf.fileno())
        entries[plan.rel] = {**rec, "status": "packed"}

    opened = []

    def on_open_tracked(plan):
        opened.append(plan)
        on_open(plan)

    try:
        with scale.runner(m, jobs, cluster) as r:
            _run_plans(plans(), r, stats, on_open_tracked, on_record, on_close, progress)
    except BaseException:
        for plan in opened:
            if plan.out is not None:
                plan.out.abort()
        jf.close()
        raise
    jf.close()
    members = [entries[rel] for rel, _, _ in files]
    manifest = {"manifest": EACH_MANIFEST_KIND, "model": m.identity, "model_text": ident_text,
                "frame_size": frame_size, "members": members, "skipped": list(skipped),
                "content_bytes": sum(e["bytes"] for e in members),
                "archive_bytes": sum(e["archive_bytes"] for e in members),
                "packed": sum(e["status"] == "packed" for e in members),
                "kept": sum(e["status"] == "kept" for e in members),
                "seconds": round(time.perf_counter() - t0, 3)}
    atomic_write(manifest_path, (json.dumps(manifest, indent=1, sort_keys=True) + "\n").encode(), force=True)
    _remove_quietly(journal_path)
    return manifest


EACH_JOURNAL = ".lcodec-journal.jsonl"
EACH_MANIFEST = "manifest.json"
EACH_KIND = "lcodec per-file journal 1"
EACH_MANIFEST_KIND = "lcodec per-file manifest 1"


def _file_sha256(path: str) -> tuple[str, int]:
    h, n = hashlib.sha256(), 0
    with open(path, "rb") as f:
        while True:
            b = f.read(1 << 20)
            if not b:
                return h.hexdigest(), n
            h.update(b)
            n += len(b)


def _read_each_records(journal_path: str, manifest_path: str, identity: dict, frame_size: int) -> dict:
    """Finished members of an earlier run with the same model and frame size: path -> record.
    Lines that do not parse (a run killed while writing one) are ignored."""
    done = {}
    try:
        with open(manifest_path, encoding="utf-8") as f:
            man = json.load(f)
        if man.get("manifest") == EACH_MANIFEST_KIND and man.get("model") == identity \
                and man.get("frame_size") == frame_size:
            for e in man.get("members", []):
                done[e["path"]] = {k: v for k, v in e.items() if k != "status"}
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        pass
    try:
        with open(journal_path, encoding="utf-8") as f:
            same = False
            for line in f:
                try:
                    rec = json.loads(line)
                except ValueError:
                    continue
                if not isinstance(rec, dict):
                    continue
                if rec.get("journal") == EACH_KIND:
                    same = rec.get("model") == identity and rec.get("frame_size") == frame_size
                elif same and isinstance(rec.get("path"), str):
                    done[rec["path"]] = rec
    except OSError:
        pass
    return done


def _each_still_good(rec: dict, full: str, st, target: str) -> bool:
    """The recorded archive is there, unchanged, and the original still has its SHA-256."""
    try:
        if rec.get("bytes") != st.st_size or not os.path.isfile(target):
            return False
        if os.path.getsize(target) != rec.get("archive_bytes"):
            return False
        if _file_sha256(target)[0] != rec.get("archive_sha256"):
            return False
        return _file_sha256(full)[0] == rec.get("sha256")
    except OSError:
        return False


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
                fr = C.read_record(memoryview(mm), pos[0], index)
            except DataError:
                raise UsageError(f"{self.partial} is damaged at frame {index}; remove it and "
                                 f"{self.path} to start again") from None
            if fr.raw_len != len(raw) or fr.raw_crc != C.crc32c(raw):
                raise UsageError(f"an input changed since the interrupted run (frame {index} differs); "
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


# -- decoding -----------------------------------------------------------------------------
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
            from .images import rebuild
            try:
                return rebuild(data)
            except (ValueError, KeyError, TypeError):
                raise DataError(f"frame {first}: its pixel record cannot be rebuilt into an image file") from None
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


def decode_one(model, index: int, method: int, raw_len: int, lanes: int, raw_crc: int, coded_crc: int,
               payload) -> tuple[bytes | None, str | None]:
    """One frame record's fields -> (raw bytes, None), or (None, what is wrong)."""
    if C.crc32c(payload) != coded_crc:
        return None, f"frame {index} damaged (CRC-32C of its coded bytes does not match)"
    if method == C.METHOD_STORED:
        raw = bytes(payload)
    elif method == C.METHOD_IMAGE:
        from .errors import ModelError
        from .pixels import decode_image_frame
        if not is_pixel_model(model):
            return None, f"frame {index} damaged (an image frame in an archive of a byte model)"
        try:
            raw = decode_image_frame(model, payload, raw_len)
        except DataError as e:
            return None, str(e)
        except (ModelError, KeyboardInterrupt, SystemExit):
            raise
        except BaseException:
            return None, f"frame {index} damaged (its coded words cannot be decoded)"
    else:
        coder = "queue" if method == C.METHOD_QUEUE else "stack"
        try:
            raw = decode_frame(model, bytes(payload), raw_len, lanes, coder)
        except (KeyboardInterrupt, SystemExit):
            raise
        except BaseException:  # constriction may refuse a damaged payload (a panic is a BaseException)
            return None, f"frame {index} damaged (its coded words cannot be decoded)"
    if C.crc32c(raw) != raw_crc:
        return None, f"frame {index} damaged (CRC-32C of its decoded bytes does not match)"
    return raw, None


def _frame_fields(fr: C.Frame) -> tuple:
    return (fr.index, fr.method, fr.raw_len, fr.lanes, fr.raw_crc, fr.coded_crc, bytes(fr.payload))


def _decode_frame(model, fr: C.Frame) -> bytes:
    raw, problem = decode_one(model, fr.index, fr.method, fr.raw_len, fr.lanes, fr.raw_crc, fr.coded_crc,
                              fr.payload)
    if problem:
        raise DataError(problem)
    return raw


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
    ahead); otherwise a runner decodes a bounded window ahead."""
    if (jobs is None or jobs <= 1) and cluster is None and workers > 1 and len(cont.frames) > 1:
        yield from _threaded_frames(cont, m, workers)
        return
    if (jobs is None or jobs <= 1) and cluster is None:
        for fr in cont.frames:
            try:
                yield fr, _decode_frame(m, fr), None
            except DataError as e:
                yield fr, None, str(e)
        return
    from . import scale

    with scale.runner(m, jobs, cluster) as r:
        results = r.imap(scale.decode_batch, scale.batches(cont.frames, _frame_fields, lambda fr: fr.raw_len))
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
            return _decode_frame(m, fr), None
        except DataError as e:
            return None, str(e)

    from .models.tessel import one_blas_thread

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


def _check_workers(jobs, cluster, workers: int) -> None:
    if workers > 1 and (cluster is not None or jobs not in (None, 0, 1)):
        raise UsageError("give --threads or --jobs/--cluster, not both")


def _archive_model(blob, model):
    """The model an archive needs (checked against the one given), loaded once: a pixel
    model's archive goes through lcodec.imagepack. Damage in the container is a DataError."""
    return for_identity(C.read_container(blob).identity, model)


class _Sink:
    """Where streamed decoding puts each member's bytes (single-file archives: one member None)."""

    def begin(self, mem): pass

    def data(self, mem, raw, n: int): pass  # raw is None for a damaged frame of n bytes

    def end(self, mem, ok: bool): pass


def decode_stream(blob, sink: _Sink, model=None, progress=None, keep_going: bool = False, jobs: int = 1,
                  cluster=None, workers: int = 1) -> tuple[C.Container, list]:
    """Decode every frame in order, handing each to `sink` as it comes (nothing is kept),
    and check every checksum: each frame's CRC-32C, each member's SHA-256 (at its end),
    the content's SHA-256 (at the end). Returns (container, problems); without
    keep_going the first problem raises DataError."""
    _check_workers(jobs, cluster, workers)
    cont = C.read_container(blob)
    m = for_identity(cont.identity, model)
    if is_pixel_model(m):
        raise UsageError("an archive of a pixel model is decoded in memory: use decode, unpack, "
                         "unpack_to_dir or verify")
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
    workers > 1, frames are decoded by that many threads (the output is the same)."""
    cont = C.read_container(blob)
    m = for_identity(cont.identity, model)
    _check_member_table(cont)
    out = Decoded(cont, [])

    def one(fr):
        try:
            return _decode_frame(m, fr), None
        except DataError as e:
            return None, e

    if workers > 1 and len(cont.frames) > 1:  # frames are independent: decode them side by side
        from concurrent.futures import ThreadPoolExecutor
        from .models.tessel import limit_blas
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


class _Collect(_Sink):
    def __init__(self):
        self.parts = []

    def data(self, mem, raw, n):
        self.parts.append(raw if raw is not None else bytes(n))


def unpack(blob, model=None, progress=None, jobs: int = 1, cluster=None, workers: int = 1) -> bytes:
    """Archive bytes -> the original bytes (single-content archives)."""
    _check_workers(jobs, cluster, workers)
    pm = model = _archive_model(blob, model)
    if is_pixel_model(pm):
        from . import imagepack

        _image_only(jobs, cluster)
        return imagepack.unpack(blob, pm, progress, workers)
    if is_multi(blob):
        n = len(decode(blob, model).container.members)  # damage first (DataError), as always
        raise UsageError(f"this archive holds {n} members; unpack it into a folder")
    sink = _Collect()
    decode_stream(blob, sink, model, progress, jobs=jobs, cluster=cluster, workers=workers)
    return b"".join(sink.parts)


class _ToFile(_Sink):
    def __init__(self, f):
        self.f = f

    def data(self, mem, raw, n):
        self.f.write(raw)


def unpack_to_file(blob, output, model=None, force: bool = False, progress=None, jobs: int = 1,
                   cluster=None, workers: int = 1) -> int:
    """Decode a single-file archive into the file `output` (a path) or a binary stream,
    frame by frame: memory holds a bounded window of frames, never the whole content.
    A path gets the content under a temporary name, renamed into place only after every
    checksum passed; a stream (stdout) gets it only after that too (it is spooled to a
    temporary file first). Returns the content size."""
    import shutil
    import tempfile

    _check_workers(jobs, cluster, workers)
    if is_multi(blob):
        n = len(C.read_container(blob).members)
        raise UsageError(f"this archive holds {n} members; unpack it into a folder")
    pm = model = _archive_model(blob, model)
    if is_pixel_model(pm):  # in memory: a pixel record is rebuilt into its image file
        from . import imagepack

        _image_only(jobs, cluster)
        data = imagepack.unpack(blob, pm, progress, workers)
        if isinstance(output, (str, os.PathLike)):
            atomic_write(os.fspath(output), data, force=force)
        else:
            output.write(data)
            output.flush()
        return len(data)
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


class _ToFolder(_Sink):
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
                  cluster=None, workers: int = 1) -> list[str]:
    """Decode a multi-member archive into `out_dir` (created; must not exist unless force).
    Members are decoded frame by frame and written under a temporary folder as they come;
    only when every checksum passed is it renamed into place (or, with force into an
    existing folder, its files moved in); returns the member paths written."""
    _check_workers(jobs, cluster, workers)
    if not is_multi(blob):
        C.read_container(blob)  # a damaged archive is a DataError, as before
        raise UsageError("this archive holds a single file; unpack it to a file name")
    pm = model = _archive_model(blob, model)
    if is_pixel_model(pm):
        from . import imagepack

        _image_only(jobs, cluster)
        return imagepack.unpack_to_dir(blob, out_dir, pm, force, progress, workers)
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


@dataclass
class VerifyReport:
    ok: bool
    problems: list
    content_bytes: int
    frames: int
    members: int
    guarantees: dict = field(default_factory=dict)  # "byte-exact image"/"pixel-exact image" -> count


class _Compare(_Sink):
    """Compares the decoded bytes with the originals as they come (read in step, never whole)."""

    def __init__(self, against: str | None, multi: bool, members):
        self.against, self.multi, self.f, self.problems, self.differs = against, multi, None, [], False
        self.root = against
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

    def end(self, mem, ok):
        if self.f is None:
            return
        if not self.differs and self.f.read(1):
            self.differs = True
        self.f.close()
        self.f = None
        if self.differs:
            self.problems.append(f"decoded content differs from {self.against}" if mem is None
                                 else f"member {mem.path}: differs from {self.path}")


def verify(blob, model=None, against: str | None = None, progress=None, jobs: int = 1,
           cluster=None, workers: int = 1) -> VerifyReport:
    """Decode everything, check every checksum (and the original, if given); never raises
    DataError for damage: it is reported in `problems`. Frames are decoded and checked as
    they come (in `jobs` processes or on `cluster`); nothing is kept."""
    _check_workers(jobs, cluster, workers)
    try:
        cont = C.read_container(blob)
        pm = model = _archive_model(blob, model)
    except DataError as e:
        return VerifyReport(False, [str(e)], 0, 0, 0)
    if is_pixel_model(pm):
        from . import imagepack

        _image_only(jobs, cluster)
        return imagepack.verify(blob, pm, against, progress, workers)
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
    return VerifyReport(not problems, problems, cont.content_size, len(cont.frames), len(cont.members or []))


def image_guarantee(fr: C.Frame) -> str | None:
    """"byte-exact" or "pixel-exact" for an image frame (from its plain descriptor), else None."""
    if fr.method != C.METHOD_IMAGE:
        return None
    from .pixels import FLAG_RECORD, read_descriptor
    lay, _ = read_descriptor(fr.payload, fr.raw_len)
    return "pixel-exact" if lay.flags & FLAG_RECORD else "byte-exact"


def _frame_info(f: C.Frame) -> dict:
    d = {"index": f.index, "raw_bytes": f.raw_len, "coded_bytes": f.coded_len,
         "method": C.METHOD_NAMES[f.method], "lanes": f.lanes, "crc32c": f"{f.raw_crc:08x}"}
    if f.method == C.METHOD_IMAGE:
        from .pixels import read_descriptor
        try:
            lay, _ = read_descriptor(f.payload, f.raw_len)
            d["image"] = {"rows": lay.rows, "columns": lay.cols, "channels": lay.channels,
                          "bits_per_sample": 8 * lay.bps, "guarantee": image_guarantee(f),
                          "bits_per_subpixel": 8.0 * f.coded_len / (lay.rows * lay.cols * lay.channels)}
            if lay.replicated:  # coded: one sample per block; unpack repeats it
                d["image"]["replicated"] = [lay.rep_rows, lay.rep_cols]
        except DataError as e:
            d["image"] = {"damaged": str(e)}
    return d


def info(blob) -> dict:
    """Header, members, frames and model identity, without decoding anything."""
    cont = C.read_container(blob)
    frames = [_frame_info(f) for f in cont.frames]
    return {
        "format_version": cont.version,
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
