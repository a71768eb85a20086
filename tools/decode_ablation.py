#!/usr/bin/env python
"""Which decode path pays: the pipeline's images/s with each part of the fast path switched off.

    python tools/decode_ablation.py                      # the benchmark corpus (patchloom-bench/)
    python tools/decode_ablation.py --data DIR --repeats 5

Variants, run interleaved in one process (medians printed, then each one's ratio to the first):
  libjpeg-turbo scaled  - as shipped: simplejpeg at the DCT scale dct_scale() picks
  Pillow draft scaled   - simplejpeg switched off: Pillow's draft mode at the same scale
  Pillow full decode    - decode.reduced_jpeg: false and simplejpeg off: every pixel decoded
This is how the decoder was chosen; rerun it when Pillow or simplejpeg change.
"""

from __future__ import annotations

import argparse
import statistics
import sys
from pathlib import Path

try:
    import patchloom  # noqa: F401
except ImportError:  # run from a checkout without installing: use the repository's src/
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "src"))

import patchloom.image.decode as decode_mod
from patchloom.bench.pipeline import time_pipeline, warm_cache
from patchloom.bench.photos import PHOTO_RECIPE, make_photo_shards, photo_shard_pattern
from patchloom.recipe import Recipe
from patchloom.read import expand_shards


class _NoBar:
    n = 0

    def update(self, k: int) -> None:
        self.n += k


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--data", default="patchloom-bench", help="benchmark corpus folder (made if absent)")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--images", type=int, default=300, help="corpus size (default: the benchmark's 300)")
    args = ap.parse_args(argv)
    shards = min(4, args.images)
    make_photo_shards(args.data, images=args.images, shards=shards, large_share=0.1 if args.images >= 100 else 0.0)
    urls = expand_shards(photo_shard_pattern(args.data, shards), allow_shell=False)
    shipped = Recipe.from_dict(PHOTO_RECIPE)
    full = shipped.replace(decode={"reduced_jpeg": False})
    fast_lib = decode_mod.simplejpeg
    variants = [("libjpeg-turbo scaled", shipped, fast_lib), ("Pillow draft scaled", shipped, None),
                ("Pillow full decode", full, None)]
    warm_cache(shipped, urls)
    rates: dict[str, list[float]] = {name: [] for name, _, _ in variants}
    try:
        for _ in range(args.repeats):
            for name, recipe, lib in variants:
                decode_mod.simplejpeg = lib
                rates[name].append(time_pipeline(recipe, urls, None, _NoBar()).images_per_s)
    finally:
        decode_mod.simplejpeg = fast_lib
    first = statistics.median(rates[variants[0][0]])
    print(f"decode ablation on {len(urls)} shards, {args.repeats} interleaved runs each (images/s, median)")
    for name, _, _ in variants:
        med = statistics.median(rates[name])
        print(f"  {name:<22} {med:7.1f}   {med / first:5.2f}x of shipped   runs: "
              + " ".join(f"{r:.1f}" for r in rates[name]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
