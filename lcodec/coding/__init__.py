"""The coding layer: one frame's lanes and integer tables in, 32-bit words out, through
constriction (the range coder "queue" or the ANS coder "stack"). It sees only the model
protocol's integer tables, never a model's internals.
The code is in coder.py; the names callers use are here too.
"""
from .coder import (CHECK_EVERY, CheckedDecoder, CheckedEncoder, SubframeCheckFailed, active_lanes,  # noqa: F401
                    decode_frame, encode_frame, lane_layout)
