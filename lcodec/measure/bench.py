"""The benchmark engine behind `lcodec bench CORPUS_DIR`.

    rows = run_bench("corpus/", [lcodec_codec()])      # train/ and test/ inside corpus/
    print(format_table(rows))
    write_json(rows, "bench.json"); write_csv(rows, "bench.csv")

CORPUS_DIR holds `train/` and `test/` (files directly or nested, read recursively,
sorted by relative path; names starting with "." are skipped), or is a flat folder that
`split_flat` divides reproducibly. Each test file is compressed on its own by every
codec, decompressed again and compared with the original before its row is reported;
a mismatch raises DataError naming the codec and the file.

Rows (one per test file and codec, then one "*TOTAL*" row per codec), keys ROW_KEYS:

    file           path relative to the test folder (posix separators), or "*TOTAL*"
    raw_bytes      size of the file
    codec          codec label
    kind           "lcodec" or "baseline"
    coded_bytes    size of everything the decoder needs besides the model/dictionary
    bits_per_byte  8 * coded_bytes / raw_bytes; None (JSON null, empty in CSV) for an
                   empty file, where it is undefined. The empty file's coded bytes are
                   still counted in the codec's total.
    encode_s       seconds to compress (time.perf_counter)
    decode_s       seconds to decompress
    nll_bits       the model's negative log-likelihood of the file in bits (lcodec
                   codecs; None for baselines)
    model_bytes    size of the side information the decoder must already have: the
                   model file (0 for the built-in adaptive model), the trained zstd
                   dictionary for zstd-19-dict, the raw dictionary (train bytes) for
                   zstd-19-rawdict, the prime's coded bytes for ppmd-o16-primed, else
                   0. In the total row it is the codec's value, not a sum (the model is
                   paid for once).
    note           anything to know about the codec's numbers ("" normally)

The total row sums raw_bytes, coded_bytes, encode_s, decode_s and nll_bits over the
files; its bits_per_byte is 8 * sum(coded) / sum(raw).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import time
from typing import Callable, Sequence

from ..errors import DataError, UsageError

TOTAL = "*TOTAL*"
ROW_KEYS = (
    "file",
    "raw_bytes",
    "codec",
    "kind",
    "coded_bytes",
    "bits_per_byte",
    "encode_s",
    "decode_s",
    "nll_bits",
    "model_bytes",
    "note",
)
DEFAULT_TEST_FRACTION = 0.1


# ---- finding the files ------------------------------------------------------------


def list_files(folder: str) -> list[tuple[str, str]]:
    """(relative posix path, absolute path) of every regular file under `folder`,
    recursively, sorted by relative path. Names starting with "." are skipped."""
    folder = os.path.abspath(folder)
    found = []
    for root, dirs, files in os.walk(folder):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for name in files:
            if name.startswith("."):
                continue
            full = os.path.join(root, name)
            if os.path.isfile(full):
                rel = os.path.relpath(full, folder).replace(os.sep, "/")
                found.append((rel, full))
    found.sort()
    return found


def _split_rank(seed: int, rel: str) -> bytes:
    return hashlib.sha256(f"{seed}\0{rel}".encode("utf-8", "surrogateescape")).digest()


def split_flat(corpus_dir: str, test_fraction: float = DEFAULT_TEST_FRACTION, seed: int = 0):
    """Divide a flat (or nested) folder into (train_paths, test_paths), reproducibly.

    Each file is ranked by SHA-256 of the seed and its relative path; the first
    round(test_fraction * n) files (at least 1, and at most n - 1 so that train is not
    empty when there are two or more files) are the test split. The ranking does not
    depend on the order files are listed in, and adding a file moves no other file
    between splits except at the cut. Both lists hold absolute paths sorted by
    relative path.
    """
    if not 0.0 < test_fraction < 1.0:
        raise UsageError(f"test fraction must be between 0 and 1, got {test_fraction}")
    files = list_files(corpus_dir)
    n = len(files)
    if n == 0:
        return [], []
    n_test = 1 if n == 1 else min(n - 1, max(1, round(test_fraction * n)))
    ranked = sorted(files, key=lambda rf: _split_rank(seed, rf[0]))
    test_rel = {rel for rel, _ in ranked[:n_test]}
    train = [full for rel, full in files if rel not in test_rel]
    test = [full for rel, full in files if rel in test_rel]
    return train, test


def _corpus_files(corpus_dir: str, split: float | None, seed: int, say: Callable[[str], None]):
    """(train paths, [(test rel, test path)]) for a corpus folder."""
    corpus_dir = os.path.abspath(corpus_dir)
    if not os.path.isdir(corpus_dir):
        raise UsageError(f"{corpus_dir}: not a folder")
    train_dir, test_dir = os.path.join(corpus_dir, "train"), os.path.join(corpus_dir, "test")
    if split is None and os.path.isdir(test_dir):
        train = [full for _, full in list_files(train_dir)] if os.path.isdir(train_dir) else []
        return train, list_files(test_dir)
    if split is None:
        split = DEFAULT_TEST_FRACTION
        say(f"no train/ and test/ folders in {corpus_dir}: holding out {split:.0%} of the files "
            f"as the test split (seed {seed})")
    train, test = split_flat(corpus_dir, split, seed)
    test_rel = [(os.path.relpath(p, corpus_dir).replace(os.sep, "/"), p) for p in test]
    return train, test_rel


def _read(path: str) -> bytes:
    try:
        with open(path, "rb") as f:
            return f.read()
    except OSError as e:
        raise UsageError(f"cannot read {path}: {e.strerror or e}") from None


def read_train_sample(paths: Sequence[str], cap: int | None = None) -> list[bytes]:
    """Read the train files for the baselines' dictionaries and prime, at most `cap`
    bytes in all (default ZSTD_DICT_SAMPLE_CAP; files picked evenly across the sorted
    list; the same rule as the baselines' own caps, so nothing is read that they would
    drop)."""
    from .baselines import ZSTD_DICT_SAMPLE_CAP

    cap = ZSTD_DICT_SAMPLE_CAP if cap is None else cap
    sizes = [os.path.getsize(p) for p in paths]
    total = sum(sizes)
    chosen = list(paths)
    if total > cap:
        stride = -(-total // cap)
        chosen = [p for p, s in zip(paths, sizes) if s > 0][::stride]
    out, size = [], 0
    for p in chosen:
        if size >= cap:
            break
        data = _read(p)[: cap - size]
        out.append(data)
        size += len(data)
    return out


# ---- lcodec as a codec ------------------------------------------------------------


class LcodecCodec:
    """lcodec (lcodec.api.pack_stats / unpack) with the benchmark's codec interface."""

    kind = "lcodec"

    def __init__(self, model=None, label: str = "lcodec"):
        from ..models import resolve

        self.name = label
        self.note = ""
        self._model = resolve(model)  # load a model file once, not per test file
        if model is None:
            self.model_bytes = 0
        elif isinstance(model, (str, os.PathLike)):
            self.model_bytes = os.path.getsize(model)
        else:
            self.model_bytes = int(getattr(model, "model_bytes", 0))

    def compress_stats(self, data: bytes):
        from ..archive.write import pack_stats

        blob, stats = pack_stats(data, model=self._model)
        return blob, float(stats.nll_bits)

    def compress(self, data: bytes) -> bytes:
        return self.compress_stats(data)[0]

    def decompress(self, blob: bytes) -> bytes:
        from ..archive.read import unpack

        return unpack(blob, model=self._model)


