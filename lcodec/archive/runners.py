"""Where frames are coded: in this process, in worker processes, or on a dask cluster.

Frames are independent (every frame starts from a fresh model state), so any worker
may code any frame and the archive is the same bytes whoever coded it: the parent
hands out batches of frames in order, keeps a bounded number in flight, and writes the
results back in frame order (DEVELOPERS.md, "The pipeline").

A worker builds its model once, from a `ModelSpec`: a built-in model's identity, or a
model file's bytes (its identity is their SHA-256). Local workers get the spec through
the pool's initializer; dask workers through a worker plugin registered once per
client, so the model file travels once per worker, never with each task. No numba
state crosses a process: a worker compiles (or loads from numba's cache) its own kernels,
and a model file's bytes are read by modelfile.parse, which never runs code.

Work and results are plain bytes and tuples:
  encode_batch(key, [work, ...])       -> [(record bytes, model NLL bits, stored?, figures), ...]
                                          (work: a frame's bytes, or an ImageWork: frames/)
  decode_batch(key, [(index, method, raw_len, lanes, raw_crc, coded_crc, payload), ...])
                                       -> [(raw bytes or None, problem or None), ...]
"""
from __future__ import annotations

import hashlib
import json
import multiprocessing
import os
from collections import deque
from dataclasses import dataclass

from ..errors import UsageError
from ..format import modelfile
from ..frames import code_frame, decode_one
from ..frames.forked import before_fork, may_fork
from ..models import ARCHITECTURES, BUILTIN, Loaded

BATCH_BYTES = 1 << 17  # frames per task: up to about this many raw bytes (many small files share a task)
BATCH_FRAMES = 256
CONNECT_TIMEOUT_S = 15  # how long --cluster waits for the scheduler


@dataclass(frozen=True)
class ModelSpec:
    """What a worker needs to build the model: picklable, no numba state."""

    kind: str  # "builtin", "file", or "forked" (the workers have the model: ProcessRunner)
    identity_json: str  # the container identity (sorted JSON)
    blob: bytes = b""  # the model file's bytes (kind "file")
    name: str = ""  # the model file's base name (messages and the identity's "file")

    @property
    def key(self) -> str:
        return hashlib.sha256(self.identity_json.encode()).hexdigest()[:32]  # a model file's identity holds its SHA-256


def model_spec(model) -> ModelSpec:
    """The spec of a model object, refused (UsageError) when workers could not rebuild it."""
    ident = model.identity
    text = json.dumps(ident, sort_keys=True, separators=(",", ":"))
    if isinstance(model, Loaded):
        try:
            with open(model.path, "rb") as f:
                blob = f.read()
        except OSError as e:
            raise UsageError(f"cannot read model file {model.path} again for the workers: {e.strerror}") from None
        if hashlib.sha256(blob).hexdigest() != model.sha256:
            raise UsageError(f"model file {model.path} changed since it was loaded; run again")
        return ModelSpec("file", text, blob, os.path.basename(model.path))
    cls = BUILTIN.get(ident.get("model"))
    if cls is not None and "sha256" not in ident:
        rebuilt = cls.from_identity(ident)
        if rebuilt.identity == ident and type(rebuilt) is type(model):
            return ModelSpec("builtin", text)
    raise UsageError("this model object cannot be rebuilt in worker processes; use --jobs 1 "
                     "(or a built-in model or a model file)")


_MODELS: dict = {}  # key -> model object, one per process
_SPECS: dict = {}  # key -> ModelSpec registered in this process


def register(spec: ModelSpec) -> None:
    _SPECS[spec.key] = spec


def model_for(key: str):
    """This process's model for `key`, built on first use."""
    m = _MODELS.get(key)
    if m is None:
        spec = _SPECS.get(key)
        if spec is None:
            raise RuntimeError("this worker has no model registered for the job (worker plugin missing)")
        m = build(spec)
        _MODELS[key] = m
    return m


