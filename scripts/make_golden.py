#!/usr/bin/env python3
"""Write the golden containers in tests/golden/ (format v1). Run only when adding a vector:
existing vectors are never regenerated (see the format-change rules in DEVELOPERS.md)."""
import os
import random
import sys

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))
import lcodec  # noqa: E402

HERE = os.path.join(os.path.dirname(__file__), "..", "tests", "golden")


def sample_text(seed: int, n: int) -> bytes:
    """Log-like lines from a fixed generator (invented stations of the demo scenario)."""
    rng = random.Random(seed)
    stations = ["kestrel-ridge", "mount-orrin", "vale-of-tess", "harrow-peak"]
    kinds = ["wind", "pressure", "tremor", "battery", "link"]
    out, t = [], 1_700_000_000
    while sum(map(len, out)) < n:
        t += rng.randint(1, 90)
        out.append(f"{t} {rng.choice(stations)} {rng.choice(kinds)}={rng.gauss(50, 12):.2f} "
                   f"q={rng.randint(0, 3)}\n")
    return "".join(out).encode()[:n]


def golden_weft():
    """A tiny trained weft model and a container made with it (needs torch)."""
    from lcodec import train as T

    mpath = os.path.join(HERE, "weft-tiny.lcmodel")
    arc, orig = os.path.join(HERE, "weft-v1-text.lcodec"), os.path.join(HERE, "weft-v1-text.orig")
    if os.path.exists(arc):
        print(f"keep {arc}")
        return
    import tempfile
    with tempfile.TemporaryDirectory() as d:
        for i in range(8):
            with open(os.path.join(d, f"log{i}.txt"), "wb") as f:
                f.write(sample_text(100 + i, 30_000))
        T.train([d], mpath, time_limit=20, preset="tiny", seed=0, echo=print)
    data = sample_text(9, 12_000)
    with open(orig, "wb") as f:
        f.write(data)
    with open(arc, "wb") as f:
        f.write(lcodec.pack(data, model=mpath, frame_size=4096))
    print(f"wrote {arc}")


def golden_braid():
    """A tiny braid model counted from generated log lines, and a container made with it."""
    from lcodec import train as T

    mpath = os.path.join(HERE, "braid-tiny.lcmodel")
    arc, orig = os.path.join(HERE, "braid-v1-text.lcodec"), os.path.join(HERE, "braid-v1-text.orig")
    if os.path.exists(arc):
        print(f"keep {arc}")
        return
    import tempfile
    with tempfile.TemporaryDirectory() as d:
        for i in range(10):
            with open(os.path.join(d, f"log{i}.txt"), "wb") as f:
                f.write(sample_text(200 + i, 6_000))
        T.train([d], mpath, time_limit=5, preset="braid-lean", seed=0, echo=print)
    data = sample_text(19, 12_000)
    with open(orig, "wb") as f:
        f.write(data)
    with open(arc, "wb") as f:
        f.write(lcodec.pack(data, model=mpath, frame_size=4096))
    print(f"wrote {arc}")


def main():
    os.makedirs(HERE, exist_ok=True)
    vectors = {"strata-v1-text": sample_text(1, 20_000), "strata-v1-binary": bytes(random.Random(2).randbytes(3000)) + bytes(range(256)) * 8}
    for name, data in vectors.items():
        arc, orig = os.path.join(HERE, name + ".lcodec"), os.path.join(HERE, name + ".orig")
        if os.path.exists(arc):
            print(f"keep {arc}")
            continue
        with open(orig, "wb") as f:
            f.write(data)
        with open(arc, "wb") as f:
            f.write(lcodec.pack(data, frame_size=8192))
        print(f"wrote {arc}")
    golden_weft()
    golden_braid()


if __name__ == "__main__":
    main()
