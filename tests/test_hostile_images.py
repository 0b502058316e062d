"""Hostile image headers: the readers refuse them (the file is then coded as bytes,
byte-exact) before anything the header claims is allocated or decoded."""
import io
import struct
import tracemalloc

import numpy as np
import pytest

import lcodec
from lcodec.inputs.images import analyse
from lcodec.models import load_model

tifffile = pytest.importorskip("tifffile")
pydicom = pytest.importorskip("pydicom")

MB = 1 << 20


def _peak(fn):
    tracemalloc.start()
    try:
        out = fn()
        return out, tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_pgm_claiming_100000_by_100000_is_bytes():
    data = b"P5\n100000 100000\n255\n" + bytes(range(256)) * 4
    info, peak = _peak(lambda: analyse(data))
    assert info is None and peak < MB
    assert lcodec.unpack(lcodec.pack(data)) == data


def test_ppm_and_16_bit_pgm_claims_beyond_the_file():
    for head in (b"P6\n5000 5000\n255\n", b"P5\n3000 3000\n65535\n"):
        info, peak = _peak(lambda: analyse(head + b"\x01" * 4096))
        assert info is None and peak < MB


def _tiff(compression):
    buf = io.BytesIO()
    img = (np.arange(32 * 32) % 251).astype(np.uint8).reshape(32, 32)
    tifffile.imwrite(buf, img, compression=compression, rowsperstrip=8)
    return bytearray(buf.getvalue())


def _patch_tag(data: bytearray, code: int, value: int) -> None:
    """Set the first value of a tag in the first IFD (little-endian TIFF as tifffile writes)."""
    with tifffile.TiffFile(io.BytesIO(bytes(data))) as tif:
        tag = tif.pages[0].tags[code]
        fmt = {3: "<H", 4: "<I", 16: "<Q"}[int(tag.dtype)]
        pos = tag.valueoffset
    struct.pack_into(fmt, data, pos, value)


@pytest.mark.parametrize("compression", [None, "zlib"])
def test_tiff_strips_beyond_the_end_of_the_file(compression):
    data = _tiff(compression)
    assert analyse(bytes(data)) is not None  # the honest file is an image
    with tifffile.TiffFile(io.BytesIO(bytes(data))) as tif:
        offsets_tag = tif.pages[0].tags[273]
        count = offsets_tag.count
    bad = bytearray(data)
    if count == 1:
        _patch_tag(bad, 273, len(data) + 10_000)
    else:  # the offsets are an array (tifffile's valueoffset is where it lies): move the last strip past the end
        fmt = "<I" if offsets_tag.dtype == 4 else "<H"
        struct.pack_into(fmt, bad, offsets_tag.valueoffset + (count - 1) * struct.calcsize(fmt),
                         min(len(data) + 10_000, 65535))
    info, peak = _peak(lambda: analyse(bytes(bad)))
    assert info is None and peak < 4 * MB
    assert lcodec.unpack(lcodec.pack(bytes(bad))) == bytes(bad)


def test_compressed_tiff_claiming_a_huge_image_is_refused_before_decoding():
    data = _tiff("zlib")
    bad = bytearray(data)
    _patch_tag(bad, 256, 60_000)  # ImageWidth
    _patch_tag(bad, 257, 60_000)  # ImageLength: 3.6e9 samples claimed
    info, peak = _peak(lambda: analyse(bytes(bad)))
    assert info is None and peak < 4 * MB


def _dicom_bytes(rows=16, cols=16):
    from pydicom.dataset import FileDataset, FileMetaDataset
    from pydicom.uid import ExplicitVRLittleEndian, generate_uid

    meta = FileMetaDataset()
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    meta.MediaStorageSOPClassUID = "1.2.840.10008.5.1.4.1.1.7"
    meta.MediaStorageSOPInstanceUID = generate_uid()
    ds = FileDataset("x", {}, file_meta=meta, preamble=b"\0" * 128)
    ds.Rows, ds.Columns, ds.BitsAllocated, ds.BitsStored, ds.HighBit = rows, cols, 8, 8, 7
    ds.SamplesPerPixel, ds.PixelRepresentation, ds.PhotometricInterpretation = 1, 0, "MONOCHROME2"
    ds.PixelData = bytes(range(256))[: rows * cols] * 1
    buf = io.BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    return bytearray(buf.getvalue())


def test_dicom_whose_lengths_do_not_match_the_file():
    data = _dicom_bytes()
    assert analyse(bytes(data)) is not None
    # Rows claims 40000 (the pixel data holds 16 x 16): the header claims more than the file
    bad = bytearray(data)
    pos = bad.find(b"\x28\x00\x10\x00US\x02\x00")  # (0028,0010) Rows, explicit VR little-endian
    assert pos > 0
    struct.pack_into("<H", bad, pos + 8, 40000)
    info, peak = _peak(lambda: analyse(bytes(bad)))
    assert info is None and peak < 4 * MB
    # the Pixel Data element's length claims 4 GiB - 2 (more than the file)
    bad = bytearray(data)
    pos = bad.rfind(b"\xe0\x7f\x10\x00OW\x00\x00")
    assert pos > 0
    struct.pack_into("<I", bad, pos + 8, 0xFFFFFFF0)
    info, peak = _peak(lambda: analyse(bytes(bad)))
    assert info is None and peak < 4 * MB
    assert lcodec.unpack(lcodec.pack(bytes(bad))) == bytes(bad)
