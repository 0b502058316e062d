"""Container format (versions 1, 2 and 3): byte layout, writer and a validating reader.

The layout is documented byte by byte in docs/FORMAT.md; keep the two in step (the
format-change rules are in DEVELOPERS.md). Fixed-width integers are little-endian;
variable-width ones are unsigned LEB128 ("varint"), at most 8 bytes.

The reader never trusts a length: every size is checked against the bytes really
present and against the format's own caps before anything is allocated or decoded.
"""
from __future__ import annotations

import hashlib
import json
import struct
from dataclasses import dataclass, field

import crc32c as _crc32c

from ..errors import DataError

MAGIC = b"\x9blc\n"
VERSION = 1  # written when the model identity is JSON
VERSION_COMPACT = 2  # the same layout, the identity of a model file in binary (docs/FORMAT.md)
VERSION_BOUND = 3  # records carry their frame number and the archive's identity; sub-frame checks
SUPPORTED_VERSIONS = (1, 2, 3)
IDENT_MODEL_FILE = 1  # version-2 identity kind: SHA-256 of a model file, then its architecture's name
MAX_MODEL_NAME = 64

FLAG_MEMBERS = 0x01  # a member table is present (several files / a folder)

METHOD_STORED = 0
METHOD_QUEUE = 1  # modelled, constriction range coder
METHOD_STACK = 2  # modelled, constriction ANS coder
METHOD_IMAGE = 3  # an image's content, coded by a pixel model (docs/FORMAT.md, "Image frames")
METHOD_NAMES = {METHOD_STORED: "stored", METHOD_QUEUE: "modelled/queue", METHOD_STACK: "modelled/stack",
                METHOD_IMAGE: "modelled/image"}

MAX_FRAME_RAW = 1 << 26  # 64 MiB: the most raw bytes one frame may claim
MAX_CONTENT = 1 << 50
MAX_LANES = 4096
MAX_IDENTITY = 1 << 16  # model identity JSON
MAX_MEMBER_TABLE = 1 << 28
MAX_PATH = 4096
MIN_RECORD = 16  # smallest frame record: 3 one-byte varints, method, three CRCs
MIN_RECORD_V3 = 25  # version 3: the archive identity (8) and a one-byte frame number more
ARCHIVE_ID_BYTES = 8
_ID_DOMAIN = b"lcodec archive identity v3\0"
_MEMBER = struct.Struct("<IQ32sq")  # mode, size, SHA-256, mtime_ns (after u16 len + path)


def uvarint(n: int) -> bytes:
    """Unsigned LEB128: 7 bits a byte, low bits first, high bit set on all but the last."""
    out = bytearray()
    while True:
        b = n & 0x7F
        n >>= 7
        if n:
            out.append(b | 0x80)
        else:
            out.append(b)
            return bytes(out)


def read_uvarint(mv, pos: int, what: str) -> tuple[int, int]:
    """(value, next position); at most 8 bytes (values below 2**56)."""
    val = 0
    for i in range(8):
        if pos + i >= len(mv):
            raise DataError(f"archive truncated inside {what}")
        b = mv[pos + i]
        val |= (b & 0x7F) << (7 * i)
        if not b & 0x80:
            return val, pos + i + 1
    raise DataError(f"{what} damaged (overlong number)")


def crc32c(data) -> int:
    return _crc32c.crc32c(data)


@dataclass
class Member:
    path: str  # relative, '/'-separated
    mode: int  # st_mode: file type bits and permissions
    size: int
    sha256: bytes
    mtime_ns: int = 0

    @property
    def is_dir(self) -> bool:
        return (self.mode & 0o170000) == 0o040000


@dataclass
class Frame:
    index: int
    offset: int  # of the record in the file
    payload_offset: int  # of the coded bytes in the file (the record head lies between)
    raw_len: int
    coded_len: int
    method: int
    lanes: int
    raw_crc: int
    coded_crc: int  # CRC-32C of the coded bytes: damage is caught before decoding
    payload: memoryview = field(repr=False)
    checks: bool = False  # version 3: the coded words carry sub-frame checks (docs/FORMAT.md)
    number: int | None = None  # version 3: the frame number the record carries
    archive_id: bytes | None = None  # version 3: the identity of the archive it was written for


