"""Model files record no paths of the machine that trained them: counts, bytes and a digest
of the corpus listing; relative names only with --record-names (training/listing.py)."""
import hashlib
import os
import subprocess
import sys

import lcodec
from lcodec.format import modelfile
from lcodec.training.listing import corpus_record

GOLDEN = os.path.join(os.path.dirname(__file__), "golden")


def _corpus(root):
    d = root / "hushed-station-archive" / "logs"
    (d / "north").mkdir(parents=True)
    for i in range(6):
        lines = "".join(f"{1_700_000_000 + 7 * k} orrin-{i} wind={k % 37} q={k % 3}\n" for k in range(900))
        (d / ("north" if i % 2 else "") / f"mast-{i}.log").write_text(lines)
    return d


def test_corpus_record_is_relative_and_its_digest_is_the_documented_one(tmp_path):
    d = _corpus(tmp_path)
    files = sorted((str(p), p.read_bytes()) for p in d.rglob("*.log"))
    rec = corpus_record([str(d)], files)
    assert rec["files"] == 6 and rec["bytes"] == sum(len(b) for _, b in files) and "names" not in rec
    rows = sorted((os.path.relpath(p, d), len(b), hashlib.sha256(b).hexdigest()) for p, b in files)
    listing = "".join(f"{n}\t{s}\t{h}\n" for n, s, h in rows).encode()
    assert rec["listing_sha256"] == hashlib.sha256(listing).hexdigest()  # reference: hashlib over the listing
    named = corpus_record([str(d)], files, record_names=True)
    assert "north/mast-1.log" in named["names"] and not any(n.startswith("/") for n in named["names"])
    assert named["listing_sha256"] == rec["listing_sha256"]
    assert corpus_record([files[0][0]], files[:1], True)["names"] == [os.path.basename(files[0][0])]


def test_trained_model_file_holds_no_path(tmp_path):
    d = _corpus(tmp_path)
    outs = {}
    for extra in ([], ["--record-names"]):
        out = tmp_path / f"m{len(extra)}.lcmodel"
        r = subprocess.run([sys.executable, "-m", "lcodec", "train", str(d), "-o", str(out), "--time-limit", "3",
                            "--memory", "0", *extra], capture_output=True, text=True, timeout=600)
        assert r.returncode == 0, r.stderr
        raw = out.read_bytes()
        assert str(tmp_path).encode() not in raw and b"hushed-station-archive" not in raw
        outs[bool(extra)] = (raw, modelfile.load(str(out))[0]["training"]["corpus"])
    (plain_raw, plain), (named_raw, named) = outs[False], outs[True]
    assert plain["files"] == 6 and "names" not in plain and b"mast-1.log" not in plain_raw
    assert named["files"] == 6 and "north/mast-1.log" in named["names"]
    assert plain["listing_sha256"] == named["listing_sha256"]


def test_old_model_files_with_recorded_paths_still_load():
    # golden model files from before this change (their training notes held the corpus paths)
    blob = open(os.path.join(GOLDEN, "braid-v2-text.lcodec"), "rb").read()
    orig = open(os.path.join(GOLDEN, "braid-v2-text.orig"), "rb").read()
    meta = modelfile.load(os.path.join(GOLDEN, "braid-tiny.lcmodel"))[0]
    assert isinstance(meta["training"]["corpus"], list)
    assert lcodec.unpack(blob, model=os.path.join(GOLDEN, "braid-tiny.lcmodel")) == orig
