"""Image inputs: find the pixel region of a file, or turn it into a pixel record.

`analyse(data)` returns an `ImageInfo` (or None: not an image lcodec models; its bytes are
coded as bytes):

* byte-exact inputs (PGM/PPM P5/P6, NPY, uncompressed TIFF, uncompressed DICOM): the
  content is the file's own bytes; the layout names where its samples lie. Everything
  else (headers, metadata, other pages, trailing bytes) is coded as bytes.
* pixel-exact inputs (PNG, single-page compressed TIFF): the content is a *pixel record* (docs/FORMAT.md): a small
  header naming the source format, the file's metadata chunks kept as they were, then
  the samples. Unpack writes an equivalent file (`rebuild`): the same pixels and
  metadata chunks, with its own compressed stream.
"""
from __future__ import annotations

import io
import json
import re
import struct
import zlib
from dataclasses import dataclass

import numpy as np

from ..models.tessel_common import FLAG_BIG_ENDIAN, FLAG_SIGNED, MAX_SAMPLES
from .layout import FLAG_RECORD, Layout
from .pngfilter import _unfilter

RECORD_MAGIC = b"\x9blcpix\r\n"  # pixel record (pixel-exact content)
PNG_SIG = b"\x89PNG\r\n\x1a\n"
BYTE_EXACT, PIXEL_EXACT = "byte-exact", "pixel-exact"


@dataclass
class ImageInfo:
    kind: str  # pgm, ppm, npy, tiff, dicom, png
    guarantee: str  # BYTE_EXACT or PIXEL_EXACT
    content: bytes  # what the container holds
    layout: Layout
    note: str = ""


def analyse(data: bytes) -> ImageInfo | None:
    """The image layout of a file's bytes, or None (code it as bytes)."""
    try:
        if data[:2] in (b"P5", b"P6"):
            return _pnm(data)
        if data[:6] == b"\x93NUMPY":
            return _npy(data)
        if len(data) > 132 and data[128:132] == b"DICM":  # before TIFF: a preamble may hold a TIFF header
            return _dicom(data)
        if data[:4] in (b"II*\x00", b"MM\x00*"):
            return _tiff(data)
        if data[:8] == PNG_SIG:
            return _png(data)
    except Exception:  # an unreadable or unusual file is coded as bytes, never refused
        return None
    return None


def _fits(lay: Layout, n: int) -> Layout | None:
    try:
        lay.check(n)
    except ValueError:
        return None
    return lay


# -- PGM / PPM (binary) --------------------------------------------------------------------
_PNM_HEAD = re.compile(rb"P([56])((?:\s|#[^\n\r]*[\n\r])+)(\d+)((?:\s|#[^\n\r]*[\n\r])+)(\d+)"
                       rb"((?:\s|#[^\n\r]*[\n\r])+)(\d+)\s")


def _pnm(data):
    m = _PNM_HEAD.match(data)
    if not m:
        return None
    w, h, maxval = int(m.group(3)), int(m.group(5)), int(m.group(7))
    if not 1 <= maxval <= 65535:
        return None
    ch = 1 if m.group(1) == b"5" else 3
    bps = 1 if maxval < 256 else 2
    lay = _fits(Layout(m.end(), h, w, ch, bps, FLAG_BIG_ENDIAN if bps == 2 else 0), len(data))
    return lay and ImageInfo("pgm" if ch == 1 else "ppm", BYTE_EXACT, data, lay)


# -- NPY -----------------------------------------------------------------------------------
def _npy(data):
    import numpy.lib.format as F

    f = io.BytesIO(data)
    version = F.read_magic(f)
    if version == (1, 0):
        shape, fortran, dtype = F.read_array_header_1_0(f)
    elif version in ((2, 0), (3, 0)):
        shape, fortran, dtype = F.read_array_header_2_0(f)
    else:
        return None
    if dtype.kind not in "ui" or dtype.itemsize not in (1, 2) or len(shape) < 2 or 0 in shape:
        return None
    if fortran:
        if len(shape) != 2:
            return None
        rows, cols, ch = shape[1], shape[0], 1
    elif len(shape) == 3 and 1 <= shape[2] <= 4:
        rows, cols, ch = shape
    else:
        rows, cols, ch = int(np.prod(shape[:-1])), shape[-1], 1
    flags = 0
    if dtype.itemsize == 2:
        flags = (FLAG_BIG_ENDIAN if dtype.byteorder == ">" else 0) | (FLAG_SIGNED if dtype.kind == "i" else 0)
    lay = _fits(Layout(f.tell(), rows, cols, ch, dtype.itemsize, flags), len(data))
    return lay and ImageInfo("npy", BYTE_EXACT, data, lay)


