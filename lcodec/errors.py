"""Error types. Every error the user can cause maps to an exit code in the CLI."""


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
