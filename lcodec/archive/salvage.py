"""Salvage: recover every undamaged frame and member of a damaged archive.

    res = salvage(blob)                          # analyse and decode, in memory
    res.ok, res.report()                         # nothing damaged?  the report (a dict)
    res = salvage_to(blob, "restored/", keep_damaged=True)   # write what is proven good

What the format gives (docs/FORMAT.md), and how each piece is used:

* The header's CRC-32C. When it checks, its member table, frame size, frame count and
  content SHA-256 are trusted. When it does not, the same fields are read without the
  checksum (a "damaged header") and used as hints only: every member is then proven by
  its own SHA-256, and its name, mode and time, which nothing proves, are reported as
  unchecked (names are kept; modes and times are not restored; folders are not created
  on their own).
* Each frame record's head (varints, method, lanes, two CRCs) carries its own CRC-32C,
  so records can be found anywhere by trying every byte offset. Records are walked from
  the header's end; past a damaged head, the rest of the file is scanned for heads whose
  CRC checks. A found record's frame number comes from the end of the file (a chain of
  records that ends exactly at the end of the file holds the last frames), from a damaged
  head whose own length fields point exactly at it, or from its frames' raw lengths when
  only one place fits; a record whose place stays uncertain is listed and not used.
* Version 3 (archive/salvage_bound.py): each record carries the archive's identity and
  its frame number under its CRC-32C, so records are found by their archive's identity
  and placed by the number they carry; a record of another archive is refused.
* Per frame: the CRC-32C of its coded bytes (checked before decoding) and of its raw bytes.
* Per member: SHA-256. Only a member whose every frame decodes and whose SHA-256 matches
  is written under its own name; a single-file archive's content only when every frame
  decodes and the content's SHA-256 matches. With keep_damaged, damaged content is
  written as NAME.lcodec-damaged with its damaged byte ranges zero-filled (the ranges are
  in the report; bytes outside them passed their frame's CRC-32C only: a record copied
  in from another archive passes its own CRC and carries no frame number).

Damaged data is never written under a member's own name. Byte ranges in the report are
half-open [start, end) offsets.
"""
from __future__ import annotations

import bisect
import json
import os
import re
from dataclasses import dataclass, field

from ..errors import DataError, LcodecError, ModelError, UsageError, raise_pending
from ..format import container as C
from ..frames import decode_record, image_guarantee
from ..fsio import atomic_write, safe_member_path, _remove_quietly
from ..inputs.images import rebuild
from ..models import default_model, for_identity, identity_text, resolve
from .plan import KEPT_MODE_BITS
from . import salvage_bound as B
from .read import _refuse_links, apply_folder_modes

DAMAGED_SUFFIX = ".lcodec-damaged"
REPORT_SUFFIX = ".salvage.json"
MAX_DISTINCT_FIND = 64  # distinct raw lengths looked up with bytes.find; with more, every offset is tried
MAX_PATTERN_SPAN = 100_000  # frame numbers tried when placing records by their raw lengths
MAX_PATTERN_WORK = 2_000_000  # raw-length comparisons in all, when placing records by them


# -- the header, read with or without its checksum ----------------------------------------
@dataclass
class Hints:
    crc_ok: bool
    good: bool  # the header passes every check read_header makes, but the frames'
    end: int  # offset of the first frame record
    content_size: int
    content_sha256: bytes
    n_frames: int
    frame_size: int
    identity: dict | None
    members: list | None
    members_readable: bool
    version: int = 1
    archive_id: bytes | None = None  # version 3: from the header's bytes as read (proven when crc_ok)


def read_header_hints(mv) -> Hints | None:
    """The header's fields, read as read_header reads them but without trusting the
    checksum; None when they cannot even be parsed within the file."""
    n = len(mv)
    if n < 6:
        return None
    try:
        size, pos = C.read_uvarint(mv, 6, "the header")
        if pos + 32 > n:
            return None
        sha = bytes(mv[pos:pos + 32])
        n_frames, pos = C.read_uvarint(mv, pos + 32, "the header")
        frame_size, pos = C.read_uvarint(mv, pos, "the header")
        ilen, pos = C.read_uvarint(mv, pos, "the header")
        tlen, pos = C.read_uvarint(mv, pos, "the header")
    except DataError:
        return None
    if ilen > C.MAX_IDENTITY or tlen > C.MAX_MEMBER_TABLE or size > C.MAX_CONTENT:
        return None
    end = pos + 4 + ilen + tlen
    if end > n:
        return None
    stored = int.from_bytes(mv[pos:pos + 4], "little")
    crc_ok = C.crc32c(bytes(mv[:pos]) + bytes(mv[pos + 4:end])) == stored
    identity = None
    try:
        identity = C.decode_identity(mv[4], bytes(mv[pos + 4:pos + 4 + ilen]))
    except DataError:
        pass
    flags = mv[5]
    members, readable = None, True
    if tlen:
        try:
            members = C._read_members(mv[pos + 4 + ilen:end])
        except DataError:
            readable = False
    good = (crc_ok and bytes(mv[:4]) == C.MAGIC and mv[4] in C.SUPPORTED_VERSIONS and flags & ~C.FLAG_MEMBERS == 0
            and 1 <= frame_size <= C.MAX_FRAME_RAW and identity is not None and readable
            and (members is not None) == bool(flags & C.FLAG_MEMBERS))
    aid = C.archive_id(bytes(mv[:pos]) + bytes(mv[pos + 4:end])) if mv[4] == C.VERSION_BOUND else None
    return Hints(crc_ok, good, end, size, sha, n_frames, frame_size, identity, members, readable, mv[4], aid)