# -- TIFF (uncompressed, samples in one contiguous run) ---------------------------------------
def _tiff(data, check: bool = True):
    import tifffile

    with tifffile.TiffFile(io.BytesIO(data)) as tif:
        page = tif.pages[0]
        if page.compression != 1:
            return _tiff_record(tif, page, check) if len(tif.pages) == 1 else None
        spp = page.samplesperpixel
        if spp > 1 and page.planarconfig != 1:
            return None
        dt = np.dtype(page.dtype)
        if dt.kind not in "ui" or dt.itemsize not in (1, 2) or page.bitspersample not in (8, 16):
            return None
        offs, counts = page.dataoffsets, page.databytecounts
        if not offs or any(offs[i + 1] != offs[i] + counts[i] for i in range(len(offs) - 1)):
            return None
        off, count = offs[0], sum(counts)
        rows, cols = page.imagelength, page.imagewidth
        if page.imagedepth != 1 or rows * cols * spp * dt.itemsize != count:
            return None
        flags = 0
        if dt.itemsize == 2:
            flags = (FLAG_BIG_ENDIAN if tif.byteorder == ">" else 0) | (FLAG_SIGNED if dt.kind == "i" else 0)
        lay = _fits(Layout(off, rows, cols, spp, dt.itemsize, flags), len(data))
        return lay and ImageInfo("tiff", BYTE_EXACT, data, lay)


# compressed TIFF: a pixel record (samples, structure and every other tag, kept as values)
TIFF_STRUCTURE = {256, 257, 258, 259, 262, 273, 277, 278, 279, 284, 317, 322, 323, 324, 325, 339,
                  282, 283, 296}  # written by the TIFF writer itself (282, 283, 296: resolution)
TIFF_LOSSLESS = {5, 8, 32773, 32946, 34925, 50000}  # LZW, deflate, PackBits, deflate, LZMA, Zstandard


def _tag_value(v):
    if isinstance(v, str):
        return {"s": v}
    if isinstance(v, bytes):
        return {"b": v.hex()}
    if isinstance(v, (int, float)) or hasattr(v, "__int__") and not isinstance(v, (tuple, list)):
        return {"n": [int(v) if float(v) == int(v) else float(v)]}
    if isinstance(v, (tuple, list)) and all(isinstance(x, (int, float)) for x in v):
        return {"n": [x for x in v]}
    raise ValueError("tag value lcodec does not keep")


def _tiff_record(tif, page, check: bool = True):
    spp = page.samplesperpixel
    dt = np.dtype(page.dtype)
    if dt.kind not in "ui" or dt.itemsize not in (1, 2) or page.bitspersample not in (8, 16) or spp > 4:
        return None
    if page.imagedepth != 1:
        return None
    # before anything is decoded or allocated: the size the header claims, and every strip
    # or tile inside the file (a hostile header may claim 100,000 x 100,000 samples)
    if page.imagelength * page.imagewidth * spp > MAX_SAMPLES:
        return None
    size = tif.filehandle.size
    offs, counts = page.dataoffsets, page.databytecounts
    if not offs or len(offs) != len(counts) or any(o < 0 or c < 0 or o + c > size for o, c in zip(offs, counts)):
        return None
    a = page.asarray()
    if spp > 1 and page.planarconfig == 2:
        a = np.moveaxis(a, 0, -1)
    a = a.reshape(page.imagelength, page.imagewidth, spp)
    tags, seen = [], set()
    for t in page.tags.values():
        if t.code in TIFF_STRUCTURE or t.code in seen:
            continue
        seen.add(t.code)
        tags.append([t.code, int(t.dtype), int(t.count), _tag_value(t.value)])
    res = page.tags.get(282), page.tags.get(283), page.tags.get(296)
    meta = {"format": "tiff", "compression": int(page.compression), "photometric": int(page.photometric),
            "predictor": int(page.predictor), "planarconfig": int(page.planarconfig), "byteorder": tif.byteorder,
            "sample_dtype": dt.str.lstrip("<>|="), "tags": tags,
            "resolution": [list(res[0].value), list(res[1].value)] if res[0] and res[1] else None,
            "resolutionunit": int(res[2].value) if res[2] else None}
    samples = a.view(np.uint16) if dt.itemsize == 2 else a.view(np.uint8)
    content = make_record(meta, b"", np.ascontiguousarray(samples))
    if check:  # the file unpack will write must give back this very record, else: bytes
        again = _tiff(rebuild(content), check=False)
        if again is None or again.content != content:
            return None
    return _record_info(content)


