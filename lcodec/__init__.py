"""lcodec: lossless compression driven by learned and adaptive density models."""
__version__ = "0.1.0"

from .api import (info, pack, pack_each, pack_paths, pack_stats, pack_to, unpack, unpack_to_dir,  # noqa: E402,F401
                  unpack_to_file, verify)
from .errors import DataError, LcodecError, ModelError, UsageError  # noqa: E402,F401
