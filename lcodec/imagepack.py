"""Packing and unpacking with a pixel model (an image model, `is_image_model`): the
in-memory path. Image files become one image frame each (method 3, lcodec/pixels.py),
pixel records are rebuilt into image files on unpack (lcodec/images.py). lcodec.api sends
every pixel-model request here; byte models take api's streaming path. Not (yet) streamed
nor run in worker processes: --jobs/--cluster/--resume/--per-file are refused for pixel
models (api._image_only).
"""
from __future__ import annotations

import os
import time

from . import container as C
from .coder import encode_frame
from .errors import DataError, UsageError
from .fsio import collect_inputs, safe_member_path, _remove_quietly, read_input
from .models import resolve
from .api import (DEFAULT_FRAME_SIZE, KEPT_MODE_BITS, Decoded, PackStats, VerifyReport, _refuse_links,
                  apply_folder_modes, decode, frame_lanes)


def _encode_pieces(pieces, model, frame_size: int, stats: PackStats, progress=None, images=None) -> list[bytes]:
    from .pixels import encode_image_frame

    records, done = [], 0
    coder = model.coder
    method = C.METHOD_QUEUE if coder == "queue" else C.METHOD_STACK
    for i, piece in enumerate(pieces):
        img = images[i] if images else None
        if img is not None:  # one image, one frame (the frame size was raised to hold it)
            raw = bytes(piece)
            coded, nll_side, nll_pix = encode_image_frame(model, raw, img.layout)
            if len(coded) >= len(raw) and img.guarantee == "byte-exact":
                records.append(C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw)))
                stats.stored_frames += 1
                stats.nll_bits += 8.0 * len(raw)
            else:  # a pixel record is never stored: its frame says that unpack rebuilds a file
                records.append(C.frame_record(len(raw), coded, C.METHOD_IMAGE, 1, C.crc32c(raw)))
                stats.nll_bits += nll_side + nll_pix
                stats.images.append({"kind": img.kind, "guarantee": img.guarantee, "samples": img.layout.rows
                                     * img.layout.cols * img.layout.channels, "bits": 8 * img.layout.bps,
                                     "coded_bytes": len(coded), "side_bytes": len(raw) - img.layout.region_len,
                                     "nll_side_bits": nll_side, "nll_pixel_bits": nll_pix})
            stats.frames += 1
            if progress:
                progress(len(raw))
            continue
        for off in range(0, len(piece), frame_size):
            raw = bytes(piece[off:off + frame_size])
            lanes = frame_lanes(model, len(raw))
            coded, nll = encode_frame(model, raw, lanes, coder)
            if len(coded) >= len(raw):  # incompressible: store (growth is the record only)
                records.append(C.frame_record(len(raw), raw, C.METHOD_STORED, 1, C.crc32c(raw)))
                stats.stored_frames += 1
                stats.nll_bits += 8.0 * len(raw)
            else:
                records.append(C.frame_record(len(raw), coded, method, lanes, C.crc32c(raw)))
                stats.nll_bits += nll
            stats.frames += 1
            done += len(raw)
            if progress:
                progress(len(raw))
    return records


def image_pieces(pieces: list[bytes], m, pixels: bool = True):
    """With a pixel model: (contents, ImageInfo or None per piece). An image's content is its
    own bytes (byte-exact) or its pixel record (pixel-exact); anything else stays bytes."""
    if not pixels or not getattr(m, "is_image_model", False):
        return pieces, None
    from .images import analyse

    out, infos = [], []
    for p in pieces:
        info = analyse(bytes(p)) if len(p) <= C.MAX_FRAME_RAW else None
        if info is not None and not m.has_depth(info.layout.deep):
            info = None  # the model has no network for this depth: bytes
        infos.append(info)
        out.append(info.content if info is not None else p)
    return out, infos


def _pack(pieces: list[bytes], members, model, frame_size: int, progress, pixels: bool = True) -> tuple[bytes, PackStats]:
    if not 1 <= frame_size <= C.MAX_FRAME_RAW:
        raise UsageError(f"frame size must be 1..{C.MAX_FRAME_RAW} bytes")
    t0 = time.perf_counter()
    m = resolve(model)
    pieces, images = image_pieces(pieces, m, pixels)
    if images and any(images):
        frame_size = max([frame_size] + [len(p) for p, i in zip(pieces, images) if i is not None])
        if members is not None:  # members of image content: size and SHA-256 of what is stored
            it = iter(zip(pieces, images))
            for k, mem in enumerate(members):
                if mem.is_dir:
                    continue
                p, i = next(it)
                if i is not None:
                    members[k] = C.Member(mem.path, mem.mode, len(p), C.sha256(p), mem.mtime_ns)
    stats = PackStats(raw_bytes=sum(len(p) for p in pieces))
    records = _encode_pieces(pieces, m, frame_size, stats, progress, images)
    h = C.sha256(b"".join(pieces)) if len(pieces) != 1 else C.sha256(pieces[0])
    head = C.header_bytes(stats.raw_bytes, h, len(records), frame_size, m.identity, members)
    blob = head + b"".join(records)
    stats.coded_bytes = len(blob)
    stats.encode_s = time.perf_counter() - t0
    return blob, stats


def pack_stats(data: bytes, model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None,
               pixels: bool = True) -> tuple[bytes, PackStats]:
    """Pack one byte string; returns (archive bytes, PackStats). With a pixel model, an
    image is coded as pixels unless pixels=False (then as bytes, byte-exact)."""
    return _pack([bytes(data)], None, model, frame_size, progress, pixels)


def pack(data: bytes, model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None, pixels: bool = True) -> bytes:
    """Pack one byte string into an archive (bytes)."""
    return pack_stats(data, model, frame_size, progress, pixels)[0]