def build(spec: ModelSpec):
    ident = json.loads(spec.identity_json)
    if spec.kind == "forked":
        raise RuntimeError("a forked worker lost its parent's model")
    if spec.kind == "builtin":
        return BUILTIN[ident["model"]].from_identity(ident)
    meta, arrays, sha = modelfile.parse(spec.blob, where=f"model file {spec.name}")
    arch = meta["architecture"]
    cls = ARCHITECTURES[arch["name"]]
    inner = cls.from_params(arch.get("params", {}), arrays) if arrays else cls.from_params(arch.get("params", {}))
    return Loaded(inner, sha, spec.name, meta)


# -- the work (module level: importable by workers) ------------------------------------------
def encode_batch(key: str, raws: list) -> list:
    m = model_for(key)
    return [None if raw is None else code_frame(m, raw) for raw in raws]


def decode_batch(key: str, items: list) -> list:
    m = model_for(key)
    return [decode_one(m, *it) for it in items]


def _init_worker(spec: ModelSpec) -> None:
    import signal

    # Ctrl-C reaches the whole process group: the parent stops the job and cleans up; a
    # worker only stops when the pool is shut down (no traceback from each worker)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)  # a forked worker must not run the parent's handler
    os.environ.setdefault("NUMBA_NUM_THREADS", "1")
    if spec.key not in _MODELS:  # a forked worker has its parent's model
        register(spec)
        model_for(spec.key)  # build (and compile) now, before the first task


# -- runners ---------------------------------------------------------------------------------
def parse_jobs(value) -> int:
    """--jobs: a positive count, or 0 / 'auto' for every core this process may use."""
    text = str(value).strip().lower()
    if text in ("0", "auto"):
        return available_cores()
    try:
        n = int(text)
    except ValueError:
        raise UsageError(f"--jobs takes a number of processes (1, 2, ...) or 0/auto for every core, not {value!r}") from None
    if n < 0:
        raise UsageError(f"--jobs takes a number of processes (1, 2, ...) or 0/auto for every core, not {value!r}")
    if n > 1024:
        raise UsageError(f"--jobs {n}: at most 1024 processes")
    return n or available_cores()


def available_cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


class Runner:
    """Runs batches in order with at most `window` in flight; yields results in order."""

    window = 1

    def __init__(self, model):
        self.model = model

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self):
        pass

    def submit(self, fn, batch):
        raise NotImplementedError

    def imap(self, fn, batches):
        """(meta, fn(key, work)) for each (meta, work) of `batches`, in order; the batches
        iterator is consumed only as far as the window needs (bounded memory)."""
        pending = deque()
        try:
            for meta, work in batches:
                pending.append((meta, self.submit(fn, work)))
                while len(pending) >= self.window:
                    meta0, f = pending.popleft()
                    yield meta0, self.result(f)
            while pending:
                meta0, f = pending.popleft()
                yield meta0, self.result(f)
        finally:
            for _, f in pending:
                self.cancel(f)

    def result(self, f):
        return f.result()

    def cancel(self, f):
        f.cancel()


class InlineRunner(Runner):
    """--jobs 1: everything in this process, one batch at a time."""

    jobs = 1

    def __init__(self, model):
        super().__init__(model)
        self.key = "inline"
        _MODELS[self.key] = model

    def submit(self, fn, batch):
        return (fn, batch)

    def result(self, f):
        fn, batch = f
        return fn(self.key, batch)

    def cancel(self, f):
        pass