@dataclass
class Container:
    version: int
    flags: int
    content_size: int
    content_sha256: bytes
    frame_size: int
    identity: dict
    members: list[Member] | None
    frames: list[Frame]
    file_size: int
    spans: dict  # byte ranges of the header CRC, identity and member table (for tools and tests)
    archive_id: bytes | None = None  # version 3: what every record must carry

    @property
    def coded_bytes(self) -> int:
        return self.file_size


# -- writer -------------------------------------------------------------------------------
def encode_members(members: list[Member]) -> bytes:
    out = [struct.pack("<I", len(members))]
    for m in members:
        p = m.path.encode("utf-8")
        out.append(struct.pack("<H", len(p)) + p + _MEMBER.pack(m.mode, m.size, m.sha256, m.mtime_ns))
    return b"".join(out)


def frame_record(raw_len: int, coded: bytes, method: int, lanes: int, raw_crc: int) -> bytes:
    head = (uvarint(raw_len) + uvarint(len(coded)) + bytes([method]) + uvarint(lanes)
            + struct.pack("<II", raw_crc, crc32c(coded)))
    return head + struct.pack("<I", crc32c(head)) + coded


def seal_record(record: bytes, number: int, archive_id: bytes) -> bytes:
    """A record as frame_record makes it (the version-1 form) -> the version-3 record of
    frame `number` of the archive `archive_id` (its head rewritten, its coded bytes kept)."""
    fr = read_record(memoryview(record), 0, number)
    head = (archive_id + uvarint(number) + uvarint(fr.raw_len) + uvarint(fr.coded_len) + bytes([fr.method])
            + uvarint(fr.lanes) + struct.pack("<II", fr.raw_crc, fr.coded_crc))
    return head + struct.pack("<I", crc32c(head)) + record[fr.payload_offset:]


def archive_id(checked: bytes) -> bytes:
    """The version-3 archive identity: the first 8 bytes of SHA-256 over a domain string and
    every byte the header CRC-32C covers (so it names the sizes, the content's SHA-256, the
    model and the member table)."""
    return hashlib.sha256(_ID_DOMAIN + checked).digest()[:ARCHIVE_ID_BYTES]


def _compact_identity(identity: dict) -> bytes | None:
    """The version-2 form of a model-file identity {"model", "sha256"}, or None when the
    identity holds anything else (then it is written as JSON, version 1)."""
    if set(identity) != {"model", "sha256"}:
        return None
    name, sha = identity["model"], identity["sha256"]
    if not (isinstance(name, str) and isinstance(sha, str) and len(sha) == 64
            and all(c in "0123456789abcdef" for c in sha)):
        return None
    raw = name.encode("utf-8")
    if not 1 <= len(raw) <= MAX_MODEL_NAME or not name.isprintable():
        return None
    return bytes([IDENT_MODEL_FILE]) + bytes.fromhex(sha) + raw


def encode_identity(identity: dict) -> tuple[int, bytes]:
    """(format version, identity bytes): compact binary for a model file's SHA-256 (60 bytes
    smaller, which counts when small files are packed one per archive), JSON otherwise."""
    compact = _compact_identity(identity)
    if compact is not None:
        return VERSION_COMPACT, compact
    return VERSION, json.dumps(identity, sort_keys=True, separators=(",", ":")).encode("utf-8")


MAX_IDENTITY_DEPTH = 16  # nesting of a JSON model identity; lcodec writes at most 3 (a list of lists in params)


def _json_depth(text: str) -> int:
    """The deepest nesting of [ and { in JSON text, brackets inside strings not counted."""
    depth = top = 0
    in_str = esc = False
    for ch in text:
        if in_str:
            if esc:
                esc = False
            elif ch == "\\":
                esc = True
            elif ch == '"':
                in_str = False
        elif ch == '"':
            in_str = True
        elif ch in "[{":
            depth += 1
            top = max(top, depth)
        elif ch in "]}":
            depth -= 1
    return top


