"""Formats: the container (container.py, byte layout in docs/FORMAT.md) and model files
(modelfile.py: JSON metadata plus raw arrays, a SHA-256 trailer, never code). Bytes in,
validated structures out; nothing here knows a model or a coder."""
