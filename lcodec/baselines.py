"""Old import path of lcodec.measure.baselines (the general-purpose baselines); the same module object.

Kept only until the tests that still import it (on the speed branch) name the new path;
nothing inside the package imports it (tests/test_layers.py checks that).
"""
import sys

from .measure import baselines as _module

sys.modules[__name__] = _module
