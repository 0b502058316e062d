"""lcodec: lossless compression driven by learned and adaptive density models.

The library's entry points (pack, unpack, verify, info, ... and the error classes) are
imported on first use, so that the command line can set up the process (its BLAS thread
count, lcodec.cli) before numpy loads."""
from .version import __version__  # noqa: F401

_API = ("info", "pack", "pack_each", "pack_paths", "pack_stats", "pack_to", "unpack", "unpack_to_dir",
        "unpack_to_file", "verify")
_ERRORS = ("DataError", "LcodecError", "ModelError", "UsageError")
__all__ = list(_API + _ERRORS)


def __getattr__(name):
    if name in _API:
        from . import api
        return getattr(api, name)
    if name in _ERRORS:
        from . import errors
        return getattr(errors, name)
    raise AttributeError(f"module 'lcodec' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + __all__)
