"""Training: everything that fits a model or imports torch. `train.py` dispatches on the
preset (weft and tessel: quantisation-aware training in float torch, then an integer
export; braid: braid_build.py counts a corpus, braid_train.py fits its discounts). Decoding
never imports this package (tests/test_layers.py)."""
