"""Safe file-system work: atomic writes, no silent overwrites, inputs never touched."""
from __future__ import annotations

import contextlib
import os
import shutil
import signal
import stat
import tempfile
import threading

from .errors import HOLDING, PENDING_SIGNALS, DataError, UsageError, raise_pending

ARCHIVE_EXT = ".lcodec"


def _os_error(action: str, path: str, e: OSError) -> UsageError:
    return UsageError(f"cannot {action} {path}: {e.strerror or e}")


def _umask() -> int:
    try:  # Linux: read it without changing it
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    old = os.umask(0o022)
    os.umask(old)
    return old


_HELD = (signal.SIGINT, signal.SIGTERM)
_LIVE: set = set()  # OutFiles whose temporary file exists and is neither committed nor removed


@contextlib.contextmanager
def signals_held():
    """SIGINT and SIGTERM held back while the block runs, raised when it ends: a temporary
    file's creation and the record of its name, constriction's first call (coding/coder.py).
    Two holds, since blocking a signal in this thread does not stop the kernel from handing
    it to another thread of the process (numpy's BLAS threads), after which Python runs the
    handler in the main thread all the same:
    * in the main thread (where Python runs signal handlers), the CLI's handler, run inside
      the block, records the signal and returns (errors.HOLDING); the outermost block
      raises it when it ends. A block in another thread leaves the handler as it is;
    * where the platform has pthread_sigmask, the signals are also blocked in this thread,
      and delivered when the block ends."""
    old = signal.pthread_sigmask(signal.SIG_BLOCK, _HELD) if hasattr(signal, "pthread_sigmask") else None
    main = threading.current_thread() is threading.main_thread()
    before = len(PENDING_SIGNALS)
    HOLDING[0] += main
    try:
        yield
    finally:
        HOLDING[0] -= main
        if old is not None:
            signal.pthread_sigmask(signal.SIG_SETMASK, old)
    if main and not HOLDING[0] and len(PENDING_SIGNALS) > before:
        raise_pending()


def remove_live_temporaries() -> None:
    """Remove the temporary file of every OutFile with a made-up temporary name that is
    neither committed nor removed (the CLI calls this when interrupted: a signal can land
    between an OutFile's creation and the `with` or `try` that would remove it). A fixed
    temporary name (tmp_name: a resumable job's partial archive) is its caller's to keep or
    remove."""
    for out in list(_LIVE):
        if out.made_up_name:
            out.abort()


def atomic_write(path: str, data: bytes, force: bool = False, mode: int | None = None) -> None:
    """Write via a temporary name in the same folder, fsync, then rename into place.
    The file gets `mode`, or what a plain open() would give (0o666 less the umask), not
    the temporary file's private 0o600."""
    if os.path.lexists(path) and not force:
        raise UsageError(f"{path} exists; pass --force to overwrite it")
    if os.path.isdir(path):
        raise UsageError(f"{path} is a folder; give a file name")
    folder = os.path.dirname(os.path.abspath(path))
    tmp = None
    try:
        # no interruption between the file's creation and `tmp` naming it (a signal held
        # back here is taken as the block ends, and the handlers below then remove it)
        with signals_held():
            fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=".part", dir=folder)
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, stat.S_IMODE(mode) if mode is not None else 0o666 & ~_umask())
        raise_pending()  # a signal taken before this point, its exception lost: no final name
        os.replace(tmp, path)
    except OSError as e:
        if tmp is None:
            raise _os_error("write into", folder, e) from None
        _remove_quietly(tmp)
        raise _os_error("write", path, e) from None
    except BaseException:
        if tmp is not None:
            _remove_quietly(tmp)
        raise


class OutFile:
    """A file written in pieces under a temporary name in the output's folder, synced and
    renamed into place by `commit()`; `abort()` (or an exception inside `with`) removes it.
    `tmp_name` fixes the temporary name (a resumable job keeps it between runs; `keep`
    leaves it on abort so a later run can continue it)."""

    def __init__(self, path: str, force: bool = False, mode: int | None = None, tmp_name: str | None = None,
                 resume: bool = False):
        if os.path.lexists(path) and not force:
            raise UsageError(f"{path} exists; pass --force to overwrite it")
        if os.path.isdir(path):
            raise UsageError(f"{path} is a folder; give a file name")
        self.path, self.mode, self.keep, self.made_up_name = path, mode, False, tmp_name is None
        folder = os.path.dirname(os.path.abspath(path))
        self.f = None
        try:
            with signals_held():  # created and recorded (remove_live_temporaries) with no interruption between
                if tmp_name is None:
                    fd, self.tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=".part",
                                                    dir=folder)
                    self.f = os.fdopen(fd, "w+b")
                else:
                    self.tmp = os.path.join(folder, tmp_name)
                    if resume and os.path.isfile(self.tmp) and not os.path.islink(self.tmp):
                        self.f = open(self.tmp, "r+b")
                    else:
                        fd = os.open(self.tmp, os.O_RDWR | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW, 0o600)
                        self.f = os.fdopen(fd, "w+b")
                _LIVE.add(self)
        except OSError as e:
            raise _os_error("write into", folder, e) from None

    def __enter__(self):
        return self

    def __exit__(self, et, ev, tb):
        if et is None:
            try:
                self.commit()
            except BaseException:
                self.abort()
                raise
        else:
            self.abort()

    def sync(self) -> None:
        self.f.flush()
        os.fsync(self.f.fileno())

    def commit(self) -> None:
        if self.f is None:
            return
        raise_pending()  # a signal taken while the work ran, its exception lost: no final name
        try:
            self.sync()
            self.f.close()
            self.f = None
            os.chmod(self.tmp, stat.S_IMODE(self.mode) if self.mode is not None else 0o666 & ~_umask())
            raise_pending()
            os.replace(self.tmp, self.path)
            _LIVE.discard(self)
        except OSError as e:
            self.abort()
            raise _os_error("write", self.path, e) from None

    def abort(self) -> None:
        if self.f is not None:
            try:
                self.f.close()
            except OSError:
                pass
            self.f = None
        if not self.keep:
            _remove_quietly(self.tmp)
        _LIVE.discard(self)