class ProcessRunner(Runner):
    """--jobs N: a pool of N worker processes. Forked when that is safe (may_fork): the
    workers then share this process's model, already built, page for page until one writes
    (a model file's tables are read-only), and start at once; a worker of a 64 MB model
    file otherwise reads, checks and builds it again, about a second each. Else forkserver,
    else spawn: never a bare fork of a process that holds other threads."""

    def __init__(self, model, jobs: int):
        from concurrent.futures import ProcessPoolExecutor

        super().__init__(model)
        self.jobs, self.window = jobs, 2 * jobs
        if may_fork():
            before_fork()
            ctx = multiprocessing.get_context("fork")
            spec = ModelSpec("forked", json.dumps(model.identity, sort_keys=True, separators=(",", ":")))
            _MODELS[spec.key] = model  # the workers find it built (model_for)
        else:
            spec = model_spec(model)
            methods = multiprocessing.get_all_start_methods()
            ctx = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
        self.key = spec.key
        self.pool = ProcessPoolExecutor(max_workers=jobs, mp_context=ctx, initializer=_init_worker, initargs=(spec,))

    def submit(self, fn, batch):
        return self.pool.submit(fn, self.key, batch)

    def result(self, f):
        from concurrent.futures.process import BrokenProcessPool

        try:
            return f.result()
        except BrokenProcessPool:
            raise UsageError("a worker process died (out of memory, or killed); nothing was written "
                             "under the final name") from None

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            self.stop_workers()
        self.close()

    def stop_workers(self):
        """An error or an interruption left the job: what the workers are doing is not
        wanted. They get SIGTERM now (their handler is the default: they end at once)
        instead of being waited for; the pool, seeing them gone, fails what is pending and
        releases its queues. A wait could otherwise hang: a worker ended mid-task by the
        same signal (a process group's SIGTERM) can leave the pool's queues as no live
        process reads them."""
        for proc in list((getattr(self.pool, "_processes", None) or {}).values()):
            try:
                proc.terminate()
            except (OSError, AttributeError):  # already gone
                pass

    def close(self):
        self.pool.shutdown(wait=True, cancel_futures=True)


def _dask():
    try:
        import distributed
    except ImportError:
        raise UsageError("--cluster needs dask.distributed: pip install 'lcodec[cluster]'") from None
    return distributed


def _plugin_class():
    from distributed.diagnostics.plugin import WorkerPlugin

    class LcodecModel(WorkerPlugin):
        """Carries one model spec to each worker once; the worker builds the model on setup."""

        def __init__(self, spec: ModelSpec):
            self.spec = spec
            self.name = f"lcodec-model-{spec.key}"

        def setup(self, worker):
            _init_worker(self.spec)

    return LcodecModel


class ClusterRunner(Runner):
    """--cluster ADDRESS: the same batches on an existing dask.distributed cluster."""

    def __init__(self, model, address: str, client=None):
        distributed = _dask()
        super().__init__(model)
        spec = model_spec(model)
        self.key = spec.key
        self.own_client = client is None
        if client is None:
            try:
                client = distributed.Client(address, timeout=f"{CONNECT_TIMEOUT_S}s", set_as_default=False)
            except (OSError, TimeoutError, ValueError) as e:
                raise UsageError(f"cannot reach the dask scheduler at {address}: {e}") from None
        self.client = client
        try:
            client.register_plugin(_plugin_class()(spec))
        except Exception as e:  # a worker without lcodec installed, a model it refuses
            self.close()
            raise UsageError(f"the cluster's workers cannot load the model: {type(e).__name__}: {e}") from None
        threads = sum((client.nthreads() or {}).values()) or 1
        self.jobs = threads
        self.window = 2 * threads + 2

    def submit(self, fn, batch):
        data = self.client.scatter(batch, hash=False)  # straight to a worker, not through the scheduler's graph
        return self.client.submit(fn, self.key, data, pure=False)

    def result(self, f):
        try:
            return f.result()
        finally:
            f.release()

    def cancel(self, f):
        try:
            f.cancel()
        except Exception:
            pass

    def close(self):
        if self.own_client and self.client is not None:
            try:
                self.client.close()
            except Exception:
                pass
            self.client = None


def runner(model, jobs: int = 1, cluster=None) -> Runner:
    """The runner for --jobs / --cluster (cluster: an address, or a distributed.Client)."""
    if cluster is not None:
        if isinstance(cluster, str):
            return ClusterRunner(model, cluster)
        return ClusterRunner(model, "", client=cluster)
    if jobs is None or jobs <= 1:
        return InlineRunner(model)
    return ProcessRunner(model, jobs)


def batches(items, work_of, size_of=len):
    """Group consecutive items into (items, [work_of(item), ...]) of up to BATCH_BYTES (by
    size_of) or BATCH_FRAMES items."""
    cur, n = [], 0
    for it in items:
        cur.append(it)
        n += size_of(it)
        if n >= BATCH_BYTES or len(cur) >= BATCH_FRAMES:
            yield cur, [work_of(x) for x in cur]
            cur, n = [], 0
    if cur:
        yield cur, [work_of(x) for x in cur]
