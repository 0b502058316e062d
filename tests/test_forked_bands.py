"""Bands decoded in forked processes (lcodec/frames/forked.py): every band's rows land in the
shared output, the lowest band's failure comes back as itself, the first failure stops the
other bands, a worker that dies is reported, and no child outlives the call."""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from lcodec.coding import SubframeCheckFailed
from lcodec.frames import forked

pytestmark = pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")

BOUNDS = [(0, 3), (3, 6), (6, 9), (9, 12), (12, 14)]


def _children() -> list[int]:
    """This process's children still present (zombies included), from /proc."""
    me, kids = os.getpid(), []
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as f:
                    fields = f.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == me:
                kids.append(int(d))
    return kids


def _filled(b, r0, r1):
    return np.full((r1 - r0, 4, 1), 100 + b, np.int32)


@pytest.mark.parametrize("workers", [2, 3, 5, 8])
def test_every_band_lands_in_the_shared_output(workers):
    before = _children()
    out = forked.shared_array((14, 4, 1), np.int32)
    stop = forked.shared_array((1,), np.uint8)
    pids = forked.shared_array((len(BOUNDS),), np.int64)

    def band(b, r0, r1):
        pids[b] = os.getpid()
        return _filled(b, r0, r1)
    forked.bands_in_processes(band, BOUNDS, workers, out, stop)
    want = np.concatenate([_filled(b, r0, r1) for b, (r0, r1) in enumerate(BOUNDS)])
    assert np.array_equal(out, want) and stop[0] == 0
    # band b ran in worker b % workers: this process for 0, w, 2w, ...; one child each for the rest
    assert all((pids[b] == os.getpid()) == (b % workers == 0) for b in range(len(BOUNDS)))
    assert len(set(pids.tolist())) == min(workers, len(BOUNDS))
    assert _children() == before


def _slow_unless_stopped(stop, steps):
    for _ in range(2000):  # 20 s unless stopped
        if stop[0]:
            raise forked.Stopped
        steps[0] += 1
        time.sleep(0.01)


@pytest.mark.parametrize("failing,workers", [(0, 2), (1, 2), (3, 5), (4, 5)])
def test_the_lowest_failure_comes_back_as_itself_and_stops_the_rest(failing, workers):
    """A band that fails (in this process or in a child) stops the others at their next step;
    its failure is raised as itself (a sub-frame check failure keeps its fields)."""
    before = _children()
    out = forked.shared_array((14, 4, 1), np.int32)
    stop = forked.shared_array((1,), np.uint8)
    steps = forked.shared_array((1,), np.int64)

    def band(b, r0, r1):
        if b == failing:
            time.sleep(0.1)
            raise SubframeCheckFailed(7, 65536 * 7)
        _slow_unless_stopped(stop, steps)
        return _filled(b, r0, r1)
    t = time.monotonic()
    with pytest.raises(SubframeCheckFailed) as got:
        forked.bands_in_processes(band, BOUNDS, workers, out, stop)
    assert (got.value.j, got.value.symbols) == (7, 65536 * 7)
    assert time.monotonic() - t < 10 and steps[0] < 1000
    assert _children() == before


def test_a_failure_that_cannot_travel_is_named():
    class Local(Exception):  # a local class cannot be pickled
        pass
    out, stop = forked.shared_array((14, 4, 1), np.int32), forked.shared_array((1,), np.uint8)

    def band(b, r0, r1):
        if b == 1:
            raise Local("coded words refused")
        return _filled(b, r0, r1)
    with pytest.raises(forked.BandFailed, match="Local: coded words refused"):
        forked.bands_in_processes(band, BOUNDS, 2, out, stop)


def test_a_worker_that_dies_is_reported():
    """A child killed mid-band (as the out-of-memory killer would): an error that says so, not
    output with rows missing."""
    before = _children()
    out, stop = forked.shared_array((14, 4, 1), np.int32), forked.shared_array((1,), np.uint8)

    def band(b, r0, r1):
        if b == 1:
            os.kill(os.getpid(), signal.SIGKILL)
        return _filled(b, r0, r1)
    with pytest.raises(forked.WorkerDied, match="without its result"):
        forked.bands_in_processes(band, BOUNDS, 2, out, stop)
    assert _children() == before


