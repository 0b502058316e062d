"""Measurement: the per-file bench against general compressors (bench.py, baselines.py),
the image bench (imagebench.py), report pages (report.py) and per-byte costs (explain.py).
Everything here packs and unpacks through the archive layer, like a user would."""