def decode_identity(version: int, raw: bytes) -> dict:
    if version == VERSION_BOUND:  # either form, told apart by the first byte ("{" or the kind)
        version = VERSION_COMPACT if raw[:1] == bytes([IDENT_MODEL_FILE]) else VERSION
    if version == VERSION_COMPACT:
        _need(len(raw) >= 34 and raw[0] == IDENT_MODEL_FILE, "header damaged (model identity is not readable)")
        try:
            name = raw[33:].decode("utf-8")
        except UnicodeDecodeError:
            raise DataError("header damaged (model identity is not readable)") from None
        _need(len(raw) - 33 <= MAX_MODEL_NAME and name.isprintable(), "header damaged (model identity is not readable)")
        return {"model": name, "sha256": raw[1:33].hex()}
    try:
        text = raw.decode("utf-8")
        # nesting refused by an explicit limit, not by the interpreter's recursion limit
        # (which other code in the process may raise: the answer must not depend on it)
        _need(_json_depth(text) <= MAX_IDENTITY_DEPTH, "header damaged (model identity is not readable)")
        identity = json.loads(text)
    except (UnicodeDecodeError, ValueError, RecursionError):
        raise DataError("header damaged (model identity is not readable)") from None
    _need(isinstance(identity, dict) and isinstance(identity.get("model"), str), "header damaged (no model identity)")
    return identity


def header_bytes(content_size: int, content_sha256: bytes, n_frames: int, frame_size: int,
                 identity: dict, members: list[Member] | None, bound: bool = False) -> bytes:
    """The header. bound=False writes version 1 or 2 (as lcodec did before version 3, kept
    for tests of old archives); lcodec writes version 3 (bound=True), whose records must
    then be sealed (seal_record) with header_id() of these bytes."""
    version, ident = encode_identity(identity)
    if bound:
        version = VERSION_BOUND
    table = encode_members(members) if members is not None else b""
    flags = FLAG_MEMBERS if members is not None else 0
    head = (MAGIC + bytes([version, flags]) + uvarint(content_size) + content_sha256 + uvarint(n_frames)
            + uvarint(frame_size) + uvarint(len(ident)) + uvarint(len(table)))
    return head + struct.pack("<I", crc32c(head + ident + table)) + ident + table


def header_id(header: bytes) -> bytes | None:
    """The archive identity of a version-3 header (None for versions 1 and 2)."""
    h, _ = read_header(header, whole=False)
    return h["archive_id"]


def build_archive(content_size: int, content_sha256: bytes, frame_size: int, identity: dict,
                  members: list[Member] | None, records: list[bytes]) -> bytes:
    """A version-3 archive from frame_record()s (for tools and tests)."""
    head = header_bytes(content_size, content_sha256, len(records), frame_size, identity, members, bound=True)
    aid = header_id(head)
    return head + b"".join(seal_record(r, i, aid) for i, r in enumerate(records))


# -- reader -------------------------------------------------------------------------------
def _need(cond: bool, msg: str):
    if not cond:
        raise DataError(msg)


def min_record(version: int) -> int:
    return MIN_RECORD_V3 if version >= VERSION_BOUND else MIN_RECORD