def lcodec_codec(model=None, label: str = "lcodec") -> LcodecCodec:
    """The real lcodec codec for `run_bench`: `model` is None (the built-in adaptive
    model), a model file's path, or a model object."""
    return LcodecCodec(model, label)


# ---- running ----------------------------------------------------------------------


def _bpb(coded: int, raw: int):
    return 8.0 * coded / raw if raw else None


def _measure(codec, rel: str, data: bytes, is_lcodec: bool) -> dict:
    name = codec.name
    nll = None
    try:
        t0 = time.perf_counter()
        if is_lcodec and hasattr(codec, "compress_stats"):
            blob, nll = codec.compress_stats(data)
            nll = float(nll)
        else:
            blob = codec.compress(data)
        t1 = time.perf_counter()
    except Exception as e:  # a library failing on a file is reported, not a traceback
        raise DataError(f"codec {name} failed to compress {rel}: {type(e).__name__}: {e}") from e
    try:
        t2 = time.perf_counter()
        back = codec.decompress(blob)
        t3 = time.perf_counter()
    except Exception as e:
        raise DataError(f"codec {name} failed to decompress its own output for {rel}: "
                        f"{type(e).__name__}: {e}") from e
    if back != data:
        raise DataError(f"codec {name}: round trip of {rel} does not match the original "
                        f"({len(back)} bytes back, {len(data)} expected)")
    return {
        "file": rel,
        "raw_bytes": len(data),
        "codec": name,
        "kind": "lcodec" if is_lcodec else "baseline",
        "coded_bytes": len(blob),
        "bits_per_byte": _bpb(len(blob), len(data)),
        "encode_s": t1 - t0,
        "decode_s": t3 - t2,
        "nll_bits": nll,
        "model_bytes": int(getattr(codec, "model_bytes", 0)),
        "note": str(getattr(codec, "note", "") or ""),
    }


