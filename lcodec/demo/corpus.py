#!/usr/bin/env python3
"""Deterministic demo corpus: the records of an invented mountain sensing network.

Scenario (invented for this project, not based on any real network): the Vantrel
Highland Sensing Network (VHSN) runs twelve unattended stations on the ridges above the
fictional valley town of Lornach; all of them log weather, six also carry a broadband
seismometer. Stations send telemetry, event records and service logs over three radio
relays to an operations desk, and field teams keep a profile and visit reports per site.

Kinds of file written (all text, UTF-8, '\\n' line ends):

  telemetry    CSV, one row per sample (5 or 10 min), slowly drifting sensor values
  events       JSON lines, one record per event, nested fields, kind-specific payloads
  gateway_log  service log of a station gateway: severities, repeated message templates
  relay_log    traffic log of a radio relay, another line layout
  waveform     CSV of integer seismometer counts (100 Hz, three components)
  profile      INI-like station profile with calibration tables and a maintenance list
  visits       plain-text field visit reports

Usage:  python corpora/make_demo.py OUT_DIR [--scale X] [--seed N]

writes OUT_DIR/train/, OUT_DIR/test/ (a file-level split, about 80/20 within each kind,
fixed by the seed) and OUT_DIR/manifest.tsv (split, name, bytes, SHA-256 of every file).
At scale 1 this is about 3 MB of training files and 0.6 MB of test files, each file
between about 5 KB and 200 KB. Scale below 1 shrinks the files; scale above 1 adds
files (more time periods) and keeps their sizes.

Byte-identical output across runs and machines: every random stream is a
random.Random seeded with a string (str seeds are hashed with SHA-512, so
PYTHONHASHSEED plays no part), only IEEE-754 basic arithmetic and sqrt are used (no
libm calls such as math.sin, math.exp or random.gauss, whose last bit can differ between
C libraries), floats are printed by CPython's own formatting, dates are fixed, no
directory listing decides an order and files are written as bytes.

Pure standard library. `generate(out_dir, scale) -> dict`; corpora/make_demo.py is its script.
"""

from __future__ import annotations

import argparse
import hashlib
import random
import sys
from pathlib import Path

from .kinds import (event_files, gateway_log_files, profile_file, relay_log_files, telemetry_files,  # noqa: F401
                    visits_files, waveform_files)
from .scenario import DEFAULT_SEED, MANIFEST_NAME, RELAYS, TEST_FRACTION, build_network, sin_  # noqa: F401


def build_files(seed: int = DEFAULT_SEED, scale: float = 1.0) -> list:
    """All demo files as (kind, name, bytes), in a fixed order."""
    if not scale > 0:
        raise ValueError("scale must be positive")
    len_mult = min(scale, 1.0)
    count_mult = max(scale, 1.0)
    net = build_network(seed)
    items = []
    for st in net:
        rows = max(10, int(round(720 * len_mult)))
        items += telemetry_files(seed, st, max(1, int(round(2 * count_mult))), rows)
        items += event_files(seed, st, max(1, int(round(count_mult))), len_mult)
        items += gateway_log_files(seed, st, max(1, int(round(count_mult))), 3.6 * len_mult)
        if st.site.seismic:
            items += waveform_files(seed, st, max(1, int(round(count_mult))), len_mult)
        items.append(profile_file(seed, st))
        items += visits_files(seed, st, max(1, int(round(count_mult))), max(1, int(round(6 * len_mult))))
    for relay in sorted(RELAYS):
        items += relay_log_files(seed, relay, net, max(1, int(round(count_mult))), 3.0 * len_mult)
    files = []
    seen = set()
    for kind, name, lines in items:
        if name in seen:
            raise AssertionError("duplicate demo file name " + name)
        seen.add(name)
        files.append((kind, name, ("\n".join(lines) + "\n").encode("utf-8")))
    return files


