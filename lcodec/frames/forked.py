"""Work split over forked processes that share this one's memory: the bands of one large
image, decoded or encoded (imageframe), and the test that says when forking is safe
(archive's `--jobs` pool uses it too).

Why processes and not threads: a band's wavefront calls a compiled kernel about twenty
times per table, and each call hands Python's global lock over. Two band threads in one
process spent about 1 s more CPU than one on a 1 MP 16-bit image and gained 1.3-1.5x; two
processes gain nearly 2x. A forked child shares the parent's model and coded words page
for page, so it starts at once, and writes its samples straight into shared memory.
"""
from __future__ import annotations

import mmap
import multiprocessing
import os
import pickle
import signal

import numpy as np

from ..errors import LcodecError


def may_fork() -> bool:
    """Whether worker processes may be forked from this one: the platform forks, and this
    process runs no other thread (no Python thread, numba's thread pool never started), so
    no lock can be copied while another thread holds it."""
    import threading

    if "fork" not in multiprocessing.get_all_start_methods() or threading.active_count() != 1:
        return False
    try:
        from numba.np.ufunc import parallel
    except ImportError:
        return False
    return not getattr(parallel, "_is_initialized", True)


def before_fork() -> None:
    """BLAS on one thread (`limit_blas`, for the rest of the process) before any fork: a
    forked child has none of OpenBLAS's pool threads, and a product large enough to be split
    over them (an encoder's chunk) waited for them forever there."""
    from ..models.tessel_common import limit_blas

    limit_blas()


class Stopped(Exception):
    """A band's decoder stopped because another band failed or the caller was interrupted."""


class BandFailed(Exception):
    """A failure in a forked band worker that could not travel back as itself."""


class WorkerDied(LcodecError):
    """A forked band worker ended without reporting its bands (killed, or out of memory)."""


def shared_array(shape, dtype) -> np.ndarray:
    """A zeroed array in anonymous shared memory: a forked child's writes are seen here."""
    count = int(np.prod(shape))
    buf = mmap.mmap(-1, max(count * np.dtype(dtype).itemsize, 1))
    return np.frombuffer(buf, dtype, count=count).reshape(shape)


def in_processes(work, count: int, workers: int, stop: np.ndarray) -> list:
    """[work(0), ..., work(count - 1)] computed by `workers` processes: this one takes items
    0, w, 2w, ..., forked child k items k, k + w, .... A child's results come back pickled
    (work may instead write into shared memory, `shared_array`, and return None). work must
    raise Stopped once stop[0] is set (shared memory too): the first failure sets it, so the
    other items end at their next step, and the failure of the lowest item that failed is
    raised. An interruption here stops and reaps every child before it goes on."""
    before_fork()
    children = []  # [pid, read fd or -1, its items], until reaped
    results: list = [None] * count
    failures: dict[int, BaseException] = {}
    try:
        for k in range(1, workers):
            mine = list(range(k, count, workers))
            if not mine:
                continue
            r, w = os.pipe()
            try:
                pid = os.fork()
            except BaseException:
                os.close(r)
                os.close(w)
                raise
            if pid == 0:  # the child: never returns
                os.close(r)
                _child(work, mine, stop, w)
            os.close(w)
            children.append([pid, r, mine])
        done, failed = _run(work, range(0, count, workers), stop)
        for k, got in done.items():
            results[k] = got
        failures.update(failed)
        if failures:
            _end(children)
        while children:
            pid, fd, mine = children[0]
            report = _read_all(fd)
            os.close(fd)
            children[0][1] = -1
            _, status = os.waitpid(pid, 0)
            children.pop(0)
            if report:
                done, failed = pickle.loads(report)
                for k, got in done.items():
                    results[k] = got
                failures.update({k: _revive(e) for k, e in failed.items()})
            elif not failures and not stop[0]:
                code = os.waitstatus_to_exitcode(status)
                raise WorkerDied(f"a band worker ended without its result (exit status {code}); "
                                 "nothing was written")
    except BaseException:
        stop[0] = 1
        _end(children)
        _reap(children)
        raise
    real = {k: e for k, e in failures.items() if not isinstance(e, Stopped)}
    if real:
        raise real[min(real)]
    return results


def bands_in_processes(band, bounds, workers: int, out: np.ndarray, stop: np.ndarray) -> None:
    """Decode every band into `out` (shared memory, `shared_array`), rows r0:r1 for band
    (r0, r1) = bounds[b], with `workers` processes (`in_processes`); band(b, r0, r1) returns
    the band's samples."""
    def one(b: int) -> None:
        r0, r1 = bounds[b]
        out[r0:r1] = band(b, r0, r1)
    in_processes(one, len(bounds), workers, stop)


def _run(work, mine, stop) -> tuple[dict, dict]:
    """work(k) for the items `mine` in order -> ({item: result}, {item: failure}): the
    first failure, if any, sets stop[0] and ends the run."""
    done = {}
    for k in mine:
        if stop[0]:
            break
        try:
            done[k] = work(k)
        except Stopped:
            break
        except (KeyboardInterrupt, SystemExit):
            raise
        except BaseException as e:  # a constriction panic is a BaseException: damage all the same
            stop[0] = 1
            return done, {k: e}
    return done, {}


def _child(work, mine, stop, w) -> None:
    """A forked worker: its items, then (results, failures) pickled on pipe w; it leaves at
    once with os._exit (no exit handlers, no flushed buffers: those are the parent's)."""
    code = 0
    try:
        try:  # a signal ends a child at once (the parent reaps it and reports)
            signal.signal(signal.SIGINT, signal.SIG_DFL)
            signal.signal(signal.SIGTERM, signal.SIG_DFL)
        except ValueError:  # forked from a thread other than the main one: handlers stay
            pass
        from ..models.weft import forget_pool

        forget_pool()
        done, failed = _run(work, mine, stop)
        view = memoryview(pickle.dumps((done, {k: _portable(e) for k, e in failed.items()})))
        while view:
            view = view[os.write(w, view):]
    except BaseException:
        code = 1
    finally:
        os._exit(code)


def _portable(e: BaseException):
    """The failure as the parent can unpickle it; else its type's name and message."""
    try:
        pickle.loads(pickle.dumps(e))
        return e
    except Exception:
        return ("failure", type(e).__name__, str(e))


def _revive(e):
    if isinstance(e, tuple) and len(e) == 3 and e[0] == "failure":
        return BandFailed(f"{e[1]}: {e[2]}")
    return e


def _read_all(fd: int) -> bytes:
    parts = []
    while True:
        try:
            chunk = os.read(fd, 1 << 16)
        except InterruptedError:
            continue
        if not chunk:
            return b"".join(parts)
        parts.append(chunk)


def _end(children) -> None:
    """SIGTERM to every child not yet reaped: what they decode is not wanted."""
    for pid, _, _ in children:
        try:
            os.kill(pid, signal.SIGTERM)
        except ProcessLookupError:
            pass


def _reap(children) -> None:
    for pid, fd, _ in children:
        if fd >= 0:
            os.close(fd)
        try:
            os.waitpid(pid, 0)
        except ChildProcessError:
            pass
    children.clear()