def _tiff_rebuild(meta, pix) -> bytes:
    import tifffile

    dt = np.dtype(meta["sample_dtype"])
    a = pix.astype(np.uint16).view(dt) if dt.itemsize == 2 else pix.astype(np.uint8).view(dt)
    if a.shape[2] == 1:
        a = a[:, :, 0]
    planar = None
    if pix.shape[2] > 1:
        planar = "separate" if meta["planarconfig"] == 2 else "contig"
        if planar == "separate":
            a = np.moveaxis(a, -1, 0)
    extratags = []
    for code, dtype, count, v in meta["tags"]:
        val = v.get("s", v.get("n"))
        if "b" in v:
            val = bytes.fromhex(v["b"])
        elif "n" in v and len(val) == 1:
            val = val[0]
        elif "n" in v:
            val = tuple(val)
        extratags.append((code, dtype, count, val, True))
    comp = meta["compression"] if meta["compression"] in TIFF_LOSSLESS else 8
    kw = {}
    if meta["resolution"]:
        kw["resolution"] = tuple(tuple(x) for x in meta["resolution"])
        if meta["resolutionunit"] is not None:
            kw["resolutionunit"] = meta["resolutionunit"]
    buf = io.BytesIO()
    tifffile.imwrite(buf, a, photometric=meta["photometric"], compression=comp,
                     predictor=meta["predictor"] if meta["predictor"] > 1 else None, planarconfig=planar,
                     byteorder=meta["byteorder"], metadata=None, software=False, extratags=extratags, **kw)
    return buf.getvalue()


# -- DICOM (uncompressed transfer syntaxes) --------------------------------------------------
def _dicom(data):
    import pydicom
    from pydicom.uid import ExplicitVRBigEndian, ExplicitVRLittleEndian, ImplicitVRLittleEndian

    ds = pydicom.dcmread(io.BytesIO(data))
    ts = ds.file_meta.TransferSyntaxUID
    if ts not in (ExplicitVRLittleEndian, ImplicitVRLittleEndian, ExplicitVRBigEndian) or "PixelData" not in ds:
        return None
    bits, spp = int(ds.BitsAllocated), int(getattr(ds, "SamplesPerPixel", 1))
    if bits not in (8, 16) or spp not in (1, 3):
        return None
    rows, cols = int(ds.Rows), int(ds.Columns)
    frames = int(getattr(ds, "NumberOfFrames", 1) or 1)
    bps = bits // 8
    n = rows * cols * frames * spp * bps
    if n > len(data) or rows < 1 or cols < 1 or frames < 1:  # the header claims more samples than the file holds
        return None
    big = ts == ExplicitVRBigEndian
    tag = b"\x7f\xe0\x00\x10" if big else b"\xe0\x7f\x10\x00"
    explicit = ts != ImplicitVRLittleEndian
    want = bytes(ds.PixelData)
    if len(want) < n:
        return None
    pos = len(data)
    while True:  # the last Pixel Data element whose value is the one pydicom read
        pos = data.rfind(tag, 0, pos)
        if pos < 0:
            return None
        head = 12 if explicit else 8
        ln = struct.unpack_from(">I" if big else "<I", data, pos + head - 4)[0]
        if ln == len(want) and data[pos + head:pos + head + ln] == want:
            off = pos + head
            break
    planar = spp == 3 and int(getattr(ds, "PlanarConfiguration", 0) or 0) == 1
    if planar:  # colour planes one after another: code them as a grey image 3 times as tall
        rows, ch = rows * frames * 3, 1
    else:
        rows, ch = rows * frames, spp
    flags = 0
    if bps == 2:
        flags = (FLAG_BIG_ENDIAN if big else 0) | (FLAG_SIGNED if int(ds.PixelRepresentation) == 1 else 0)
    lay = _fits(Layout(off, rows, cols, ch, bps, flags), len(data))
    return lay and ImageInfo("dicom", BYTE_EXACT, data, lay)


