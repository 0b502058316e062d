"""The package's version, in a module of its own so that any layer may read it."""
__version__ = "0.1.0"