def read_header(buf, whole: bool = True) -> tuple[dict, int]:
    """Parse and check the header; returns (fields, offset of the first frame record).
    whole=False: `buf` is the header alone (the frame count is not checked against it)."""
    mv = memoryview(buf)
    n = len(mv)
    _need(n >= 4 and bytes(mv[:4]) == MAGIC, "not an lcodec archive (magic bytes do not match)")
    _need(n >= 6, "archive truncated inside its header")
    version, flags = mv[4], mv[5]
    if version not in SUPPORTED_VERSIONS:
        raise DataError(f"unsupported format version {version} (this lcodec reads version "
                        f"{', '.join(map(str, SUPPORTED_VERSIONS))}); a newer lcodec may read it")
    size, pos = read_uvarint(mv, 6, "the header")
    _need(pos + 32 <= n, "archive truncated inside its header")
    sha = bytes(mv[pos:pos + 32])
    n_frames, pos = read_uvarint(mv, pos + 32, "the header")
    frame_size, pos = read_uvarint(mv, pos, "the header")
    ilen, pos = read_uvarint(mv, pos, "the header")
    tlen, pos = read_uvarint(mv, pos, "the header")
    _need(ilen <= MAX_IDENTITY and tlen <= MAX_MEMBER_TABLE and size <= MAX_CONTENT,
          "header damaged (impossible field lengths)")
    end = pos + 4 + ilen + tlen
    _need(end <= n, "archive truncated inside its header")
    hcrc = struct.unpack_from("<I", mv, pos)[0]
    _need(crc32c(bytes(mv[:pos]) + bytes(mv[pos + 4:end])) == hcrc, "header damaged (header checksum does not match)")
    _need(flags & ~FLAG_MEMBERS == 0, "header damaged (unknown flags)")
    _need(1 <= frame_size <= MAX_FRAME_RAW, "header damaged (bad frame size)")
    _need(version != VERSION_BOUND or ilen >= 1, "header damaged (no model identity)")
    identity = decode_identity(version, bytes(mv[pos + 4:pos + 4 + ilen]))
    members = None
    if flags & FLAG_MEMBERS:
        members = _read_members(mv[pos + 4 + ilen:end])
    else:
        _need(tlen == 0, "header damaged (member table without its flag)")
    # Each frame record takes at least MIN_RECORD bytes, which bounds n_frames by the file size.
    _need(not whole or n_frames <= (n - end) // min_record(version),
          "archive truncated: fewer bytes than its frames need")
    spans = {"crc": (pos, pos + 4), "identity": (pos + 4, pos + 4 + ilen), "members": (pos + 4 + ilen, end)}
    aid = archive_id(bytes(mv[:pos]) + bytes(mv[pos + 4:end])) if version >= VERSION_BOUND else None
    return dict(version=version, flags=flags, content_size=size, content_sha256=sha, n_frames=n_frames,
                frame_size=frame_size, identity=identity, members=members, spans=spans, archive_id=aid), end


