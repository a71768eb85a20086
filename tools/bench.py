#!/usr/bin/env python
"""Run one of patchloom's benchmarks; the same as `patchloom bench BENCHMARK ...`.

    python tools/bench.py pipeline --corpus recipes/pretrain.yaml
    python tools/bench.py pipeline --corpus photos --repeats 5 --json bench.json
    python tools/bench.py drops --corpus demo

BENCHMARK is pipeline, drops, packing, resume, workers or soak; `--corpus` is `photos`, `demo`
(default) or a recipe YAML file. The built-in corpora are made on first use (./patchloom-bench,
./patchloom-demo). `python tools/bench.py BENCHMARK --help` lists a benchmark's own options.
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