def test_an_interruption_stops_and_reaps_the_children():
    """KeyboardInterrupt in this process's own band (what SIGINT raises here): the children
    are ended and reaped before it goes on."""
    before = _children()
    out, stop = forked.shared_array((14, 4, 1), np.int32), forked.shared_array((1,), np.uint8)
    steps = forked.shared_array((1,), np.int64)

    def band(b, r0, r1):
        if b == 0:
            time.sleep(0.2)
            raise KeyboardInterrupt
        _slow_unless_stopped(np.zeros(1, np.uint8), steps)  # a child that never looks at the flag
        return _filled(b, r0, r1)
    t = time.monotonic()
    with pytest.raises(KeyboardInterrupt):
        forked.bands_in_processes(band, BOUNDS, 3, out, stop)
    assert time.monotonic() - t < 10 and stop[0] == 1
    assert _children() == before


_FRESH = r"""
import sys, numpy as np, skimage.data as skd
from lcodec.frames import forked, imageframe
from lcodec.inputs.layout import Layout, values_region
from lcodec.models import load_model
runs = []
real = forked.bands_in_processes
forked.bands_in_processes = lambda *a: (runs.append(1), real(*a))[1]
m = load_model(sys.argv[1])
a = np.ascontiguousarray(skd.camera()[:64, :48, None])
lay = Layout(0, 64, 48, 1, 1)
raw = values_region(a, lay)
payload, _, _ = imageframe.encode_image_frame(m, raw, lay, bands=4)
assert forked.may_fork(), "a fresh process with a loaded pixel model runs no other thread"
assert imageframe.decode_image_frame(m, payload, len(raw), threads=2) == raw
# an encoder's helper thread (a big chunk's other half) is ended before the bands fork
import threading
from lcodec.models import weft
weft._in_halves(weft.PAR_MIN_ROWS, lambda a, b: None)
assert threading.active_count() == 2 and not forked.may_fork()
assert imageframe.decode_image_frame(m, payload, len(raw), threads=2) == raw
assert threading.active_count() == 1
print(len(runs))
"""


def test_a_fresh_process_decodes_bands_in_forked_workers():
    """What `unpack --threads 2` meets: a fresh process may fork, and takes the forked path;
    so does one that packed a large image first (`pack --verify`)."""
    model = os.path.join(os.path.dirname(__file__), "golden", "tessel-tiny-structure.lcmodel")
    got = subprocess.run([sys.executable, "-c", _FRESH, model], capture_output=True, text=True, timeout=300)
    assert got.returncode == 0 and got.stdout.strip() == "2", got.stderr


def test_a_dead_worker_is_not_called_damage(monkeypatch):
    """Through decode_one: a band worker that died is raised as such (the CLI says it and
    exits non-zero), not reported as a damaged frame."""
    from lcodec.format import container as C
    from lcodec.frames import decode_one, imageframe

    def died(*args):
        raise forked.WorkerDied("a band worker ended without its result (exit status -9); nothing was written")
    monkeypatch.setattr(imageframe, "_fork_ready", lambda: True)
    monkeypatch.setattr(forked, "in_processes", died)
    from lcodec.inputs.layout import Layout, values_region
    from lcodec.models import load_model
    m = load_model(os.path.join(os.path.dirname(__file__), "golden", "tessel-tiny-structure.lcmodel"))
    a = np.arange(48 * 40, dtype=np.uint8).reshape(48, 40, 1)
    lay = Layout(0, 48, 40, 1, 1)
    raw = values_region(a, lay)
    payload, _, _ = imageframe.encode_image_frame(m, raw, lay, bands=2)
    with pytest.raises(forked.WorkerDied):
        decode_one(m, 0, C.METHOD_IMAGE, len(raw), 1, C.crc32c(raw), C.crc32c(payload), payload, True, 2)