# -- PNG: pixel records ------------------------------------------------------------------------
PNG_CHANNELS = {0: 1, 2: 3, 3: 1, 4: 2, 6: 4}


def _chunks(data):
    pos, out = 8, []
    while pos + 12 <= len(data):
        ln, typ = struct.unpack_from(">I4s", data, pos)
        if pos + 12 + ln > len(data):
            raise ValueError("truncated PNG chunk")
        body = data[pos + 8:pos + 8 + ln]
        if zlib.crc32(typ + body) != struct.unpack_from(">I", data, pos + 8 + ln)[0]:
            raise ValueError("PNG chunk CRC mismatch")
        out.append((typ, body, data[pos:pos + 12 + ln]))
        pos += 12 + ln
        if typ == b"IEND":
            break
    return out


def png_samples(data: bytes):
    """(IHDR fields, samples (rows, cols, channels) uint8/uint16, chunks) of a PNG that
    lcodec codes as pixels: bit depth 8 or 16, not interlaced; else None."""
    chunks = _chunks(data)
    if not chunks or chunks[0][0] != b"IHDR" or chunks[-1][0] != b"IEND":
        return None
    w, h, depth, ctype, comp, filt, inter = struct.unpack(">IIBBBBB", chunks[0][1])
    if depth not in (8, 16) or ctype not in PNG_CHANNELS or comp or filt or inter:
        return None
    ch = PNG_CHANNELS[ctype]
    if w * h * ch > MAX_SAMPLES:
        return None
    bps = depth // 8
    stride = w * ch * bps
    want = h * (stride + 1)
    dec = zlib.decompressobj()
    raw = dec.decompress(b"".join(b for t, b, _ in chunks if t == b"IDAT"), want + 1)  # never more than the image
    if len(raw) != want or dec.unconsumed_tail:
        return None
    out = np.empty((h, stride), np.uint8)
    if not _unfilter(np.frombuffer(raw, np.uint8), h, stride, ch * bps, out):
        return None
    if bps == 2:
        samples = out.reshape(-1).view(">u2").astype(np.uint16).reshape(h, w, ch)
    else:
        samples = out.reshape(h, w, ch)
    return (w, h, depth, ctype), samples, chunks


def _png(data):
    got = png_samples(data)
    if got is None:
        return None
    (w, h, depth, ctype), samples, chunks = got
    types = [t for t, _, _ in chunks]
    first, last = types.index(b"IDAT"), len(types) - 1 - types[::-1].index(b"IDAT")
    if any(t == b"IDAT" for t in types[first:last + 1]) and not all(t == b"IDAT" for t in types[first:last + 1]):
        return None
    before = b"".join(c for t, _, c in chunks[1:first])
    after = b"".join(c for t, _, c in chunks[last + 1:-1])
    content = make_record({"format": "png", "width": w, "height": h, "bit_depth": depth, "color_type": ctype,
                           "chunks_before": len(before), "chunks_after": len(after)},
                          before + after, samples)
    return _record_info(content)


def make_record(meta: dict, extra: bytes, samples: np.ndarray) -> bytes:
    """Pixel record: magic | u32le J | J bytes of JSON | extra (metadata chunks) | samples
    (raster order, channels interleaved; 16-bit samples little-endian)."""
    h, w, ch = samples.shape
    meta = dict(meta, rows=h, cols=w, channels=ch, bytes_per_sample=samples.dtype.itemsize, extra_bytes=len(extra))
    j = json.dumps(meta, sort_keys=True, separators=(",", ":")).encode()
    pix = samples.astype("<u2").tobytes() if samples.dtype.itemsize == 2 else samples.astype(np.uint8).tobytes()
    return RECORD_MAGIC + struct.pack("<I", len(j)) + j + extra + pix


