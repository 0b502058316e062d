"""Plan: inputs become an archive's frames, of whatever kind.

A plan knows, before any content is read, everything the header needs except the
SHA-256 fields: the members, the content size, the frame size and the frame count (so
the header's length is fixed). `seal()` then reads the content once to hash it (a quick
pass: hashing runs at hundreds of MB/s, coding at hundreds of KB/s), which completes the
header and with it the archive identity every version-3 record carries. Its frames are
then read lazily, one at a time, and hashed again as they go past: an input that
changed in between is refused.

Frame kinds enter here. With a pixel model, each file that an input reader
(inputs/images.py) recognises as an image becomes an image source: its content is the
file's own bytes (byte-exact) or its pixel record (pixel-exact), one frame holding it
all (the frame size is raised to the largest such content), and its frame is an
`ImageWork`. Everything else is split into byte frames. Planning reads each image once
to learn its content's length; reading the frames reads it again, so memory holds one
image at a time, never the corpus.
"""
from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass, field, replace

from ..errors import UsageError
from ..format import container as C
from ..frames import ImageWork, is_pixel_model
from ..fsio import collect_inputs, read_input
from ..inputs.images import analyse

DEFAULT_FRAME_SIZE = 1 << 20


KEPT_MODE_BITS = 0o777  # permission bits restored; set-id and sticky bits are not


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


@dataclass
class _Source:
    """One file's content to pack: in memory (`data`) or read from `path` frame by frame."""
    size: int
    path: str | None = None
    data: bytes | None = None
    member: C.Member | None = None  # whose SHA-256 is filled in once the content was read
    image: tuple | None = None  # (layout, guarantee, kind): an image source, one frame of its content


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
        self.sealed = False
        self.archive_id = None
        self.next_index = 0  # the frame number of the next record coded (the writer's count)
        self.band_workers = 1  # a lone image's bands coded by that many forked processes

    def lone_image_jobs(self, jobs, cluster) -> int | None:
        """--jobs N for a plan of one image frame: coded here (the returned jobs, 1), its
        bands by N forked workers (a pool would give the one frame to one worker). Other
        plans: jobs unchanged."""
        if (cluster is None and jobs is not None and jobs > 1 and self.n_frames == 1
                and self.sources and self.sources[0].image is not None):
            self.band_workers = jobs
            return 1
        return jobs

    def header(self) -> bytes:
        return C.header_bytes(self.content_size, self.content_sha, self.n_frames, self.frame_size,
                              self.identity, self.members, bound=True)

    def seal(self) -> None:
        """Hash the content (every SHA-256 field of the header), and so fix the archive
        identity (container version 3). Reads each input once more; idempotent."""
        if self.sealed:
            return
        content = hashlib.sha256()
        single = len(self.sources) == 1 and self.sources[0].member is None
        for src in self.sources:
            h = content if single else hashlib.sha256()
            if src.data is not None:
                h.update(src.data)
                if not single:
                    content.update(src.data)
            elif src.image is not None:
                data = _content_of_image(src)
                h.update(data)
                if not single:
                    content.update(data)
            else:
                for raw in _file_pieces(src, 1 << 20):
                    h.update(raw)
                    if not single:
                        content.update(raw)
            if src.member is not None:
                src.member.sha256 = h.digest()
        self.content_sha = content.digest()
        self.sealed = True
        self.archive_id = C.header_id(self.header())

    def frames(self):
        """The raw frames in order, read lazily, hashing as they go (checked against what
        seal() found: an input that changed since is refused)."""
        self.seal()
        content = hashlib.sha256()
        single = len(self.sources) == 1 and self.sources[0].member is None
        index = 0
        for src in self.sources:
            h = content if single else hashlib.sha256()
            for work in _read_frames(src, self.frame_size):
                raw = work.data if isinstance(work, ImageWork) else work
                h.update(raw)
                if not single:
                    content.update(raw)
                if index < self.skip_frames:
                    if self.skip_check:
                        self.skip_check(index, raw)
                    yield len(raw)  # kept from an interrupted run: not coded again
                elif isinstance(work, ImageWork) and self.band_workers > 1:
                    yield replace(work, workers=self.band_workers)
                else:
                    yield work
                index += 1
            if src.member is not None and src.member.sha256 != h.digest():
                raise UsageError(f"{src.path or src.member.path} changed while it was being packed; "
                                 f"nothing was written under the final name")
        if content.digest() != self.content_sha:
            raise UsageError(f"{self.sources[0].path if self.sources else 'the input'} changed while it was "
                             f"being packed; nothing was written under the final name")