class Layout:
    """Where each frame belongs: raw length, content range, member (computed, not listed,
    so that a header claiming a huge content costs nothing)."""

    def __init__(self, frame_size: int, content_size: int, members):
        self.fs = frame_size
        self.members = members
        self.sizes = [m.size for m in members if not m.is_dir] if members is not None else [content_size]
        self.owner = [i for i, m in enumerate(members) if not m.is_dir] if members is not None else [None]
        self.starts, self.offsets = [], []
        i = off = 0
        for s in self.sizes:
            self.starts.append(i)
            self.offsets.append(off)
            i += -(-s // frame_size)
            off += s
        self.n, self.total = i, off

    def _piece(self, idx: int) -> tuple[int, int]:
        p = bisect.bisect_right(self.starts, idx) - 1
        return p, idx - self.starts[p]

    def raw_len(self, idx: int) -> int:
        p, k = self._piece(idx)
        return min(self.fs, self.sizes[p] - k * self.fs)

    def content_range(self, idx: int) -> tuple[int, int]:
        p, k = self._piece(idx)
        a = self.offsets[p] + k * self.fs
        return a, a + self.raw_len(idx)

    def member_range(self, idx: int) -> tuple[int | None, int, int]:
        """(member index or None, start, end) of the frame within its member."""
        p, k = self._piece(idx)
        return self.owner[p], k * self.fs, k * self.fs + self.raw_len(idx)

    def frames_of_member(self, mi: int) -> range:
        p = self.owner.index(mi)
        return range(self.starts[p], self.starts[p] + -(-self.sizes[p] // self.fs))

    def distinct_lengths(self) -> set:
        out = set()
        for s in self.sizes:
            if s >= self.fs:
                out.add(self.fs)
            if s % self.fs:
                out.add(s % self.fs)
        return out


def _layout(hints: Hints | None) -> Layout | None:
    """The frame layout the header describes, when its fields agree with each other."""
    if hints is None or not 1 <= hints.frame_size <= C.MAX_FRAME_RAW or not hints.members_readable:
        return None
    members = hints.members
    if members is not None and sum(m.size for m in members) != hints.content_size:
        return None
    if C.frame_count(hints.content_size, hints.frame_size, members) != hints.n_frames:
        return None
    return Layout(hints.frame_size, hints.content_size, members)


# -- finding records -----------------------------------------------------------------------
def _record(mv, pos: int):
    try:
        return C.read_record(mv, pos, -1)
    except DataError:
        return None


def _lenient_end(mv, pos: int):
    """Where a record at `pos` would end if its length fields are right (no CRC checked)."""
    try:
        _, p = C.read_uvarint(mv, pos, "")
        coded, p = C.read_uvarint(mv, p, "")
        _, p = C.read_uvarint(mv, p + 1, "")
    except DataError:
        return None
    e = p + 12 + coded
    return e if e <= len(mv) else None


def scan_records(mv, lo: int, hi: int, lengths: set | None = None) -> dict:
    """Every offset in [lo, hi) where a record head's CRC-32C checks: {offset: Frame}.
    With `lengths` (the raw lengths that can occur), only the offsets where one of them is
    written are tried."""
    lo = max(lo, 0)
    found = {}
    if lengths is not None and len(lengths) <= MAX_DISTINCT_FIND:
        data = bytes(mv[lo:hi])
        cands = set()
        for L in lengths:
            pat = C.uvarint(L)
            j = data.find(pat)
            while j >= 0:
                cands.add(lo + j)
                j = data.find(pat, j + 1)
        offsets = sorted(cands)
    else:
        offsets = B.head_offsets(mv, lo, hi, False)  # the cheap test, every offset at once
    for q in offsets:
        fr = _record(mv, q)
        if fr is not None:
            found[q] = fr
    return found


def _place(mv, first: int, lay: Layout, scan_from: int, whole: bool):
    """Frame number -> record: walk from the header's end, then place the records found by
    scanning. `whole`: the file is long enough to hold every frame (so the frame count is
    bounded by the file's size), and a chain of records that ends exactly at the end of
    the file holds the archive's last frames; only then are records also placed by their
    raw lengths, and only where exactly one place fits (bytes may have been deleted, so
    the room between records proves nothing). Returns (placed {index: Frame}, unplaced
    [Frame], bytes after the last frame)."""
    n = len(mv)
    placed = {}
    pos, i = first, 0
    while i < lay.n:
        fr = _record(mv, pos)
        if fr is None or fr.raw_len != lay.raw_len(i):
            break
        fr.index, fr.placed_by = i, "header"
        placed[i] = fr
        pos, i = B.record_end(fr), i + 1
    if i == lay.n:
        return placed, [], n - pos
    # Scan after the last record walked, or inside it when its coded bytes do not check
    # (bytes deleted there shift the next record into them).
    last = placed.get(i - 1)
    lo_scan = scan_from if last is None else (pos + 1 if B.intact(last) else last.payload_offset)
    heads = scan_records(mv, lo_scan, n, lay.distinct_lengths())
    used = set()
    if whole:
        k = {}  # offset -> records from there to the end of the file, when the chain ends exactly there
        for q in sorted(heads, reverse=True):
            e = B.record_end(heads[q])
            if e == n:
                k[q] = 1
            elif e in k:
                k[q] = k[e] + 1
        if k:  # the chain from the lowest such offset holds the last frames
            q, chain = min(k), []
            while q != n:
                chain.append(q)
                q = B.record_end(heads[q])
            base = lay.n - len(chain)
            if (base >= i
                    and all(heads[q].raw_len == lay.raw_len(base + j) for j, q in enumerate(chain))):
                for j, q in enumerate(chain):
                    heads[q].index, heads[q].placed_by = base + j, "end of file"
                    placed[base + j] = heads[q]
                    used.add(q)
    spans = sorted((f.offset, B.record_end(f)) for f in placed.values() if B.intact(f))

    def inside(q):  # a head inside a placed, intact record is its payload's bytes, not a record
        j = bisect.bisect_right(spans, (q, n + 1)) - 1
        return j >= 0 and spans[j][0] <= q < spans[j][1]

    rest = sorted(q for q in heads if q not in used and not inside(q))
    rest_set = set(rest)
    successors = {B.record_end(heads[q]) for q in rest}
    unplaced = []
    # Placed records by offset (frame numbers grow with offsets: every placement keeps it so).
    by_offset = sorted((f.offset, f.index, B.record_end(f)) for f in placed.values())
    work = [MAX_PATTERN_WORK]  # raw-length comparisons allowed in all: a hostile file cannot make this slow
    for s in [q for q in rest if q not in successors]:
        seg = [s]
        while B.record_end(heads[seg[-1]]) in rest_set and len(seg) <= len(rest):
            seg.append(B.record_end(heads[seg[-1]]))
        seg_end = B.record_end(heads[seg[-1]])
        k = bisect.bisect_left(by_offset, (s, -1, -1))
        lo = by_offset[k - 1][1] + 1 if k else 0  # the first frame number it may take
        gap_start = by_offset[k - 1][2] if k else first
        k2 = bisect.bisect_left(by_offset, (seg_end, -1, -1))
        hi = by_offset[k2][1] if k2 < len(by_offset) else lay.n  # frame numbers stop before this

        def fits(j, seg=seg, lo=lo, hi=hi):
            if not (lo <= j and j + len(seg) <= hi):
                return False
            for t, q in enumerate(seg):
                work[0] -= 1
                if j + t in placed or heads[q].raw_len != lay.raw_len(j + t):
                    return False
            return True

        where, how = [], "raw lengths"
        if _lenient_end(mv, gap_start) == s and gap_start < s and fits(lo + 1):
            where, how = [lo + 1], "damaged head before it"  # its length fields point exactly here
        elif whole and hi - lo <= MAX_PATTERN_SPAN:
            for j in range(lo, hi - len(seg) + 1):
                if work[0] <= 0:
                    where = []  # out of budget: the search is incomplete, so nothing is proven
                    break
                if fits(j):
                    where.append(j)
                    if len(where) > 1:
                        break
            if work[0] <= 0 and len(where) == 1:
                where = []
        if len(where) == 1:
            for t, q in enumerate(seg):
                heads[q].index, heads[q].placed_by = where[0] + t, how
                placed[where[0] + t] = heads[q]
                bisect.insort(by_offset, (q, where[0] + t, B.record_end(heads[q])))
        else:
            unplaced.extend(heads[q] for q in seg)
    return placed, unplaced, 0


# -- results -------------------------------------------------------------------------------
@dataclass
class FrameResult:
    index: int | None  # frame number; None for a record found whose place is unknown
    status: str  # "good", "damaged" (record found, content fails a check), "missing", "unplaced"
    reason: str = ""
    archive_range: tuple | None = None
    exact: bool = True  # archive_range is the record itself, not only the region it lies in
    data: bytes | None = field(default=None, repr=False)
    placed_by: str = ""  # "header" (walked from it), "end of file", "damaged head before it", "raw lengths"
    record: bool = False  # an image frame whose content is a pixel record (unpack rebuilds the file)


@dataclass
class MemberResult:
    path: str
    is_dir: bool
    size: int
    mode: int
    mtime_ns: int
    status: str  # "recovered" or "lost"
    reason: str = ""
    data: bytes | None = field(default=None, repr=False)  # the proven content (recovered)
    partial: bytes | None = field(default=None, repr=False)  # zero-filled content (lost, some frames good)
    zero_filled: list = field(default_factory=list)  # byte ranges of the member that are lost
    frames: tuple = ()
    written_as: str | None = None
    record: bool = False  # data is a pixel record: the file written is rebuilt from it


@dataclass
class Salvage:
    archive_bytes: int
    header: str  # "good", "damaged" or "unreadable"
    structure: str  # what the frames were placed by
    model_text: str
    layout: Layout | None
    frames: dict  # frame number -> FrameResult (records placed and frames missing)
    unplaced: list  # FrameResult: records found whose place is uncertain (not used)
    pieces: list  # no usable header: FrameResult per record found, in archive order
    problems: list
    names_checked: bool = True
    members: list | None = None
    content: bytes | None = field(default=None, repr=False)  # single-file archive: the proven content
    partial: bytes | None = field(default=None, repr=False)  # zero-filled content, or the good pieces joined
    zero_filled: list = field(default_factory=list)
    outputs: list = field(default_factory=list)
    cut_from: int = 0  # where the frames past the end of a cut archive would have begun
    content_record: bool = False  # the proven content is a pixel record (an image file is rebuilt)

    @property
    def ok(self) -> bool:
        return not self.problems

    def good_frames(self) -> int:
        return sum(1 for f in list(self.frames.values()) + self.pieces if f.status == "good")

    def report(self) -> dict:
        lay = self.layout
        damaged = []
        for i in sorted(self.frames):
            f = self.frames[i]
            if f.status == "good":
                continue
            e = {"frames": [i, i], "status": f.status, "reason": f.reason,
                 "archive_range": list(f.archive_range), "archive_range_exact": f.exact,
                 "content_range": list(lay.content_range(i))}
            mi, a, b = lay.member_range(i)
            if mi is not None:
                e["member"] = self.members[mi].path if self.members else lay.members[mi].path
                e["member_range"] = [a, b]
            prev = damaged[-1] if damaged else None
            if (prev and prev["frames"][1] == i - 1 and prev["status"] == e["status"] == "missing"
                    and prev["archive_range"] == e["archive_range"] and prev.get("member") == e.get("member")):
                prev["frames"][1] = i  # consecutive missing frames in one gap: one entry
                prev["content_range"][1] = e["content_range"][1]
                if "member_range" in prev:
                    prev["member_range"][1] = e["member_range"][1]
                prev["archive_range_exact"] = False
            else:
                damaged.append(e)
        if lay is not None and lay.n > len(self.frames):  # past the end of a cut archive: one entry
            first = len(self.frames)
            damaged.append({"frames": [first, lay.n - 1], "status": "missing",
                            "reason": "the archive ends before these frames",
                            "archive_range": [self.cut_from, self.archive_bytes], "archive_range_exact": False,
                            "content_range": [lay.content_range(first)[0], lay.total]})
        every = list(self.frames.values()) + self.pieces
        rep = {
            "ok": self.ok,
            "archive_bytes": self.archive_bytes,
            "header": self.header,
            "frames_placed_by": self.structure,
            "model": self.model_text,
            "frames": {"expected": lay.n if lay else None, "good": self.good_frames(),
                       "damaged": sum(1 for f in every if f.status == "damaged"),
                       "missing": (lay.n - len(self.frames) + sum(1 for f in self.frames.values()
                                                                   if f.status == "missing")) if lay else None,
                       "found_but_unplaced": len(self.unplaced)},
            "damaged_frames": damaged,
            # Records carry no frame number: one found by scanning is placed by the evidence
            # named here, and a record copied in from elsewhere would pass its own CRC-32C.
            "good_frames_placed_by_scanning": [
                {"frame": i, "placed_by": f.placed_by, "archive_range": list(f.archive_range)}
                for i, f in sorted(self.frames.items()) if f.status == "good" and f.placed_by != "header"],
            "unplaced_records": [{"archive_range": list(f.archive_range), "reason": f.reason} for f in self.unplaced],
            "problems": list(self.problems),
            "ranges": "half-open [start, end) byte offsets",
        }
        if self.members is not None:
            rep["names_checked"] = self.names_checked
            rep["members"] = {
                "recovered": [m.path + ("/" if m.is_dir else "") for m in self.members if m.status == "recovered"],
                "lost": [{"path": m.path, "reason": m.reason, "zero_filled": m.zero_filled,
                          "written_as": m.written_as} for m in self.members if m.status == "lost"],
            }
        elif lay is not None:
            rep["content"] = {"bytes": lay.total, "recovered": self.content is not None,
                              "zero_filled": self.zero_filled}
        if self.pieces:
            rep["pieces"] = [{"archive_range": list(f.archive_range), "status": f.status, "reason": f.reason,
                              "bytes": len(f.data) if f.data is not None else None} for f in self.pieces]
        rep["outputs"] = list(self.outputs)
        return rep


# -- analysis ------------------------------------------------------------------------------
def _choose_model(hints: Hints | None, header: str, model, problems: list):
    if header == "good":
        return for_identity(hints.identity, model), identity_text(hints.identity)  # as unpack does
    ident = hints.identity if hints is not None else None
    if ident is not None:
        try:
            return for_identity(ident, model), identity_text(ident) + " (named in the damaged header)"
        except ModelError:
            if model is None and "sha256" in ident:
                raise  # it needs a model file: ask for it
        except LcodecError:
            pass
    if model is not None:
        m = resolve(model)
        return m, identity_text(m.identity) + " (given; the header names no usable model)"
    problems.append("the header names no readable model: the built-in default was tried "
                    "(pass -m if the archive was made with a model file)")
    m = default_model()
    return m, identity_text(m.identity) + " (assumed)"


def _is_record(fr) -> bool:
    try:
        return image_guarantee(fr) == "pixel-exact"
    except DataError:
        return False


def _rebuilt(data: bytes, record: bool) -> bytes:
    """What to write for recovered content: a pixel record becomes its image file again."""
    if not record:
        return data
    try:
        return rebuild(data)
    except (ValueError, KeyError, TypeError):
        raise DataError("a recovered pixel record cannot be rebuilt into an image file") from None


def _decode(model, fr, progress, budget=None) -> tuple[bytes | None, str]:
    """(content, "") or (None, what is wrong). budget: [bytes of content the frames may
    still claim] (the output ceiling), or None for no ceiling; a frame whose claimed length
    passes it is not decoded. A version-1/2 frame has no sub-frame checks, so its claim is
    the work its decoding would take, whatever its coded bytes hold."""
    if budget is not None:
        if fr.raw_len > budget[0]:
            return None, f"claims {fr.raw_len:,} bytes, past the output ceiling's {budget[0]:,} left"
        budget[0] -= fr.raw_len
    try:
        return decode_record(model, fr), ""
    except DataError as e:
        msg = str(e)
        return None, msg[msg.find("(") + 1:-1] if msg.endswith(")") and "(" in msg else msg
    finally:
        if progress:
            progress(fr.raw_len)


def salvage(blob, model=None, progress=None, ceiling: int | None = None) -> Salvage:
    """Analyse a (possibly damaged) archive and decode every frame that can be; nothing is
    written. Raises DataError only when no part of an archive can be found (or an intact
    header is unusable), ModelError when the model it needs is missing or wrong (as
    unpack does). ceiling: at most this many bytes of content are decoded, over all frames
    (their claimed lengths; a frame past it is reported damaged, not decoded); None: no
    ceiling."""
    budget = None if ceiling is None else [int(ceiling)]
    mv = memoryview(blob)
    n = len(mv)
    problems = []
    hints = read_header_hints(mv)
    if hints is not None and hints.crc_ok and bytes(mv[:4]) == C.MAGIC and mv[4] not in C.SUPPORTED_VERSIONS:
        C.read_header(mv)  # an intact header of a version this lcodec does not know: say so
    header = "good" if hints is not None and hints.good else ("damaged" if hints is not None else "unreadable")
    lay = _layout(hints)
    if header == "good" and lay is None:
        raise DataError("header damaged (its sizes and frame count do not agree): nothing can be placed")
    if header == "damaged":
        problems.append("header damaged (its checksum does not match): its fields are used as hints only")
    m, model_text = _choose_model(hints, header, model, problems)
    frames, unplaced, pieces, structure = {}, [], [], ""
    heads3 = None  # every version-3 record head, when the scan below was made (kept for pieces_in_order)
    if hints is not None and hints.version in C.SUPPORTED_VERSIONS:
        bound = hints.version == C.VERSION_BOUND
    else:  # the version byte is unreadable: version-3 records say what they are
        heads3 = B.scan(mv, 0, n, None)
        bound = bool(heads3)
    min_rec = C.min_record(C.VERSION_BOUND if bound else 1)
    foreign = []
    if lay is not None:
        whole = lay.n <= (n - hints.end) // min_rec
        if bound:
            placed, foreign, unplaced_recs, trailing, _ = B.place(mv, hints.end, lay,
                                                                  hints.archive_id if header == "good" else None)
        else:
            placed, unplaced_recs, trailing = _place(mv, hints.end, lay, hints.end if header == "good" else 6, whole)
        if header == "damaged" and not placed and lay.n:
            lay = None  # the damaged header's layout fits no record: scan instead
        else:
            if trailing:
                problems.append(f"archive has {trailing} unexpected bytes after its last frame")
            structure = "header" if header == "good" else "damaged header, read without its checksum"
            if unplaced_recs or len(placed) < lay.n:
                structure += ", then records found by scanning"
            order = sorted(placed)
            top = order[-1] if order else -1
            tail = n - (B.record_end(placed[top]) if order else hints.end)
            limit = min(lay.n, top + 1 + max(tail, 0) // min_rec)  # the frames that can lie in the file
            if bound and order:
                limit = max(limit, top + 1)
            for i in range(limit):
                if i in placed:
                    fr = placed[i]
                    data, why = _decode(m, fr, progress, budget)
                    frames[i] = FrameResult(i, "good" if data is not None else "damaged", why,
                                            (fr.offset, B.record_end(fr)), True, data, fr.placed_by,
                                            data is not None and _is_record(fr))
                    continue
                j = bisect.bisect_left(order, i)
                a = B.record_end(placed[order[j - 1]]) if j > 0 else hints.end
                b = placed[order[j]].offset if j < len(order) else n
                lo = order[j - 1] if j > 0 else -1
                hi = order[j] if j < len(order) else lay.n
                frames[i] = FrameResult(i, "missing", "record not found (its head is damaged, or the archive "
                                        "is cut or shifted here)", (a, max(a, b)), hi - lo == 2 and b > a)
            why = ("record of {} raw bytes whose frame number does not fit the header, or that repeats a "
                   "frame; not used") if bound else "record of {} raw bytes whose frame number is uncertain; not used"
            unplaced = [FrameResult(None, "unplaced", why.format(f.raw_len), (f.offset, B.record_end(f)), True)
                        for f in unplaced_recs]
    if lay is None:  # no usable header: every record found, in archive order
        structure = "records found by scanning (no usable header)"
        if header == "unreadable":
            problems.insert(0, "header unreadable")
        if bound:  # by the frame numbers they carry, the records of the identity most carry
            mine, foreign, _ = B.pieces_in_order(mv, n, heads3)
            for fr in mine:
                fr.index = fr.number
                data, why = _decode(m, fr, progress, budget)
                pieces.append(FrameResult(fr.number, "good" if data is not None else "damaged", why,
                                          (fr.offset, B.record_end(fr)), True, data, "frame number"))
        heads = {} if bound else scan_records(mv, 0, n)
        q_end = -1
        for q in sorted(heads):
            if q < q_end:
                continue  # inside the record before: its payload's bytes
            fr = heads[q]
            fr.index = len(pieces)
            data, why = _decode(m, fr, progress, budget)
            pieces.append(FrameResult(None, "good" if data is not None else "damaged", why, (q, B.record_end(fr)), True, data))
            q_end = B.record_end(fr)
        if not pieces:
            raise DataError("not an lcodec archive, or too damaged: no header and no frame record could be found")
    res = Salvage(n, header, structure, model_text, lay, frames, unplaced, pieces, problems,
                  names_checked=header == "good")
    if lay is not None and frames:
        res.cut_from = max(f.archive_range[1] for f in frames.values())
    elif lay is not None:
        res.cut_from = min(hints.end, n)
    for f in list(frames.values()) + pieces:
        if f.status != "good":
            problems.append(f"frame {f.index if f.index is not None else '?'} {f.status}: {f.reason}")
    if unplaced:
        problems.append(f"{len(unplaced)} records found whose frame number is uncertain (not used)")
    if foreign:
        res.unplaced.extend(FrameResult(None, "unplaced", f"record of another archive (identity "
                                        f"{f.archive_id.hex()}, frame {f.number}); refused", (f.offset, B.record_end(f)), True)
                            for f in foreign)
        problems.append(f"{len(foreign)} records of another archive found and refused")
    if lay is not None and lay.n > len(frames):
        problems.append(f"frames {len(frames)}..{lay.n - 1} missing: the archive ends before them")
    if pieces:
        problems.append("no header to check the content against: nothing is proven good")
        res.partial = b"".join(f.data for f in pieces if f.data is not None)
        return res
    _assemble(res, hints)
    return res


def _zero_filled(res: Salvage, idxs: range, offset_of):
    """The frames `idxs` joined, bad ones zero-filled, up to the last frame that can lie in
    the file; (bytes or None when no frame is good, lost ranges, every frame good)."""
    have = range(idxs.start, min(idxs.stop, len(res.frames)))
    size = offset_of(have[-1])[1] if len(have) else 0
    buf = bytearray(size)
    zeros, any_good = [], False
    for i in have:
        a, b = offset_of(i)
        f = res.frames[i]
        if f.status == "good":
            buf[a:b] = f.data
            any_good = True
        elif zeros and zeros[-1][1] == a:
            zeros[-1][1] = b
        else:
            zeros.append([a, b])
    all_good = len(have) == len(idxs) and not zeros
    return (bytes(buf) if any_good or all_good else None), zeros, all_good


def _assemble(res: Salvage, hints: Hints) -> None:
    lay = res.layout
    if lay.members is None:
        data, zeros, all_good = _zero_filled(res, range(lay.n), lay.content_range)
        if all_good:
            if C.sha256(data) == hints.content_sha256:
                res.content = data
                res.content_record = lay.n == 1 and res.frames[0].record
                return
            res.problems.append("SHA-256 of the decoded content does not match the header: nothing is proven good "
                                "(every frame passed its CRC-32C)")
        elif lay.n > len(res.frames):
            zeros.append([lay.content_range(len(res.frames))[0], lay.total])
        res.partial, res.zero_filled = data, zeros
        return
    res.members, paths = [], set()
    for mi, mem in enumerate(lay.members):
        r = MemberResult(mem.path, mem.is_dir, mem.size, mem.mode, mem.mtime_ns, "lost")
        res.members.append(r)
        try:
            safe_member_path(mem.path)
            ok_path = mem.path not in paths
        except DataError:
            ok_path = False
        paths.add(mem.path)
        if not ok_path:
            r.reason = "member path unsafe or repeated; not written"
        elif mem.is_dir:
            if res.names_checked:
                r.status = "recovered"
                continue
            r.reason = "folder named in a damaged header; not created"
        else:
            idxs = lay.frames_of_member(mi)
            r.frames = (idxs.start, idxs.stop - 1) if len(idxs) else ()
            data, zeros, all_good = _zero_filled(res, idxs, lambda i: lay.member_range(i)[1:])
            if all_good and C.sha256(data) == mem.sha256:
                r.status, r.data = "recovered", data
                r.record = len(idxs) == 1 and res.frames[idxs.start].record
                continue
            if all_good:
                r.reason = "SHA-256 of the decoded bytes does not match (every frame passed its CRC-32C)"
            else:
                if idxs.stop > len(res.frames):  # past the end of a cut archive
                    cut = lay.member_range(len(res.frames))[1] if len(res.frames) >= idxs.start else 0
                    if zeros and zeros[-1][1] == cut:
                        zeros[-1][1] = mem.size
                    else:
                        zeros.append([cut, mem.size])
                r.reason = "frames damaged or missing (member bytes " + ", ".join(f"{a}..{b}" for a, b in zeros) + " lost)"
            r.partial, r.zero_filled = data, zeros
        res.problems.append(f"member {mem.path}: {r.reason}")
    # Never a file under a path another member holds as a file (the table is inconsistent).
    files = {r.path for r in res.members if not r.is_dir}
    for r in res.members:
        parts = r.path.split("/")
        if r.status == "recovered" and any("/".join(parts[:k]) in files for k in range(1, len(parts))):
            r.status, r.data, r.reason = "lost", None, "lies under a file member; not written"
            res.problems.append(f"member {r.path}: {r.reason}")
    if res.ok:
        whole = b"".join(r.data for r in res.members if not r.is_dir)
        if C.sha256(whole) != hints.content_sha256:
            res.problems.append("SHA-256 of the whole content does not match the header "
                                "(every member matches its own SHA-256)")


# -- writing ---------------------------------------------------------------------------------
def default_report_path(output: str) -> str:
    return os.path.normpath(output) + REPORT_SUFFIX


def salvage_to(blob, output: str, model=None, keep_damaged: bool = False, force: bool = False,
               report_path: str | None = None, archive_name: str | None = None, progress=None,
               ceiling: int | None = None) -> Salvage:
    """Salvage `blob` and write what is proven good: a single-file archive's content to
    `output` (only when every frame is good and the SHA-256 matches), a member archive's
    members into the folder `output` (each only when its SHA-256 matches). With
    keep_damaged, damaged content is also written, as NAME.lcodec-damaged, zero-filled
    where damaged. The report (JSON) goes to `report_path` (default OUTPUT.salvage.json),
    always. Every output is written atomically; none is overwritten unless force. ceiling:
    as salvage's."""
    report_path = report_path or default_report_path(output)
    damaged_path = os.path.normpath(output) + DAMAGED_SUFFIX
    for p in (output, report_path, damaged_path if keep_damaged else None):
        if p and os.path.lexists(p) and not force:
            raise UsageError(f"{p} exists; pass --force to overwrite it")
    res = salvage(blob, model, progress, ceiling)
    failed = None
    try:
        if res.members is not None:
            _write_members(res, output, keep_damaged)
        elif res.content is not None:
            atomic_write(output, _rebuilt(res.content, res.content_record), force=force)
            res.outputs.append(output)
        elif keep_damaged and res.partial is not None:
            atomic_write(damaged_path, res.partial, force=force)
            res.outputs.append(damaged_path)
    except LcodecError as e:  # e.g. a full disk: still try to leave the report
        failed = e
        res.problems.append(f"writing the output failed: {e}")
    res.outputs.append(report_path)
    rep = {**({"archive": archive_name} if archive_name else {}), **res.report()}
    try:
        atomic_write(report_path, _report_text(rep).encode("utf-8"), force=True)
    except LcodecError:
        if failed is None:
            raise
    if failed is not None:
        raise failed
    return res


def _report_text(rep: dict) -> str:
    """JSON, indented, with each [start, end] range on one line."""
    text = json.dumps(rep, indent=2, ensure_ascii=False)
    return re.sub(r"\[\s+(-?\d+),\s+(-?\d+)\s+\]", r"[\1, \2]", text) + "\n"


def _write_members(res: Salvage, out_dir: str, keep_damaged: bool) -> None:
    """Members into `out_dir` through a temporary folder renamed into place (or, into an
    existing folder with --force, file by file), as api.unpack_to_dir does."""

    todo = []  # (member result, path written, bytes, or None for a folder)
    taken = {r.path for r in res.members}
    for r in res.members:
        if r.status == "recovered":
            todo.append((r, r.path, None if r.is_dir else _rebuilt(r.data, r.record)))
        elif keep_damaged and not r.is_dir and r.partial is not None:
            if r.path + DAMAGED_SUFFIX in taken:  # a member of that name exists: never overwrite it
                r.reason += f"; not written as {r.path + DAMAGED_SUFFIX} (a member has that name)"
                continue
            r.written_as = r.path + DAMAGED_SUFFIX
            todo.append((r, r.written_as, r.partial))
    if not todo:
        return
    exists = os.path.lexists(out_dir)
    if exists and not os.path.isdir(out_dir):
        raise UsageError(f"{out_dir} exists and is not a folder")
    parent = os.path.dirname(os.path.abspath(out_dir))
    tmp = os.path.join(parent, f".{os.path.basename(os.path.abspath(out_dir))}.salvage-{os.getpid()}")
    folders = []
    try:
        os.makedirs(tmp)
        for r, rel_path, data in todo:
            target = os.path.join(tmp, safe_member_path(rel_path))
            if data is None:
                os.makedirs(target, exist_ok=True)
                folders.append(r)
                continue
            os.makedirs(os.path.dirname(target), exist_ok=True)
            with open(target, "wb") as f:
                f.write(data)
                f.flush()
                os.fsync(f.fileno())
            if res.names_checked and r.status == "recovered":  # modes and times only from an intact header
                os.chmod(target, r.mode & KEPT_MODE_BITS)
                if r.mtime_ns:
                    os.utime(target, ns=(r.mtime_ns, r.mtime_ns))
        raise_pending()  # a signal whose exception was lost (errors.raise_pending): no final name
        if not exists:
            os.rename(tmp, out_dir)
        else:  # --force into an existing folder: each file moved into place, never through a link
            for _, rel_path, _ in todo:
                _refuse_links(out_dir, rel_path)
            for _, rel_path, data in todo:
                dst = os.path.join(out_dir, safe_member_path(rel_path))
                if data is None:
                    os.makedirs(dst, exist_ok=True)
                    continue
                os.makedirs(os.path.dirname(dst), exist_ok=True)
                os.replace(os.path.join(tmp, safe_member_path(rel_path)), dst)
            _remove_quietly(tmp)
        if res.names_checked:  # folder modes and times last, deepest first
            apply_folder_modes(out_dir, folders)
    except OSError as e:
        _remove_quietly(tmp)
        raise UsageError(f"cannot write into {out_dir}: {e.strerror or e}") from None
    except BaseException:
        _remove_quietly(tmp)
        raise
    res.outputs.append(out_dir)


def summary(res: Salvage) -> list[str]:
    """A few lines for the terminal."""
    lines = []
    if res.members is not None:
        files = [r for r in res.members if not r.is_dir]
        good = [r for r in files if r.status == "recovered"]
        lines.append(f"salvage: {len(good)} of {len(files)} files recovered exactly (SHA-256 checked)"
                     + ("" if res.names_checked else "; the header is damaged, so their names are unchecked "
                        "and modes and times were not restored"))
    elif res.layout is not None:
        lines.append("salvage: content recovered exactly (SHA-256 checked)" if res.content is not None
                     else f"salvage: content damaged ({res.good_frames()} of {res.layout.n} frames good)")
    else:
        lines.append(f"salvage: no usable header; {res.good_frames()} of {len(res.pieces)} records found "
                     "decode (where they belong in the content is unknown)")
    for p in res.problems[:10]:
        lines.append(f"  {p}")
    if len(res.problems) > 10:
        lines.append(f"  ... and {len(res.problems) - 10} more (see the report)")
    lines.extend(f"  wrote {p}" for p in res.outputs)
    return lines