def _remove_quietly(p: str) -> None:
    try:
        if os.path.isdir(p) and not os.path.islink(p):
            shutil.rmtree(p)
        else:
            os.unlink(p)
    except OSError:
        pass


def _input_error(path: str, e: OSError) -> Exception:
    """The message for an input that cannot be read."""
    if isinstance(e, FileNotFoundError):
        return UsageError(f"{path}: no such file")
    if isinstance(e, IsADirectoryError):
        return UsageError(f"{path} is a folder")
    return _os_error("read", path, e)


def read_input(path: str) -> bytes:
    try:
        with open(path, "rb") as f:
            return f.read()
    except OSError as e:
        raise _input_error(path, e) from None


def map_input(path: str):
    """A file's bytes without reading them into memory: a read-only mmap (b"" when empty).
    Pages are read from the file as they are touched and may be dropped again by the
    kernel, so a large archive costs address space, not memory."""
    import mmap

    try:
        with open(path, "rb") as f:
            size = os.fstat(f.fileno()).st_size
            if size == 0 or not stat.S_ISREG(os.fstat(f.fileno()).st_mode):
                return f.read()
            return mmap.mmap(f.fileno(), 0, access=mmap.ACCESS_READ)
    except OSError as e:
        raise _input_error(path, e) from None


def map_stream(stream):
    """A binary stream (stdin) spooled to an unnamed temporary file, then mapped."""
    import mmap
    import shutil

    spool = tempfile.TemporaryFile()
    shutil.copyfileobj(stream, spool, 1 << 20)
    spool.flush()
    if spool.tell() == 0:
        spool.close()
        return b""
    mm = mmap.mmap(spool.fileno(), 0, access=mmap.ACCESS_READ)
    spool.close()  # the mapping keeps the file's pages
    return mm


def safe_member_path(rel: str) -> str:
    """Refuse member paths that could escape the output folder."""
    parts = rel.split("/")
    if rel.startswith("/") or any(p in ("", ".", "..") for p in parts) or "\x00" in rel:
        raise DataError(f"member path {rel!r} is unsafe (absolute, empty or climbing out); refusing to write it")
    return os.path.join(*parts)


def collect_inputs(paths: list[str]):
    """Expand files and folders into (relative archive path, absolute path, stat) in a stable order.

    A folder contributes its own name as the first path component; symlinks and special
    files are skipped (reported through the returned `skipped` list).
    """
    items, skipped, seen = [], [], set()
    for p in paths:
        if not os.path.lexists(p):
            raise UsageError(f"{p}: no such file or folder")
        base = os.path.basename(os.path.normpath(os.path.abspath(p)))
        if os.path.isdir(p) and not os.path.islink(p):
            for dirpath, dirnames, filenames in os.walk(p):
                dirnames.sort()
                rel_dir = os.path.relpath(dirpath, p)
                prefix = base if rel_dir == "." else base + "/" + rel_dir.replace(os.sep, "/")
                st = os.stat(dirpath)
                items.append((prefix, dirpath, st))
                for name in sorted(filenames):
                    full = os.path.join(dirpath, name)
                    st = os.lstat(full)
                    if stat.S_ISREG(st.st_mode):
                        items.append((prefix + "/" + name, full, st))
                    else:
                        skipped.append(full)
                for name in list(dirnames):
                    if os.path.islink(os.path.join(dirpath, name)):
                        skipped.append(os.path.join(dirpath, name))
                        dirnames.remove(name)
        else:
            st = os.lstat(p)
            if not stat.S_ISREG(st.st_mode):
                raise UsageError(f"{p} is not a regular file")
            items.append((base, p, st))
    for rel, _, _ in items:
        if rel in seen:
            raise UsageError(f"two inputs would share the archive path {rel!r}; pack them from different folders")
        seen.add(rel)
    return items, skipped
