#!/usr/bin/env python
"""Write the built-in Gullwick Point demo shards to a folder (a thin wrapper over patchloom.demo.data)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

try:
    from patchloom.demo.data import DEMO_CORRUPT_KEYS, demo_shard_pattern, make_demo_shards
except ImportError:  # run from a checkout without installing: use the repository's src/
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))
    from patchloom.demo.data import DEMO_CORRUPT_KEYS, demo_shard_pattern, make_demo_shards


def main(argv: list[str] | None = None) -> int:
    """Parse arguments, write the shards, print where they went; exit status 0 on success."""
    parser = argparse.ArgumentParser(description="Write the synthetic Gullwick Point demo shards.")
    parser.add_argument("--out", type=Path, default=Path("demo_data"), help="output folder (default: demo_data)")
    parser.add_argument("--shards", type=int, default=4, help="number of tar shards (default: 4)")
    parser.add_argument("--per-shard", type=int, default=40, help="samples per shard (default: 40)")
    parser.add_argument("--seed", type=int, default=0, help="seed; the same seed gives identical shards (default: 0)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    args = parser.parse_args(argv)
    try:
        paths = make_demo_shards(args.out, shards=args.shards, per_shard=args.per_shard, seed=args.seed,
                                 progress=not args.quiet)
    except ValueError as err:
        parser.error(str(err))
    size = sum(p.stat().st_size for p in paths)
    print(f"wrote {len(paths)} shards ({size / 1e6:.1f} MB): {demo_shard_pattern(args.out, shards=len(paths))}")
    print(f"corrupt on purpose: {', '.join(DEMO_CORRUPT_KEYS)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
