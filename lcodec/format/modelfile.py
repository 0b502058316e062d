"""Model files: data only (JSON metadata plus raw little-endian arrays), never code.

Layout (all integers little-endian):
    0   8  magic  9B 6C 63 6D 6F 64 65 6C  ("\\x9blcmodel")
    8   2  model-file version (1)
    10  2  reserved (0)
    12  4  metadata length J (at most 1 MiB)
    16  J  metadata, UTF-8 JSON object: "architecture" {"name", "params"}, "arrays" (a list of
           {"name", "dtype", "shape"} in file order), and free descriptive keys (training
           corpus summary, validation bits per byte, lcodec version)
           (dtypes: u1 i1 u2 i2 u4 i4 i8, little-endian)
    ..     the arrays' bytes, back to back in the listed order, exactly as long as their
           dtypes and shapes say; nothing may follow the last one
    end-32 32 SHA-256 of everything before it
A model's identity is the SHA-256 of the whole file; containers record it.

`load` maps the file instead of reading it: the arrays are read-only views of the
mapping (native little-endian machines copy nothing), so a model's corpus memory or
tables cost page cache shared by every process that loads the same file, not a copy
per process.
"""
from __future__ import annotations

import hashlib
import json
import mmap
import os
import struct

import numpy as np

from ..errors import ModelError
from ..fsio import atomic_write

MAGIC = b"\x9blcmodel"
VERSION = 1
MAX_META = 1 << 20
MAX_ARRAY_BYTES = 1 << 31
MAX_NDIM = 8
DTYPES = {"u1": np.uint8, "i1": np.int8, "i2": np.int16, "u2": np.uint16, "i4": np.int32, "u4": np.uint32, "i8": np.int64}


def dump(path: str, architecture: dict, arrays: dict[str, np.ndarray] | None = None, **meta) -> str:
    """Write a model file atomically; returns its SHA-256 (hex)."""
    arrays = arrays or {}
    listing, blobs = [], []
    for name, a in arrays.items():
        code = np.dtype(a.dtype).str.lstrip("<>|=")
        if code not in DTYPES:
            raise ValueError(f"array {name}: dtype {a.dtype} is not allowed in model files")
        listing.append({"name": name, "dtype": code, "shape": list(a.shape)})
        blobs.append(np.ascontiguousarray(a, np.dtype(DTYPES[code]).newbyteorder("<")).tobytes())
    m = json.dumps({"architecture": architecture, "arrays": listing, **meta}, sort_keys=True).encode()
    body = MAGIC + struct.pack("<HHI", VERSION, 0, len(m)) + m + b"".join(blobs)
    body += hashlib.sha256(body).digest()
    atomic_write(path, body, force=True)  # temporary name, fsync, rename; no temp left on error
    return hashlib.sha256(body).hexdigest()


def parse(blob, where: str = "model file") -> tuple[dict, dict[str, np.ndarray], str]:
    """Check and read a model file's bytes (bytes, or any buffer such as a mapping):
    (metadata, arrays, sha256 hex). The arrays are views of `blob`. Raises ModelError."""
    def bad(msg):
        raise ModelError(f"{where}: {msg}")

    view = memoryview(blob).cast("B")
    if len(view) < 48 or bytes(view[:8]) != MAGIC:
        bad("not an lcodec model file (magic bytes do not match)")
    version, _, mlen = struct.unpack_from("<HHI", view, 8)
    if version != VERSION:
        bad(f"unsupported model-file version {version} (this lcodec reads version {VERSION})")
    whole = hashlib.sha256(view[:-32])
    if whole.digest() != bytes(view[-32:]):
        bad("damaged (its SHA-256 trailer does not match its content)")
    whole.update(view[-32:])
    if mlen > MAX_META or 16 + mlen > len(view) - 32:
        bad("damaged (impossible metadata length)")
    try:
        meta = json.loads(bytes(view[16:16 + mlen]).decode("utf-8"))
        arch = meta["architecture"]
        listing = meta["arrays"]
        assert isinstance(arch, dict) and isinstance(arch["name"], str) and isinstance(listing, list)
    except Exception:
        bad("damaged (metadata is not readable)")
    arrays, pos, end = {}, 16 + mlen, len(view) - 32
    for spec in listing:
        try:
            name, code, shape = spec["name"], spec["dtype"], spec["shape"]
            dt = np.dtype(DTYPES[code]).newbyteorder("<")
        except Exception:
            bad("damaged (bad array description)")
        # Exact JSON integers only (no strings, floats or booleans), a bounded rank, and
        # every extent bounded (a zero elsewhere must not let one extent be 10**30).
        if not (isinstance(name, str) and isinstance(shape, list) and len(shape) <= MAX_NDIM
                and all(type(x) is int for x in shape)):
            bad("damaged (bad array description)")
        if any(x < 0 for x in shape):
            bad(f"array {name}: negative shape")
        if name in arrays:
            bad(f"array {name}: listed twice")
        if any(x > MAX_ARRAY_BYTES for x in shape):
            bad(f"array {name}: larger than the file holds")
        nbytes = int(np.prod(shape, dtype=object)) * dt.itemsize
        if nbytes > MAX_ARRAY_BYTES or pos + nbytes > end:
            bad(f"array {name}: larger than the file holds")
        a = np.frombuffer(view, dt, count=nbytes // dt.itemsize, offset=pos).reshape(shape)
        arrays[name] = a.astype(dt.newbyteorder("="), copy=False)  # a view on little-endian machines
        pos += nbytes
    if pos != end:
        bad("damaged (bytes left over after the arrays)")
    return meta, arrays, whole.hexdigest()


def load(path: str) -> tuple[dict, dict[str, np.ndarray], str]:
    """Map a model file and parse it; the arrays stay views of the (read-only) mapping."""
    try:
        with open(path, "rb") as f:
            size = os.fstat(f.fileno()).st_size
            blob = mmap.mmap(f.fileno(), 0, access=mmap.ACCESS_READ) if size else b""
    except (OSError, ValueError) as e:
        raise ModelError(f"cannot read model file {path}: {getattr(e, 'strerror', None) or e}") from None
    return parse(blob, where=f"model file {path}")
