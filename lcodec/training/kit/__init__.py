"""The layer kit: build an autoregressive model of your own in torch, train it with your own
loop, and export it as a heddle model file that lcodec runs with integers only.

    from lcodec.training import kit
    net = kit.HeddleNet((8, 8), 17, kit.SymbolEmbed(17, 8), [...layers...])
    loss = kit.nll(net, batch)             # teacher forcing: every position in one pass
    kit.export(net, "digits.lcmodel")     # JSON + integer arrays + SHA-256, never code
    kit.audit(net, records)               # causality, passes, threads, float vs integer NLL

Layers (layers.py): SymbolEmbed (with causal_window), DegreeLinear (mask_degrees,
grid_degrees), RasterConv, Residual, HeddleNet. The runtime is lcodec/models/heddle.py.
"""
from .layers import (MAX_FAN_IN, DegreeLinear, Dropout, HeddleNet, RasterConv, Residual, SymbolEmbed,  # noqa: F401
                     causal_window, fake_quant, from_coding_order, grid_degrees, mask_degrees, ste_round,
                     to_coding_order)
from .export import export, graph_of, integer_tables  # noqa: F401
from .helpers import nll, sample  # noqa: F401
from .audit import audit  # noqa: F401
