"""What a model file says about its training corpus: counts, bytes and a digest, never a path.

Model files travel (DESIGN.md, "Cautions"): a model file records no path of the machine
that trained it. It keeps the number of files, their bytes, and the SHA-256 of the corpus
listing: one line per file, sorted, `NAME<TAB>SIZE<TAB>SHA-256 of its bytes<LF>`, where NAME
is relative to the argument the file was found under (a folder's files by their path
inside it, a file given by itself by its base name). Whoever holds the corpus can
recompute the digest and so check which corpus a model came from; nobody else learns
names from it. The names themselves are recorded only when asked (`--record-names`).
"""
from __future__ import annotations

import hashlib
import os

MAX_NAMES = 10_000  # names recorded with --record-names (the count and digest cover every file)


def relative_name(path: str, corpus: list[str]) -> str:
    """`path` relative to the corpus argument it lies under ('/'-separated)."""
    ap = os.path.abspath(path)
    for c in corpus:
        ac = os.path.abspath(c)
        if os.path.isdir(ac) and (ap == ac or ap.startswith(ac.rstrip(os.sep) + os.sep)):
            return os.path.relpath(ap, ac).replace(os.sep, "/")
        if ap == ac:
            return os.path.basename(ac)
    return os.path.basename(ap)


def corpus_record(corpus: list[str], files: list[tuple[str, bytes]], record_names: bool = False) -> dict:
    """The model file's note of its corpus: {"files", "bytes", "listing_sha256"} and, with
    record_names, "names" (relative, sorted, at most MAX_NAMES)."""
    rows = sorted((relative_name(p, corpus), len(d), hashlib.sha256(d).hexdigest()) for p, d in files)
    listing = "".join(f"{n}\t{s}\t{h}\n" for n, s, h in rows).encode("utf-8")
    out = {"files": len(rows), "bytes": int(sum(s for _, s, _ in rows)),
           "listing_sha256": hashlib.sha256(listing).hexdigest(),
           "listing": "sorted lines NAME<TAB>SIZE<TAB>SHA-256<LF>, NAME relative to the corpus argument"}
    if record_names:
        out["names"] = [n for n, _, _ in rows][:MAX_NAMES]
    return out
