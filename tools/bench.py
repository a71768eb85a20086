#!/usr/bin/env python
"""Time a recipe's pipeline beside the plain square-resize baseline (a thin wrapper over patchloom.bench).

    python tools/bench.py recipes/pretrain.yaml
    python tools/bench.py demo --repeats 5 --json bench.json

RECIPE is a YAML file, or `demo` for the built-in demo recipe of `patchloom demo`. When the shards
lie in ./patchloom-demo and are absent, the demo shards are made there first.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

try:
    import patchloom  # noqa: F401
except ImportError:  # run from a checkout without installing: use the repository's src/
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))

from patchloom.bench import ensure_demo_shards, format_bench, run_bench
from patchloom.cli import DEMO_RECIPE
from patchloom.demodata import demo_shard_pattern
from patchloom.pipeline import SampleError
from patchloom.recipe import Recipe, RecipeError
from patchloom.sources import SourceError

DEMO_DIR = Path("patchloom-demo")


def main(argv: list[str] | None = None) -> int:
    """Parse arguments, run the benchmark, print the table; exit status 0 on success."""
    parser = argparse.ArgumentParser(description="Benchmark a recipe's pipeline against a square-resize baseline.")
    parser.add_argument("recipe", help="recipe YAML file, or `demo` for the built-in demo recipe")
    parser.add_argument("--shards", help="shard spec overriding the recipe's source.shards")
    parser.add_argument("--repeats", type=int, default=3, help="interleaved runs of each side (default: 3)")
    parser.add_argument("--max-images", type=int, help="stop each run after about this many images")
    parser.add_argument("--json", metavar="FILE", help="also write the full result as JSON")
    parser.add_argument("--no-progress", action="store_true", help="no progress bars")
    args = parser.parse_args(argv)
    progress = not args.no_progress
    try:
        if args.recipe == "demo":
            recipe = Recipe.from_dict(DEMO_RECIPE, origin="built-in demo recipe")
            shards = args.shards or demo_shard_pattern(DEMO_DIR, shards=4)
        else:
            recipe = Recipe.from_file(args.recipe)
            shards = args.shards
        spec = shards if shards is not None else recipe.source.shards
        if ensure_demo_shards(spec, demo_dir=DEMO_DIR, progress=progress):
            print(f"made demo shards in {DEMO_DIR}", file=sys.stderr)
        result = run_bench(recipe, shards=shards, max_images=args.max_images, repeats=args.repeats,
                           progress=progress)
    except (RecipeError, SourceError, SampleError, ValueError) as err:
        print(f"bench: error: {err}", file=sys.stderr)
        return 2
    print(format_bench(result))
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
