"""`lcodec bench --kind image`: bits per sub-pixel of a pixel model against image codecs.

For each image: lcodec's archive of the file (pack with the pixel model, unpack, checked
byte-exact or pixel-exact) and the codestreams of PNG (Pillow, optimize), WebP lossless
(Pillow, method 6; 8-bit only), JPEG-LS, JPEG 2000 reversible and JPEG XL lossless at
effort 9 (imagecodecs), each decoded again and compared with the samples it was given.

The codecs get the samples as the reference readers give them (pydicom for DICOM,
otherwise lcodec's own reading, which the tests check against Pillow, numpy and
tifffile); signed samples are shifted by their minimum to unsigned (which only helps the
codecs: a smaller range). lcodec's figure is its whole archive (container, file header
and metadata included); `pixel_nll` is the model's NLL of the samples alone. For a
like-for-like whole-file figure, `totals` also gives each codec's codestreams plus the
files' other bytes (a DICOM header, say) packed by xz -9e.
"""
from __future__ import annotations

import io
import lzma
import os
import time

import numpy as np

from ..archive import read as api_read, write as api_write
from ..errors import UsageError
from ..inputs.images import analyse
from ..inputs.layout import region_values, side_bytes

CODECS = ("png", "webp", "jpegls", "jpeg2000", "jpegxl")


def _codec(name):
    import imagecodecs
    from PIL import Image

    def pil(fmt, **kw):
        def enc(a):
            im = Image.fromarray(a[:, :, 0] if a.shape[2] == 1 else a)
            buf = io.BytesIO()
            im.save(buf, fmt, **kw)
            return buf.getvalue()

        def dec(b):
            return np.asarray(Image.open(io.BytesIO(b)))
        return enc, dec

    if name == "png":
        return pil("PNG", optimize=True)
    if name == "webp":
        return pil("WEBP", lossless=True, method=6, quality=100)
    sq = lambda a: a[:, :, 0] if a.shape[2] == 1 else a  # noqa: E731
    if name == "jpegls":
        return (lambda a: imagecodecs.jpegls_encode(sq(a))), imagecodecs.jpegls_decode
    if name == "jpeg2000":
        return (lambda a: imagecodecs.jpeg2k_encode(sq(a), level=0, reversible=True)), imagecodecs.jpeg2k_decode
    if name == "jpegxl":
        return (lambda a: imagecodecs.jpegxl_encode(sq(a), lossless=True, effort=9)), imagecodecs.jpegxl_decode
    raise ValueError(name)


def codec_size(name: str, a: np.ndarray):
    """Bytes of one codec's codestream for samples a (rows, cols, channels), round-trip
    checked; None where the codec does not take such samples (WebP: 16-bit; PNG: 16-bit
    colour through Pillow)."""
    if name == "webp" and (a.dtype != np.uint8 or a.shape[2] not in (1, 3, 4)):
        return None
    if name == "png" and a.dtype != np.uint8 and a.shape[2] != 1:
        return None
    enc, dec = _codec(name)
    b = enc(a)
    back = np.asarray(dec(b))
    want = a[:, :, 0] if a.shape[2] == 1 else a
    if name == "webp" and a.shape[2] == 1 and back.ndim == 3:
        back = back[:, :, 0]
    if back.shape != want.shape or not np.array_equal(back.astype(np.int64), want.astype(np.int64)):
        raise RuntimeError(f"{name} did not round-trip")
    return len(b)


def reference_samples(data: bytes, info) -> np.ndarray:
    if info.kind == "dicom":
        import pydicom
        ds = pydicom.dcmread(io.BytesIO(data))
        a = ds.pixel_array
        if a.ndim == 2:
            a = a[:, :, None]
        elif a.ndim == 3 and int(getattr(ds, "SamplesPerPixel", 1)) == 1:
            a = a.reshape(-1, a.shape[-1])[:, :, None]
    else:
        a = region_values(info.content, info.layout)
        if info.layout.flags & 2:  # signed samples: back to their values
            a = (a.astype(np.int32) - 32768)
    if a.dtype.kind == "i" or a.dtype.itemsize > 1 or int(a.max()) > 255:
        a = (a.astype(np.int64) - int(a.min())).astype(np.uint16 if int(a.max()) - int(a.min()) > 255 or
                                                       a.dtype.itemsize > 1 else np.uint8)
    return np.ascontiguousarray(a)