def _file_pieces(src: _Source, piece: int):
    """A file source's bytes in pieces of `piece` bytes; refused if the file is no longer
    the size it had when planned. Both the sealing pass (hashing) and the frames read this."""
    try:
        with open(src.path, "rb") as f:
            left = src.size
            while left:
                raw = f.read(min(piece, left))
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


def _content_of_image(src: _Source) -> bytes:
    work = _image_work(src)
    return work.data


def _read_frames(src: _Source, frame_size: int):
    if src.image is not None:
        yield _image_work(src)
        return
    if src.data is not None:
        for off in range(0, src.size, frame_size):
            yield src.data[off:off + frame_size]
        return
    yield from _file_pieces(src, frame_size)


def _frame_items(plans):
    """("open", plan), ("frame", plan, raw bytes, or the length of a kept frame), ...,
    ("close", plan) for each plan."""
    for plan in plans:
        plan.seal()  # the header complete (SHA-256 fields, archive identity) before any record
        yield ("open", plan, None)
        for raw in plan.frames():
            yield ("frame", plan, raw)
        yield ("close", plan, None)


def _check_frame_size(frame_size: int) -> None:
    if not 1 <= frame_size <= C.MAX_FRAME_RAW:
        raise UsageError(f"frame size must be 1..{C.MAX_FRAME_RAW} bytes")


def _plan_inputs(paths: list[str], frame_size: int, model, on_skip=None, exclude=(), pixels: bool = True) -> _Plan:
    """A plan for files and folders: one regular file alone -> a single-file archive;
    otherwise a member archive. Only sizes and modes are read here (stat), and images
    with a pixel model."""
    if len(paths) == 1 and os.path.isfile(paths[0]):  # (a link to a file is followed, as before)
        st = os.stat(paths[0])
        return make_plan([_Source(st.st_size, path=paths[0])], None, frame_size, model, pixels)
    return _member_plan(paths, frame_size, model, on_skip, exclude, pixels)


def _member_plan(paths: list[str], frame_size: int, model, on_skip=None, exclude=(), pixels: bool = True) -> _Plan:
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
    return make_plan(sources, members, frame_size, model, pixels)


def make_plan(sources: list[_Source], members, frame_size: int, model, pixels: bool = True) -> _Plan:
    """The plan of one archive coded with `model`: with a pixel model (unless pixels is
    False), image files become image sources and the frame size grows to hold the
    largest image's content in one frame."""
    if pixels and is_pixel_model(model):
        for src in sources:
            _find_image(src, model)
        sizes = [src.size for src in sources if src.image is not None]
        if sizes:
            frame_size = max([frame_size] + sizes)
    return _Plan(sources, members, frame_size, model.identity)


def _content(src: _Source) -> bytes:
    return src.data if src.data is not None else read_input(src.path)


def _find_image(src: _Source, model) -> None:
    """Make `src` an image source when its content is an image the model has a network for."""
    if src.size > C.MAX_FRAME_RAW:
        return
    info = analyse(bytes(_content(src)))
    if info is None or not model.has_depth(info.layout.deep) or not getattr(model, "takes_image", bool)(info.layout):
        return  # not an image, or the model has no network for its depth (or size): bytes
    src.image = (info.layout, info.guarantee, info.kind)
    src.size = len(info.content)
    if src.data is not None:
        src.data = info.content
    if src.member is not None:  # a member of image content: the size (and SHA-256) of what is stored
        src.member.size = src.size


def _image_work(src: _Source) -> ImageWork:
    """An image source's one frame (its file read and analysed again, and checked unchanged)."""
    layout, guarantee, kind = src.image
    if src.data is not None:
        return ImageWork(src.data, layout, guarantee, kind)
    info = analyse(read_input(src.path))
    if info is None or len(info.content) != src.size or info.layout != layout:
        raise UsageError(f"{src.path} changed while it was being packed; nothing was written under the final name")
    return ImageWork(info.content, layout, guarantee, kind)
