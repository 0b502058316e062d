import os
import sysconfig

import pytest


@pytest.fixture(scope="session")
def stdlib_text() -> bytes:
    """About 300 KB of real text: the Python standard library's own sources, in a fixed order."""
    lib = sysconfig.get_paths()["stdlib"]
    names = sorted(f for f in os.listdir(lib) if f.endswith(".py"))
    out = b""
    for f in names:
        with open(os.path.join(lib, f), "rb") as fh:
            out += fh.read()
        if len(out) > 300_000:
            break
    return out
