#!/usr/bin/env python
"""Time a recipe's pipeline beside the plain square-resize baseline; same as `patchloom bench`.

    python tools/bench.py recipes/pretrain.yaml
    python tools/bench.py demo --repeats 5 --json bench.json

RECIPE is a YAML file, or `demo` for the built-in demo recipe of `patchloom demo`. When the shards
lie in ./patchloom-demo and are absent, the demo shards are made there first.
"""

from __future__ import annotations

import sys
from pathlib import Path

try:
    import patchloom  # noqa: F401
except ImportError:  # run from a checkout without installing: use the repository's src/
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))

from patchloom.cli.main import main

if __name__ == "__main__":
    sys.exit(main(["bench", *sys.argv[1:]]))