def total_rows(rows: Sequence[dict]) -> list[dict]:
    """One "*TOTAL*" row per codec (in first-seen order) from the per-file rows."""
    order, groups = [], {}
    for r in rows:
        if r["file"] == TOTAL:
            continue
        if r["codec"] not in groups:
            order.append(r["codec"])
            groups[r["codec"]] = []
        groups[r["codec"]].append(r)
    out = []
    for name in order:
        g = groups[name]
        raw = sum(r["raw_bytes"] for r in g)
        coded = sum(r["coded_bytes"] for r in g)
        nlls = [r["nll_bits"] for r in g]
        out.append({
            "file": TOTAL,
            "raw_bytes": raw,
            "codec": name,
            "kind": g[0]["kind"],
            "coded_bytes": coded,
            "bits_per_byte": _bpb(coded, raw),
            "encode_s": sum(r["encode_s"] for r in g),
            "decode_s": sum(r["decode_s"] for r in g),
            "nll_bits": None if any(v is None for v in nlls) else sum(nlls),
            "model_bytes": g[0]["model_bytes"],
            "note": g[0]["note"],
        })
    return out


def run_bench(corpus_dir: str, lcodec_codecs: Sequence, baselines: Sequence | None = None,
              progress: Callable[[str], None] | None = None, split: float | None = None,
              seed: int = 0) -> list[dict]:
    """Benchmark `lcodec_codecs` and `baselines` on the test files of `corpus_dir`.

    `baselines` None means `baselines.default_baselines` (its zstd dictionaries and
    PPMd prime made from the train files); pass [] for none. `progress`, if given, is
    called with one line of text per step. `split` (a fraction) treats `corpus_dir` as
    a flat folder split by `split_flat(corpus_dir, split, seed)`; without it, a corpus
    lacking a test/ folder is split with the default fraction. Returns the per-file
    rows followed by the total rows (see the module docstring).
    """
    say = progress or (lambda _msg: None)
    train_paths, tests = _corpus_files(corpus_dir, split, seed, say)
    if not tests:
        raise UsageError(f"no test files found in {corpus_dir}")
    if baselines is None:
        from .baselines import PRIME_BUDGET_BYTES, ZSTD_DICT_SAMPLE_CAP, default_baselines

        say(f"preparing the baselines from {len(train_paths)} train files: zstd dictionaries (trained, "
            f"and raw up to {PRIME_BUDGET_BYTES >> 20} MiB), PPMd prime (up to {PRIME_BUDGET_BYTES >> 20} MiB)")
        train = read_train_sample(train_paths, ZSTD_DICT_SAMPLE_CAP)
        prime = train if PRIME_BUDGET_BYTES == ZSTD_DICT_SAMPLE_CAP else read_train_sample(
            train_paths, PRIME_BUDGET_BYTES)
        baselines = default_baselines(train, prime)
    codecs = [(c, True) for c in lcodec_codecs] + [(b, False) for b in baselines]
    names = [c.name for c, _ in codecs]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise UsageError(f"two codecs share the label {', '.join(dup)}")
    if not codecs:
        raise UsageError("no codecs to benchmark")

    rows = []
    for i, (rel, path) in enumerate(tests, 1):
        data = _read(path)
        say(f"[{i}/{len(tests)}] {rel} ({len(data)} bytes)")
        for codec, is_lcodec in codecs:
            rows.append(_measure(codec, rel, data, is_lcodec))
    return rows + total_rows(rows)