def pack_paths(paths: list[str], model=None, frame_size: int = DEFAULT_FRAME_SIZE, progress=None,
               on_skip=None, pixels: bool = True) -> tuple[bytes, PackStats]:
    """Pack files and folders into one multi-member archive; returns (blob, stats)."""
    items, skipped = collect_inputs(list(paths))
    for s in skipped:
        if on_skip:
            on_skip(s)
    members, pieces = [], []
    for rel, full, st in items:
        if os.path.isdir(full):
            members.append(C.Member(rel, st.st_mode, 0, C.sha256(b""), st.st_mtime_ns))
            continue
        data = read_input(full)
        members.append(C.Member(rel, st.st_mode, len(data), C.sha256(data), st.st_mtime_ns))
        pieces.append(data)
    return _pack(pieces, members, model, frame_size, progress, pixels)


# -- decoding -----------------------------------------------------------------------------


def unpack(blob, model=None, progress=None, workers: int = 1) -> bytes:
    """Archive bytes -> the original bytes (single-content archives)."""
    d = decode(blob, model, progress, workers=workers)
    if d.container.members is not None:
        raise UsageError(f"this archive holds {len(d.container.members)} members; unpack it into a folder")
    return d.output_bytes(0, len(d.frames))


def unpack_to_dir(blob, out_dir: str, model=None, force: bool = False, progress=None, workers: int = 1) -> list[str]:
    """Decode a multi-member archive into `out_dir` (created; must not exist unless force).
    Everything is decoded and verified first, then written under a temporary folder that
    is renamed into place; returns the member paths written."""
    d = decode(blob, model, progress, workers=workers)
    if d.container.members is None:
        raise UsageError("this archive holds a single file; unpack it to a file name")
    exists = os.path.lexists(out_dir)
    if exists and not force:
        raise UsageError(f"{out_dir} exists; pass --force to write into it")
    if exists and not os.path.isdir(out_dir):
        raise UsageError(f"{out_dir} exists and is not a folder")
    parent = os.path.dirname(os.path.abspath(out_dir))
    tmp = os.path.join(parent, f".{os.path.basename(os.path.abspath(out_dir))}.part-{os.getpid()}")
    written, folders = [], []
    try:
        os.makedirs(tmp)
        for mem, first, n in d.member_ranges():
            rel = safe_member_path(mem.path)
            target = os.path.join(tmp, rel)
            if mem.is_dir:
                os.makedirs(target, exist_ok=True)
                folders.append(mem)
                continue
            os.makedirs(os.path.dirname(target), exist_ok=True)
            data = d.output_bytes(first, n)
            with open(target, "wb") as f:
                f.write(data)
                f.flush()
                os.fsync(f.fileno())
            os.chmod(target, mem.mode & KEPT_MODE_BITS)
            if mem.mtime_ns:
                os.utime(target, ns=(mem.mtime_ns, mem.mtime_ns))
            written.append(mem.path)
        if not exists:
            os.rename(tmp, out_dir)
        else:  # --force into an existing folder: move each file into place
            for mem in d.container.members:  # never write through a link inside out_dir
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
        _remove_quietly(tmp)
        raise UsageError(f"cannot write into {out_dir}: {e.strerror or e}") from None
    except BaseException:  # a refused link, an interrupt: no temporary folder left behind
        _remove_quietly(tmp)
        raise
    return written


def verify(blob, model=None, against: str | None = None, progress=None, workers: int = 1) -> VerifyReport:
    """Decode everything, check every checksum (and the original, if given); never raises
    DataError for damage: it is reported in `problems`."""
    try:
        d = decode(blob, model, progress, keep_going=True, workers=workers)
    except DataError as e:
        return VerifyReport(False, [str(e)], 0, 0, 0)
    problems = list(d.problems)
    cont = d.container
    if against is not None and not problems:
        problems += _compare_against(d, against)
    g = {}
    for fr in cont.frames:
        if fr.method == C.METHOD_IMAGE:
            k = "pixel-exact image" if fr.index in d.records else "byte-exact image"
            g[k] = g.get(k, 0) + 1
    return VerifyReport(not problems, problems, cont.content_size, len(cont.frames), len(cont.members or []), g)


def _original_content(path: str, is_record: bool) -> bytes:
    """What a member's decoded content must equal: the file's bytes (byte-exact), or the
    pixel record made from it (pixel-exact: the same samples and metadata)."""
    data = read_input(path)
    if is_record:
        from .images import analyse
        info = analyse(data)
        return info.content if info is not None and info.guarantee == "pixel-exact" else data
    return data


def _compare_against(d: Decoded, against: str) -> list:
    cont = d.container
    if cont.members is None:
        if not os.path.isfile(against):
            raise UsageError(f"{against}: not a file (this archive holds a single file)")
        same = _original_content(against, 0 in d.records) == b"".join(d.frames)
        what = "decoded pixels or metadata differ" if 0 in d.records else "decoded content differs"
        return [] if same else [f"{what} from {against}"]
    probs = []
    root = against
    single_top = {m.path.split("/")[0] for m in cont.members}
    if len(single_top) == 1 and os.path.basename(os.path.normpath(against)) == next(iter(single_top)):
        root = os.path.dirname(os.path.normpath(against)) or "."
    for mem, first, n in d.member_ranges():
        p = os.path.join(root, safe_member_path(mem.path))
        if mem.is_dir:
            if not os.path.isdir(p):
                probs.append(f"member {mem.path}: no such folder under {against}")
            continue
        if not os.path.isfile(p):
            probs.append(f"member {mem.path}: no such file under {against}")
        elif _original_content(p, n == 1 and first in d.records) != b"".join(d.frames[first:first + n]):
            probs.append(f"member {mem.path}: differs from {p}")
    return probs