def bench_file(path: str, model, codecs=CODECS) -> dict:
    data = open(path, "rb").read()
    info = analyse(data)
    if info is None:
        raise UsageError(f"{path}: not an image lcodec codes as pixels")
    t0 = time.perf_counter()
    blob, stats = api_write.pack_stats(data, model)
    enc_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    d = api_read.decode(blob, model)
    dec_s = time.perf_counter() - t0
    content = b"".join(d.frames)
    if content != info.content:
        raise RuntimeError(f"{path}: lcodec did not round-trip")
    if info.guarantee == "byte-exact" and api_read.unpack(blob, model) != data:
        raise RuntimeError(f"{path}: lcodec did not round-trip byte-exact")
    lay = info.layout
    n = lay.rows * lay.cols * lay.channels
    img = stats.images[0] if stats.images else None
    row = {"file": os.path.basename(path), "kind": info.kind, "guarantee": info.guarantee,
           "rows": lay.rows, "columns": lay.cols, "channels": lay.channels, "bits": 8 * lay.bps,
           "subpixels": n, "file_bytes": len(data), "lcodec_bytes": len(blob),
           "pixel_nll_bits": img["nll_pixel_bits"] if img else None,
           "encode_s": enc_s, "decode_s": dec_s, "codecs": {}}
    # what a file holds besides its samples (a DICOM header, a PGM or NPY header): a codec's
    # bare codestream leaves it out, so the like-for-like whole-file comparison adds it to every
    # codec, as stored (raw, as a DICOM file of that codec's transfer syntax keeps its header)
    # and as xz -9e packs it alone (or raw, when xz's own framing makes it larger)
    side = side_bytes(info.content, lay)
    row["side_bytes"] = len(side)
    row["side_xz_bytes"] = min(len(side), len(lzma.compress(side, preset=9 | lzma.PRESET_EXTREME)))
    a = reference_samples(data, info)
    for c in codecs:
        row["codecs"][c] = codec_size(c, a)
    return row


def image_files(paths) -> list[str]:
    out = []
    for p in paths:
        if os.path.isdir(p):
            for dp, dns, fns in os.walk(p):
                dns.sort()
                out += [os.path.join(dp, f) for f in sorted(fns)]
        else:
            out.append(p)
    return out


def totals(rows: list[dict], codecs=CODECS) -> dict:
    """Bits per sub-pixel over all rows (sum of bytes / sum of sub-pixels), per method; a
    codec missing on any row is left out of the totals."""
    n = sum(r["subpixels"] for r in rows)
    t = {"lcodec": 8.0 * sum(r["lcodec_bytes"] for r in rows) / n}
    if all(r["pixel_nll_bits"] is not None for r in rows):
        t["lcodec_pixels"] = sum(r["pixel_nll_bits"] for r in rows) / n
    for c in codecs:
        if all(r["codecs"].get(c) is not None for r in rows):
            t[c] = 8.0 * sum(r["codecs"][c] for r in rows) / n
            # whole files: the codestream plus the file's other bytes packed by xz -9e
            t[c + "+xz_side"] = t[c] + 8.0 * sum(r.get("side_xz_bytes", 0) for r in rows) / n
    t["decode_subpixels_per_s"] = n / sum(r["decode_s"] for r in rows)
    return t


def format_rows(rows: list[dict], codecs=CODECS) -> list[str]:
    head = f"{'image':28s} {'size':>11s} {'bits':>4s}  {'lcodec':>7s} {'pixels':>7s}" + "".join(f" {c:>8s}" for c in codecs)
    out = [head, "-" * len(head)]
    for r in rows:
        n = r["subpixels"]
        px = f"{r['pixel_nll_bits'] / n:7.3f}" if r["pixel_nll_bits"] is not None else "      -"
        out.append(f"{r['file'][:28]:28s} {r['rows']:>5d}x{r['columns']:<5d} {r['bits']:>4d}  "
                   f"{8.0 * r['lcodec_bytes'] / n:7.3f} {px}"
                   + "".join(f" {8.0 * r['codecs'][c] / n:8.3f}" if r["codecs"].get(c) is not None else f" {'n/a':>8s}"
                             for c in codecs))
    t = totals(rows, codecs)
    out.append("-" * len(head))
    out.append(f"{'total':28s} {'':11s} {'':4s}  {t['lcodec']:7.3f} {t.get('lcodec_pixels', 0):7.3f}"
               + "".join(f" {t[c]:8.3f}" if c in t else f" {'n/a':>8s}" for c in codecs))
    out.append("bits per sub-pixel; lcodec = whole archive (container and file headers included), "
               "pixels = model NLL of the samples alone")
    return out
