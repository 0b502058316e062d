#!/usr/bin/env python3
"""Corpora of real text that already sits on this machine (no network).

Each loader returns (train_files, test_files): two lists of absolute paths, split by
file. The candidate files are collected without following symlinks, empty, symlinked
and unreadable files are skipped, files whose bytes equal an earlier file's (in sorted
order) are dropped so that no test file has an exact copy in train, the rest are sorted
by their path relative to the kind's root, shuffled with random.Random(seed), optionally
cut to a byte budget (limit_bytes: files are taken in shuffled order while they fit),
and the first test_fraction of that order (at least one file, never all) is the test
split. Both lists are returned sorted.

Kinds:
  python_stdlib  .py files of the running Python's standard library
  c_headers      C and C++ headers under /usr/include
  doc_text       plain-text package documentation under /usr/share/doc
  package_data   JSON, CSV, TSV and .txt data files inside installed Python packages

Usage:
  python corpora/open_data.py --list
  python corpora/open_data.py KIND OUT_DIR [--limit-bytes N] [--seed S] [--test-fraction F]

The second form copies the split into OUT_DIR/train and OUT_DIR/test (file names made
from the relative path, '/' replaced by '__') and writes OUT_DIR/manifest.tsv, so that
`lcodec bench OUT_DIR` can run on it. Standard library, plus lcodec.democorpus for clearing a previous run.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import random
import sys
import sysconfig
from pathlib import Path

try:
    from lcodec.demo.corpus import clear_previous_run
except ImportError:  # run from a checkout without lcodec installed
    sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
    from lcodec.demo.corpus import clear_previous_run

MANIFEST_NAME = "manifest.tsv"
TEXT_PROBE_BYTES = 8192
COMPRESSED_SUFFIXES = (".gz", ".bz2", ".xz", ".lz", ".lzma", ".zst", ".zip", ".7z", ".br", ".Z", ".tgz")
HEADER_SUFFIXES = (".h", ".hh", ".hpp", ".hxx", ".tcc")
DATA_SUFFIXES = (".json", ".csv", ".tsv", ".txt")
METADATA_DIR_SUFFIXES = (".dist-info", ".egg-info")


# ---------------------------------------------------------------------------
# Collection
# ---------------------------------------------------------------------------


def _walk(root: str, accept, skip_dir=None) -> list:
    """(relative path with '/', absolute path) of accepted regular files under root."""
    found = []
    if not os.path.isdir(root):
        return found
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        dirnames[:] = sorted(d for d in dirnames
                             if not os.path.islink(os.path.join(dirpath, d))
                             and not (skip_dir and skip_dir(d)))
        for name in sorted(filenames):
            path = os.path.join(dirpath, name)
            if os.path.islink(path) or not accept(name, path):
                continue
            rel = os.path.relpath(path, root).replace(os.sep, "/")
            found.append((rel, os.path.abspath(path)))
    return found


def _read(path: str):
    try:
        with open(path, "rb") as fh:
            return fh.read()
    except OSError:
        return None


def _looks_like_text(data: bytes) -> bool:
    return b"\x00" not in data[:TEXT_PROBE_BYTES]


def _finish(found: list, require_text: bool = False) -> list:
    """Sorted, readable, non-empty, content-unique (rel, abs, size) entries."""
    seen = set()
    out = []
    for rel, path in sorted(found):
        data = _read(path)
        if not data:  # unreadable (None) or empty
            continue
        if require_text and not _looks_like_text(data):
            continue
        digest = hashlib.sha256(data).digest()
        if digest in seen:
            continue
        seen.add(digest)
        out.append((rel, path, len(data)))
    return out


def _stdlib_entries() -> list:
    root = sysconfig.get_paths()["stdlib"]
    return _finish(_walk(root, lambda name, path: name.endswith(".py"),
                         skip_dir=lambda d: d in ("site-packages", "dist-packages", "__pycache__")))


def _c_header_entries() -> list:
    return _finish(_walk("/usr/include", lambda name, path: name.endswith(HEADER_SUFFIXES)))


def _doc_text_entries() -> list:
    return _finish(_walk("/usr/share/doc", lambda name, path: not name.endswith(COMPRESSED_SUFFIXES)),
                   require_text=True)


def _site_roots() -> list:
    """(label, folder) of the site-packages of the running environment and its base."""
    roots = []
    paths = sysconfig.get_paths()
    for key in ("purelib", "platlib"):
        roots.append(("env", paths[key]))
    if sys.base_prefix != sys.prefix:
        base = sysconfig.get_paths(vars={"base": sys.base_prefix, "platbase": sys.base_exec_prefix})
        for key in ("purelib", "platlib"):
            roots.append(("base", base[key]))
    out, seen = [], set()
    for label, root in roots:
        real = os.path.realpath(root)
        if real in seen or not os.path.isdir(real):
            continue
        seen.add(real)
        out.append((label, root))
    return out


def _package_data_entries() -> list:
    found = []
    for label, root in _site_roots():
        part = _walk(root, lambda name, path: name.endswith(DATA_SUFFIXES),
                     skip_dir=lambda d: d == "__pycache__" or d.endswith(METADATA_DIR_SUFFIXES))
        found += [(label + "/" + rel, path) for rel, path in part]
    return _finish(found, require_text=True)


# ---------------------------------------------------------------------------
# Split
# ---------------------------------------------------------------------------


def _split(entries: list, limit_bytes, seed: int, test_fraction: float) -> tuple:
    if not 0.0 < test_fraction < 1.0:
        raise ValueError("test_fraction must be between 0 and 1")
    order = list(entries)  # already sorted by relative path
    random.Random(seed).shuffle(order)
    if limit_bytes is not None:
        chosen, total = [], 0
        for e in order:
            if total + e[2] <= limit_bytes:
                chosen.append(e)
                total += e[2]
        order = chosen
    n = len(order)
    if n == 0:
        return [], []
    n_test = min(n - 1, max(1, int(round(n * test_fraction)))) if n >= 2 else 0
    test = sorted(order[:n_test])
    train = sorted(order[n_test:])
    return train, test


def _entries(kind: str) -> list:
    try:
        return KINDS[kind][0]()
    except KeyError:
        raise ValueError("unknown kind %r; kinds: %s" % (kind, ", ".join(KINDS))) from None


def split_entries(kind: str, limit_bytes=None, seed: int = 0, test_fraction: float = 0.1) -> tuple:
    """Like the loaders, but each item is (relative path, absolute path, size)."""
    return _split(_entries(kind), limit_bytes, seed, test_fraction)


def _paths(kind, limit_bytes, seed, test_fraction) -> tuple:
    train, test = split_entries(kind, limit_bytes, seed, test_fraction)
    return [e[1] for e in train], [e[1] for e in test]


# ---------------------------------------------------------------------------
# Loaders (public)
# ---------------------------------------------------------------------------


def python_stdlib(limit_bytes=None, seed: int = 0, test_fraction: float = 0.1) -> tuple:
    """The .py files of the running Python's standard library (site-packages excluded).

    Source code is a large share of what people back up and archive; the standard
    library is a big, varied, well-known body of it (about 30 MB in some 1,800 files for
    CPython 3.11) that is on every machine with Python, and the design brief names it as
    open reference data.
    """
    return _paths("python_stdlib", limit_bytes, seed, test_fraction)


def c_headers(limit_bytes=None, seed: int = 0, test_fraction: float = 0.1) -> tuple:
    """C and C++ header files (.h .hh .hpp .hxx .tcc) under /usr/include.

    Stands for source trees in another language than Python: declarations, macros,
    long licence comments and generated tables, the kind of text that fills archived
    checkouts and release tarballs. Every Debian machine with libc6-dev and
    linux-libc-dev (pulled in by any compiler install) has tens of megabytes of it.
    """
    return _paths("c_headers", limit_bytes, seed, test_fraction)


def doc_text(limit_bytes=None, seed: int = 0, test_fraction: float = 0.1) -> tuple:
    """Plain-text package documentation under /usr/share/doc (compressed files skipped).

    Stands for the prose and semi-structured documents people archive: licence and
    copyright statements (Debian policy puts one in every installed package's folder),
    READMEs, change logs, Markdown and HTML manuals. Files with a NUL byte in their first
    8 KiB count as binary and are left out. What else is here besides the copyright
    files depends on the installed packages.
    """
    return _paths("doc_text", limit_bytes, seed, test_fraction)


def package_data(limit_bytes=None, seed: int = 0, test_fraction: float = 0.1) -> tuple:
    """JSON, CSV, TSV and .txt files shipped inside installed Python packages.

    Stands for machine-written structured data: API and schema descriptions in JSON,
    numeric tables in CSV and text, test vectors. Looks in the site-packages of the
    running environment and, when that is a virtual environment, of its base
    interpreter; package metadata folders (*.dist-info, *.egg-info) are skipped. The
    amount depends entirely on what is installed, so sizes differ from machine to
    machine more than for the other kinds.
    """
    return _paths("package_data", limit_bytes, seed, test_fraction)


# kind -> (entry collector, loader)
KINDS = {
    "python_stdlib": (_stdlib_entries, python_stdlib),
    "c_headers": (_c_header_entries, c_headers),
    "doc_text": (_doc_text_entries, doc_text),
    "package_data": (_package_data_entries, package_data),
}


def kind_sizes() -> dict:
    """{kind: (number of files, total bytes)} on this machine, after de-duplication."""
    out = {}
    for kind, (collect, _) in KINDS.items():
        entries = collect()
        out[kind] = (len(entries), sum(e[2] for e in entries))
    return out


# ---------------------------------------------------------------------------
# Materialise a split as a bench corpus
# ---------------------------------------------------------------------------


def flat_name(rel: str) -> str:
    """A file name from a relative path: '/' becomes '__'; over-long names are shortened."""
    name = rel.replace("/", "__")
    if len(name.encode("utf-8")) > 200:
        tag = hashlib.sha256(rel.encode("utf-8", "surrogateescape")).hexdigest()[:12]
        name = tag + "__" + name[-120:]
    return name


def materialise(kind: str, out_dir, limit_bytes=None, seed: int = 0, test_fraction: float = 0.1) -> dict:
    """Copy a kind's split into out_dir/train and out_dir/test; return a summary dict.

    Writes out_dir/manifest.tsv (split, name, bytes, sha256, source path). Files listed
    in an earlier manifest there are replaced; any other file in train/ or test/ makes
    this refuse (FileExistsError).
    """
    train, test = split_entries(kind, limit_bytes, seed, test_fraction)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    clear_previous_run(out, MANIFEST_NAME)
    rows = []
    summary = {"kind": kind, "seed": seed, "limit_bytes": limit_bytes,
               "train": {"files": 0, "bytes": 0}, "test": {"files": 0, "bytes": 0}}
    used = set()
    for split, entries in (("train", train), ("test", test)):
        (out / split).mkdir(exist_ok=True)
        for rel, path, _ in entries:
            data = _read(path)
            if data is None:
                raise OSError("cannot read %s (it was readable while collecting)" % path)
            name = flat_name(rel)
            if name in used:  # e.g. 'a__b/c' and 'a/b__c'
                stem, dot, ext = name.rpartition(".")
                tag = hashlib.sha256(rel.encode("utf-8", "surrogateescape")).hexdigest()[:8]
                name = ("%s~%s.%s" % (stem, tag, ext)) if dot else ("%s~%s" % (name, tag))
            used.add(name)
            (out / split / name).write_bytes(data)
            summary[split]["files"] += 1
            summary[split]["bytes"] += len(data)
            rows.append("%s\t%s\t%d\t%s\t%s" % (split, name, len(data), hashlib.sha256(data).hexdigest(), path))
    (out / MANIFEST_NAME).write_bytes(
        ("split\tname\tbytes\tsha256\tsource\n" + "\n".join(rows) + "\n").encode("utf-8", "surrogateescape"))
    return summary


# ---------------------------------------------------------------------------
# Command line
# ---------------------------------------------------------------------------


def _parse_size(text: str) -> int:
    t = text.strip().upper()
    mult = 1
    for suffix, m in (("K", 1000), ("M", 1000 ** 2), ("G", 1000 ** 3)):
        if t.endswith(suffix):
            t, mult = t[:-1], m
            break
    try:
        value = int(float(t) * mult)
    except ValueError:
        raise argparse.ArgumentTypeError("not a size: %r (use e.g. 5000000 or 5M)" % text) from None
    if value <= 0:
        raise argparse.ArgumentTypeError("size must be positive")
    return value


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Make a train/test corpus from real text on this machine.")
    ap.add_argument("kind", nargs="?", help="one of: " + ", ".join(KINDS))
    ap.add_argument("out_dir", nargs="?", help="output folder (train/ and test/ go in it)")
    ap.add_argument("--list", action="store_true", help="print the kinds and their sizes here, then stop")
    ap.add_argument("--limit-bytes", type=_parse_size, default=None,
                    help="cap on the total bytes taken (a seeded subset); K/M/G suffixes allowed")
    ap.add_argument("--seed", type=int, default=0, help="seed of the file shuffle (default 0)")
    ap.add_argument("--test-fraction", type=float, default=0.1, help="share of files in test (default 0.1)")
    args = ap.parse_args(argv)
    if args.list:
        for kind, (n, b) in kind_sizes().items():
            first = (KINDS[kind][1].__doc__ or "").strip().splitlines()[0]
            print("%-14s %6d files %8.1f MB  %s" % (kind, n, b / 1e6, first))
        return 0
    if not args.kind or not args.out_dir:
        ap.error("give KIND and OUT_DIR, or --list")
    if args.kind not in KINDS:
        ap.error("unknown kind %r; kinds: %s" % (args.kind, ", ".join(KINDS)))
    s = materialise(args.kind, args.out_dir, args.limit_bytes, args.seed, args.test_fraction)
    print("%s corpus in %s (seed %d)" % (args.kind, args.out_dir, args.seed))
    for split in ("train", "test"):
        print("  %-5s %6d files %12d bytes" % (split, s[split]["files"], s[split]["bytes"]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