def _read_members(mv) -> list[Member]:
    n = len(mv)
    _need(n >= 4, "member table damaged")
    count = struct.unpack_from("<I", mv, 0)[0]
    _need(count <= (n - 4) // (2 + _MEMBER.size), "member table damaged (impossible member count)")
    pos, out = 4, []
    for _ in range(count):
        _need(pos + 2 <= n, "member table damaged")
        plen = struct.unpack_from("<H", mv, pos)[0]
        pos += 2
        _need(0 < plen <= MAX_PATH and pos + plen + _MEMBER.size <= n, "member table damaged")
        try:
            path = bytes(mv[pos:pos + plen]).decode("utf-8")
        except UnicodeDecodeError:
            raise DataError("member table damaged (path is not UTF-8)") from None
        pos += plen
        mode, size, sha, mtime = _MEMBER.unpack_from(mv, pos)
        pos += _MEMBER.size
        kind = mode & 0o170000
        _need(kind in (0o100000, 0o040000), f"member table damaged ({path!r} is neither a file nor a folder)")
        _need(kind == 0o100000 or size == 0, f"member table damaged (folder {path!r} has a size)")
        out.append(Member(path, mode, size, sha, mtime))
    _need(pos == n, "member table damaged (trailing bytes)")
    return out


def frame_count(content_size: int, frame_size: int, members: list[Member] | None) -> int:
    """How many frames the sizes imply (computed without listing them)."""
    sizes = [m.size for m in members if not m.is_dir] if members is not None else [content_size]
    return sum(-(-s // frame_size) for s in sizes)


def expected_frame_sizes(content_size: int, frame_size: int, members: list[Member] | None) -> list[int]:
    """Raw length of every frame: members start on a frame boundary; empty ones have none.
    Check frame_count() against the frames really present first: the list is that long."""
    sizes = [m.size for m in members if not m.is_dir] if members is not None else [content_size]
    out = []
    for s in sizes:
        full, rest = divmod(s, frame_size)
        out.extend([frame_size] * full + ([rest] if rest else []))
    return out


def read_record(mv, pos: int, index: int, where: str | None = None, version: int = VERSION,
                archive: bytes | None = None) -> Frame:
    """Parse and check the frame record at `pos` on its own (record CRC-32C, method, lanes,
    stored length, coded bytes within the file); the caller checks the raw length it
    expects. Raises DataError. Also used to find records by scanning (lcodec.salvage).
    Version 3: the record's archive identity must be `archive` (when given) and its frame
    number `index` (when index >= 0)."""
    where = where or f"frame {index}"
    start = pos
    number = aid = None
    if version >= VERSION_BOUND:
        _need(pos + ARCHIVE_ID_BYTES <= len(mv), f"archive truncated at {where}")
        aid = bytes(mv[pos:pos + ARCHIVE_ID_BYTES])
        number, pos = read_uvarint(mv, pos + ARCHIVE_ID_BYTES, where)
    raw_len, pos = read_uvarint(mv, pos, where)
    coded_len, pos = read_uvarint(mv, pos, where)
    _need(pos + 1 <= len(mv), f"archive truncated at {where}")
    method = mv[pos]
    lanes, pos = read_uvarint(mv, pos + 1, where)
    _need(pos + 12 <= len(mv), f"archive truncated at {where}")
    raw_crc, coded_crc, rcrc = struct.unpack_from("<III", mv, pos)
    _need(crc32c(bytes(mv[start:pos + 8])) == rcrc, f"frame {index} damaged (record checksum does not match)")
    _need(method in METHOD_NAMES and raw_len <= MAX_FRAME_RAW, f"frame {index} damaged (impossible record)")
    if version >= VERSION_BOUND:
        # no lcodec writes ANS (stack) records in version 3: they would carry no sub-frame checks
        _need(method != METHOD_STACK, f"frame {index} damaged (impossible record)")
        _need(archive is None or aid == archive,
              f"frame {index} refused: its record belongs to another archive (archive identity "
              f"{aid.hex()}, this archive is {archive.hex() if archive else '?'})")
        _need(index < 0 or number == index, f"frame {index} refused: its record says it is frame {number}")
    _need(1 <= lanes <= min(MAX_LANES, max(raw_len, 1)), f"frame {index} damaged (bad lane count)")
    if method == METHOD_STORED:
        _need(coded_len == raw_len, f"frame {index} damaged (stored frame length)")
    pos += 12
    _need(pos + coded_len <= len(mv), f"archive truncated at {where}")
    return Frame(index, start, pos, raw_len, coded_len, method, lanes, raw_crc, coded_crc, mv[pos:pos + coded_len],
                 version >= VERSION_BOUND, number, aid)


def read_container(buf) -> Container:
    """Parse and check everything but the payloads' content. Raises DataError."""
    mv = memoryview(buf)
    h, pos = read_header(mv)
    members = h["members"]
    if members is not None:
        _need(sum(m.size for m in members) == h["content_size"], "header damaged (member sizes do not add up)")
    # Count before listing: a header claiming 2**50 bytes in frames of 1 byte must not
    # make a list of 2**50 sizes (n_frames is already bounded by the file size).
    _need(frame_count(h["content_size"], h["frame_size"], members) == h["n_frames"],
          "header damaged (frame count does not match the sizes)")
    expect = expected_frame_sizes(h["content_size"], h["frame_size"], members)
    frames = []
    for i, want in enumerate(expect):
        fr = read_record(mv, pos, i, f"frame {i} (of {len(expect)})", h["version"], h["archive_id"])
        _need(fr.raw_len == want, f"frame {i} damaged (impossible record)")
        frames.append(fr)
        pos = fr.payload_offset + fr.coded_len
    _need(pos == len(mv), f"archive has {len(mv) - pos} unexpected bytes after its last frame")
    return Container(h["version"], h["flags"], h["content_size"], h["content_sha256"], h["frame_size"],
                     h["identity"], members, frames, len(mv), h["spans"], h["archive_id"])


def sha256(data) -> bytes:
    return hashlib.sha256(data).digest()