# ---- output -----------------------------------------------------------------------


def write_json(rows: Sequence[dict], path: str) -> None:
    """The rows as a JSON list of objects (keys ROW_KEYS), written atomically."""
    from ..fsio import atomic_write

    text = json.dumps([{k: r.get(k) for k in ROW_KEYS} for r in rows], indent=1, allow_nan=False)
    atomic_write(path, (text + "\n").encode("utf-8"), force=True)


def write_csv(rows: Sequence[dict], path: str) -> None:
    """The rows as CSV with a header line (columns ROW_KEYS; None is an empty cell),
    written atomically."""
    from ..fsio import atomic_write

    buf = io.StringIO(newline="")
    w = csv.DictWriter(buf, fieldnames=ROW_KEYS, lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({k: ("" if r.get(k) is None else r.get(k)) for k in ROW_KEYS})
    atomic_write(path, buf.getvalue().encode("utf-8"), force=True)


def format_table(rows: Sequence[dict]) -> str:
    """Totals per codec, smallest coded size first, as plain text for the terminal.

    "vs best baseline" is the codec's coded size divided by that of the smallest
    baseline (below 1.00 means smaller than every baseline). The model/dictionary
    size is shown beside it because it is a cost the ratio leaves out.
    """
    totals = [r for r in rows if r["file"] == TOTAL] or total_rows(rows)
    if not totals:
        return "(no results)"
    totals = sorted(totals, key=lambda r: (r["coded_bytes"], r["codec"]))
    base = [r for r in totals if r["kind"] == "baseline"]
    best = base[0] if base else None
    n_files = len({r["file"] for r in rows if r["file"] != TOTAL})
    raw = totals[0]["raw_bytes"]

    head = ("codec", "coded bytes", "bits/byte", "vs best baseline", "model bytes", "encode s", "decode s")
    body = []
    for r in totals:
        bpb = "-" if r["bits_per_byte"] is None else f"{r['bits_per_byte']:.4f}"
        if best is None or best["coded_bytes"] == 0:
            ratio = "-"
        else:
            ratio = f"{r['coded_bytes'] / best['coded_bytes']:.3f}"
        body.append((r["codec"], f"{r['coded_bytes']:,}", bpb, ratio, f"{r['model_bytes']:,}",
                     f"{r['encode_s']:.3f}", f"{r['decode_s']:.3f}"))
    widths = [max(len(line[i]) for line in [head] + body) for i in range(len(head))]

    def fmt(line):
        cells = [line[0].ljust(widths[0])] + [c.rjust(w) for c, w in zip(line[1:], widths[1:])]
        return "  ".join(cells).rstrip()

    out = [f"{n_files} test files, {raw:,} bytes, each coded on its own and round-trip checked"]
    if best is not None:
        out.append(f"best baseline: {best['codec']}")
    out.append(fmt(head))
    out.append("  ".join("-" * w for w in widths))
    out.extend(fmt(line) for line in body)
    notes = [(r["codec"], r["note"]) for r in totals if r.get("note")]
    if notes:
        out.append("notes:")
        out.extend(f"  {name}: {note}" for name, note in notes)
    return "\n".join(out)
