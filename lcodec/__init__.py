"""lcodec: lossless compression driven by learned and adaptive density models."""
__version__ = "0.1.0"

from .api import info, pack, pack_paths, pack_stats, unpack, unpack_to_dir, verify  # noqa: E402,F401
from .errors import DataError, LcodecError, ModelError, UsageError  # noqa: E402,F401