def read_record(content: bytes) -> tuple[dict, bytes, np.ndarray]:
    """Check and split a pixel record: (metadata, extra bytes, samples). ValueError if bad."""
    if content[:8] != RECORD_MAGIC or len(content) < 12:
        raise ValueError("not a pixel record")
    (jl,) = struct.unpack_from("<I", content, 8)
    if jl > 1 << 20 or 12 + jl > len(content):
        raise ValueError("bad pixel record header")
    meta = json.loads(content[12:12 + jl].decode())
    rows, cols, ch, bps, ne = (meta[k] for k in ("rows", "cols", "channels", "bytes_per_sample", "extra_bytes"))
    if not all(type(x) is int for x in (rows, cols, ch, bps, ne)) or bps not in (1, 2) or not 1 <= ch <= 4:
        raise ValueError("bad pixel record header")
    off = 12 + jl + ne
    if rows < 1 or cols < 1 or off + rows * cols * ch * bps != len(content):
        raise ValueError("bad pixel record size")
    pix = np.frombuffer(content, "<u2" if bps == 2 else np.uint8, offset=off).reshape(rows, cols, ch)
    return meta, content[12 + jl:off], pix


def _record_info(content):
    meta, extra, pix = read_record(content)
    bps = pix.dtype.itemsize
    signed = FLAG_SIGNED if bps == 2 and meta.get("sample_dtype") == "i2" else 0
    lay = Layout(len(content) - pix.nbytes, pix.shape[0], pix.shape[1], pix.shape[2], bps, FLAG_RECORD | signed)
    lay.check(len(content))
    return ImageInfo(meta.get("format", "?"), PIXEL_EXACT, content, lay)


def _png_chunk(typ: bytes, body: bytes) -> bytes:
    return struct.pack(">I", len(body)) + typ + body + struct.pack(">I", zlib.crc32(typ + body))


def _filter_rows(a: np.ndarray, bpp: int) -> bytes:
    """PNG filtering, each row's filter picked by the smallest sum of absolute signed bytes
    (the heuristic the PNG specification suggests)."""
    x = a.astype(np.int32)
    up = np.zeros_like(x)
    up[1:] = x[:-1]
    left = np.zeros_like(x)
    left[:, bpp:] = x[:, :-bpp]
    ul = np.zeros_like(x)
    ul[1:, bpp:] = x[:-1, :-bpp]
    p = left + up - ul
    pa, pb, pc = np.abs(p - left), np.abs(p - up), np.abs(p - ul)
    paeth = np.where((pa <= pb) & (pa <= pc), left, np.where(pb <= pc, up, ul))
    cands = [x, x - left, x - up, x - ((left + up) >> 1), x - paeth]
    cands = [c & 255 for c in cands]
    cost = np.stack([np.minimum(c, 256 - c).sum(axis=1) for c in cands])
    best = cost.argmin(axis=0)
    out = np.empty((x.shape[0], x.shape[1] + 1), np.uint8)
    out[:, 0] = best
    stacked = np.stack(cands)
    out[:, 1:] = stacked[best, np.arange(x.shape[0])]
    return out.tobytes()


def rebuild(content: bytes) -> bytes:
    """An image file from a pixel record (the file unpack writes for pixel-exact members)."""
    meta, extra, pix = read_record(content)
    if meta.get("format") == "tiff":
        return _tiff_rebuild(meta, pix)
    if meta.get("format") != "png":
        raise ValueError(f"unknown pixel-record format {meta.get('format')!r}")
    h, w, ch = pix.shape
    nb = meta["chunks_before"]
    if nb + meta["chunks_after"] != len(extra):
        raise ValueError("bad pixel record metadata")
    ihdr = struct.pack(">IIBBBBB", w, h, meta["bit_depth"], meta["color_type"], 0, 0, 0)
    rows = pix.astype(">u2").reshape(h, -1).view(np.uint8) if pix.dtype.itemsize == 2 else pix.reshape(h, -1)
    idat = zlib.compress(_filter_rows(np.ascontiguousarray(rows), ch * pix.dtype.itemsize), 9)
    return (PNG_SIG + _png_chunk(b"IHDR", ihdr) + extra[:nb] + _png_chunk(b"IDAT", idat)
            + extra[nb:] + _png_chunk(b"IEND", b""))


def read_samples(data: bytes) -> np.ndarray | None:
    """Samples (rows, cols, channels) as the model sees them, for training; None if the
    file is not an image lcodec models."""
    from .layout import region_values

    info = analyse(data)
    if info is None:
        return None
    return region_values(info.content, info.layout)