def split_names(seed: int, files: list, test_fraction: float = TEST_FRACTION) -> set:
    """Names of the test files: within each kind, a seeded shuffle of the sorted names."""
    by_kind = {}
    for kind, name, _ in files:
        by_kind.setdefault(kind, []).append(name)
    test = set()
    for kind in sorted(by_kind):
        names = sorted(by_kind[kind])
        if len(names) < 2:
            continue
        random.Random("%d:split:%s" % (seed, kind)).shuffle(names)
        k = min(len(names) - 1, max(1, int(round(len(names) * test_fraction))))
        test.update(names[:k])
    return test


def clear_previous_run(out: Path, manifest_name: str = MANIFEST_NAME) -> None:
    """Remove the files a previous run listed in its manifest; refuse foreign files.
    (Shared with corpora/open_data.py, whose manifests use the same layout.)"""
    manifest = out / manifest_name
    if manifest.is_file():
        for line in manifest.read_text(encoding="utf-8", errors="surrogateescape").splitlines()[1:]:
            parts = line.split("\t")
            if len(parts) >= 2 and parts[0] in ("train", "test") and "/" not in parts[1]:
                p = out / parts[0] / parts[1]
                if p.is_file() and not p.is_symlink():
                    p.unlink()
    for sub in ("train", "test"):
        d = out / sub
        if d.exists() and any(d.iterdir()):
            raise FileExistsError("%s is not empty and its files are not from an earlier run; "
                                  "choose an empty OUT_DIR" % d)


def generate(out_dir, scale: float = 1.0, seed: int = DEFAULT_SEED) -> dict:
    """Write the demo corpus under out_dir/{train,test}; return a summary dict.

    The summary has keys seed, scale, train and test ({"files", "bytes"}) and kinds
    ({kind: {"train_files", "test_files", "bytes"}}).
    """
    out = Path(out_dir)
    files = build_files(seed, scale)
    test = split_names(seed, files)
    out.mkdir(parents=True, exist_ok=True)
    clear_previous_run(out)
    for sub in ("train", "test"):
        (out / sub).mkdir(exist_ok=True)
    summary = {"seed": seed, "scale": scale, "train": {"files": 0, "bytes": 0},
               "test": {"files": 0, "bytes": 0}, "kinds": {}}
    rows = []
    for kind, name, data in sorted(files, key=lambda x: x[1]):
        split = "test" if name in test else "train"
        (out / split / name).write_bytes(data)
        summary[split]["files"] += 1
        summary[split]["bytes"] += len(data)
        k = summary["kinds"].setdefault(kind, {"train_files": 0, "test_files": 0, "bytes": 0})
        k[split + "_files"] += 1
        k["bytes"] += len(data)
        rows.append("%s\t%s\t%s\t%d\t%s" % (split, name, kind, len(data), hashlib.sha256(data).hexdigest()))
    summary["kinds"] = {k: summary["kinds"][k] for k in sorted(summary["kinds"])}
    (out / MANIFEST_NAME).write_bytes(
        ("split\tname\tkind\tbytes\tsha256\n" + "\n".join(rows) + "\n").encode("utf-8"))
    return summary


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Write the invented VHSN demo corpus (train/ and test/).")
    ap.add_argument("out_dir", help="output folder; train/ and test/ are created in it")
    ap.add_argument("--scale", type=float, default=1.0,
                    help="size factor: <1 shrinks files, >1 adds files (default 1, about 3.6 MB)")
    ap.add_argument("--seed", type=int, default=DEFAULT_SEED, help="seed of all random streams")
    args = ap.parse_args(argv)
    if not args.scale > 0:
        ap.error("--scale must be positive")
    s = generate(args.out_dir, scale=args.scale, seed=args.seed)
    print("demo corpus in %s (seed %d, scale %g)" % (args.out_dir, s["seed"], s["scale"]))
    for split in ("train", "test"):
        print("  %-5s %4d files %10d bytes" % (split, s[split]["files"], s[split]["bytes"]))
    for kind, k in s["kinds"].items():
        print("  %-12s train %3d  test %3d  %9d bytes" % (kind, k["train_files"], k["test_files"], k["bytes"]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
