#!/usr/bin/env python3
"""Make the demo corpus: `python corpora/make_demo.py OUT_DIR [--scale X]`.

The generator lives in the package (lcodec/democorpus.py) so that `lcodec demo` works
wherever lcodec is installed; this script is its command-line entry in corpora/.
"""
import os
import sys

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))

from lcodec.demo.corpus import build_files, generate, main, split_names  # noqa: E402,F401

if __name__ == "__main__":
    sys.exit(main())
