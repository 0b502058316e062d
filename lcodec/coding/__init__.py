"""The coding layer: one frame's lanes and integer tables in, 32-bit words out, through
constriction (the range coder "queue" or the ANS coder "stack"). It sees only the model
protocol's integer tables, never a model's internals.

The code still lives in lcodec/coder.py (being rewritten on the speed branch); this
package is the layer's name in the layout and re-exports it. After both branches have
merged, coder.py moves here.
"""
from ..coder import active_lanes, decode_frame, encode_frame, lane_layout  # noqa: F401
