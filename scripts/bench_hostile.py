#!/usr/bin/env python3
"""Work and memory on crafted inputs against their honest counterparts.

    python scripts/bench_hostile.py [--mib 4] [--json bench-out/hostile.json]

* A crafted version-3 record claiming 64 MiB with 1 KiB of coded words (made-up words, and
  the words of a real 3 KB frame), 1 and 16 lanes: the time `unpack` takes to refuse it
  (target: under 5 s) and its peak memory.
* An honest archive of N MiB (one frame) and a crafted one claiming the same N MiB with
  1 KiB of words: peak memory of each (target: crafted at most about 2x honest) and time.
* A model file whose array listing claims far more than the file holds, against the honest
  model file it was made from: peak memory of `info` on each.

Each measurement runs in a fresh process (its peak RSS from getrusage).
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)

CHILD = r"""
import resource, sys, time
t = time.perf_counter()
import lcodec.api as api
from lcodec.errors import LcodecError
what, path = sys.argv[1], sys.argv[2]
ok = True
try:
    if what == "unpack":
        api.unpack_to_file(open(path, "rb").read(), path + ".out", ceiling=None, force=True)
    else:
        from lcodec.models import load_model
        load_model(path)
except LcodecError as e:
    ok = False
    msg = str(e)
print(ok, round(time.perf_counter() - t, 3), resource.getrusage(resource.RUSAGE_SELF).ru_maxrss // 1024)
"""


def measure(what: str, path: str) -> dict:
    r = subprocess.run([sys.executable, "-c", CHILD, what, path], capture_output=True, text=True, cwd=ROOT,
                       env=dict(os.environ, PYTHONPATH=ROOT))
    ok, secs, rss = r.stdout.split()[-3:]
    return {"accepted": ok == "True", "seconds": float(secs), "peak_rss_mib": int(rss)}


def text(n: int, seed: int = 0) -> bytes:
    import random

    rng = random.Random(seed)
    out, t = [], 1_700_000_000
    while sum(map(len, out)) < n:
        t += rng.randint(1, 60)
        out.append(f"{t} mount-orrin-{rng.randint(1, 9)} gust={rng.gauss(20, 6):.1f} q={rng.randint(0, 3)}\n")
    return "".join(out).encode()[:n]


def crafted(n: int, coded: bytes, lanes: int) -> bytes:
    from lcodec.format import container as C
    from lcodec.models import default_model

    rec = C.frame_record(n, coded, C.METHOD_QUEUE, lanes, 0x1234)
    return C.build_archive(n, b"\x11" * 32, max(n, 1), default_model().identity, None, [rec])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--mib", type=int, default=4, help="size of the honest archive compared (MiB)")
    ap.add_argument("--json", default=os.path.join(ROOT, "bench-out", "hostile.json"))
    a = ap.parse_args()
    import lcodec
    from lcodec.coding import encode_frame
    from lcodec.models import default_model

    res = {"claims_64mib": [], "same_size": {}, "model_file": {}}
    with tempfile.TemporaryDirectory() as d:
        real, _ = encode_frame(default_model(), text(3000, 5), 16, "queue", checks=True)
        for kind, words in (("made-up words", os.urandom(1024)), ("a real frame's words", real[:1024])):
            for lanes in (1, 16):
                p = os.path.join(d, f"claim-{lanes}.lcodec")
                with open(p, "wb") as f:
                    f.write(crafted(1 << 26, words, lanes))
                m = measure("unpack", p)
                m.update(words=kind, lanes=lanes, met=not m["accepted"] and m["seconds"] < 5.0)
                res["claims_64mib"].append(m)
                print(f"64 MiB claim, 1 KiB of {kind}, {lanes:2d} lanes: refused={not m['accepted']} in "
                      f"{m['seconds']:.2f} s (target < 5 s), peak {m['peak_rss_mib']} MiB", flush=True)
        n = a.mib << 20
        data = text(n, 1)
        honest = os.path.join(d, "honest.lcodec")
        t = time.perf_counter()
        with open(honest, "wb") as f:
            f.write(lcodec.pack(data, frame_size=n))
        pack_s = time.perf_counter() - t
        lanes = lcodec.info(open(honest, "rb").read())["frames"][0]["lanes"]
        bad = os.path.join(d, "crafted.lcodec")
        with open(bad, "wb") as f:
            f.write(crafted(n, os.urandom(1024), lanes))
        h, c = measure("unpack", honest), measure("unpack", bad)
        res["same_size"] = {"mib": a.mib, "lanes": lanes, "pack_s": round(pack_s, 1), "honest": h, "crafted": c,
                            "memory_ratio": round(c["peak_rss_mib"] / h["peak_rss_mib"], 2),
                            "time_ratio": round(c["seconds"] / h["seconds"], 3)}
        print(f"{a.mib} MiB, {lanes} lanes: honest {h['seconds']:.1f} s / {h['peak_rss_mib']} MiB, crafted "
              f"{c['seconds']:.2f} s / {c['peak_rss_mib']} MiB: memory x{res['same_size']['memory_ratio']} "
              f"(target <= 2), time x{res['same_size']['time_ratio']}", flush=True)
        model = os.path.join(ROOT, "tests", "golden", "braid-memory-tiny.lcmodel")
        blob = open(model, "rb").read()
        from lcodec.format import modelfile

        meta, arrays, _ = modelfile.parse(blob)
        import hashlib
        import struct

        mlen = struct.unpack_from("<I", blob, 12)[0]
        j = json.loads(blob[16:16 + mlen])
        for spec in j["arrays"]:
            spec["shape"] = [1 << 30] + spec["shape"][1:]  # claims far beyond the file
        mj = json.dumps(j).encode()
        body = blob[:12] + struct.pack("<I", len(mj)) + mj + blob[16 + mlen:-32]
        bad_model = os.path.join(d, "claims.lcmodel")
        with open(bad_model, "wb") as f:
            f.write(body + hashlib.sha256(body).digest())
        hm, cm = measure("model", model), measure("model", bad_model)
        res["model_file"] = {"honest": hm, "crafted": cm, "memory_ratio": round(cm["peak_rss_mib"] / hm["peak_rss_mib"], 2)}
        print(f"model file: honest loads in {hm['seconds']:.2f} s / {hm['peak_rss_mib']} MiB; crafted refused="
              f"{not cm['accepted']} in {cm['seconds']:.2f} s / {cm['peak_rss_mib']} MiB: memory "
              f"x{res['model_file']['memory_ratio']} (target <= 2)", flush=True)
    os.makedirs(os.path.dirname(a.json), exist_ok=True)
    with open(a.json, "w") as f:
        json.dump(res, f, indent=2)
    print(f"wrote {a.json}")


if __name__ == "__main__":
    main()
