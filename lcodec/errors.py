"""Error types. Every error the user can cause maps to an exit code in the CLI."""
from __future__ import annotations

import signal


class LcodecError(Exception):
    """Base class. `exit_code` is what the CLI returns for it."""

    exit_code = 1


class DataError(LcodecError):
    """Corrupt, truncated or hostile archive, or a content mismatch (exit 1)."""


class ModelError(LcodecError):
    """Wrong, missing or unreadable model (exit 1)."""


class Terminated(BaseException):
    """SIGTERM, raised where the process is (the CLI installs the handler), so that every
    output's cleanup runs as it does for KeyboardInterrupt on SIGINT. Never caught as damage."""


class CeilingError(LcodecError):
    """The archive would decode to more bytes than the output ceiling allows (exit 1)."""


class UsageError(LcodecError):
    """The request itself is wrong: bad option, missing input, refused overwrite (exit 2)."""

    exit_code = 2


# Signals the CLI's handler has taken (lcodec/cli.py), in order. The handler raises at once,
# but an exception raised where Python cannot pass it on is lost there (at the edge of the
# ctypes callback through which a compiled decode loop asks the coder for each step's
# symbols, and in llvmlite's callbacks while numba compiles), so the decode loop also looks
# here at every step (coding/coder.py) and raises what was lost.
PENDING_SIGNALS: list = []
# Depth of fsio.signals_held blocks now running: while it is above 0, the CLI's handler only
# records its signal, and the outermost block raises it when it ends.
HOLDING = [0]


def pending_interruption() -> BaseException | None:
    """The exception of the first signal taken (KeyboardInterrupt, or Terminated for SIGTERM),
    or None."""
    if not PENDING_SIGNALS:
        return None
    return Terminated() if PENDING_SIGNALS[0] == signal.SIGTERM else KeyboardInterrupt()


def raise_pending() -> None:
    """Raise the interruption of a signal the CLI's handler took (pending_interruption), if
    any. A handler's exception can be lost where Python runs the handler (the edge of a ctypes
    callback: the decode loop's, or llvmlite's while numba compiles; a finaliser:
    Python prints "Exception ignored" there and goes on), so outputs are never committed and
    long work never goes on after a signal: fsio checks here before every rename into a
    final name, and the CLI at each progress report."""
    stop = pending_interruption()
    if stop is not None:
        raise stop
