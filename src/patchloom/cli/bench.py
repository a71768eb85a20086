"""`patchloom bench BENCHMARK`: one subcommand per benchmark, each with its own options, over a
corpus chosen with `--corpus photos|demo|RECIPE.yaml` (default: demo).

    patchloom bench pipeline --corpus photos --repeats 5
    patchloom bench drops --corpus demo
    patchloom bench packing --corpus recipes/pretrain.yaml
    patchloom bench resume | workers | soak ...

To add a benchmark: write its `bench_*` and `format_*` functions in patchloom/bench/, then one
`Benchmark` entry in BENCHMARKS below (its options, and the function that runs it on a corpus).
"""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..bench.corpus import CORPORA, Corpus, load_corpus

__all__ = ["BENCHMARKS", "Benchmark", "add_bench_command", "cmd_bench"]


def _at_least(lo: int) -> Callable[[str], int]:
    """argparse type: an integer >= lo, else a usage error naming the bound."""
    def parse(text: str) -> int:
        value = int(text)
        if value < lo:
            raise argparse.ArgumentTypeError(f"must be >= {lo} (got {value})")
        return value

    parse.__name__ = "integer"  # what argparse calls the type in "invalid integer value"
    return parse


_positive = _at_least(1)


# ------------------------------------------------------------------------------------------------
# Each benchmark: its options, and how it runs on a corpus -> (JSON-able result, text to print)
# ------------------------------------------------------------------------------------------------


def _pipeline_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--repeats", type=_positive, default=3, help="interleaved runs of each side (default: %(default)s)")
    p.add_argument("--max-images", type=_positive, help="stop each run after about this many images (default: all)")


def _pipeline(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.pipeline import format_bench, run_bench

    result = run_bench(c.recipe, shards=c.shards, max_images=args.max_images, repeats=args.repeats,
                       progress=not args.no_progress)
    return result, format_bench(result)


def _drops_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--repeats", type=_positive, default=3, help="timed passes over the images (default: %(default)s)")
    p.add_argument("--max-images", type=_positive, default=200, help="images to measure on (default: %(default)s)")


def _drops(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.drops import bench_drop_modes, format_drop_bench

    result = bench_drop_modes(c.recipe, shards=c.shards, max_images=args.max_images, repeats=args.repeats)
    return result, format_drop_bench(result)


def _packing_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--images", type=_positive, default=20_000,
                   help="planned token counts to pack (no image is read; default: %(default)s)")


def _packing(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.packing import bench_packing, format_packing_bench

    result = bench_packing(c.recipe, images=args.images)
    return result, format_packing_bench(result)


def _resume_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--points", type=_positive, default=5,
                   help="evenly spaced batches of the epoch to save at and resume from (default: %(default)s)")


def _resume(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.resume import bench_resume, format_resume_bench

    result = bench_resume(c.recipe, shards=c.shards, points=args.points)
    return result, format_resume_bench(result)


def _workers_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--max-workers", type=_at_least(0), default=2, metavar="N",
                   help="time 0, 1, ..., N DataLoader workers (default: %(default)s)")
    p.add_argument("--epochs", type=_at_least(2), default=4,
                   help="epochs per worker count: the first (cold) and the rest (warm, median) (default: %(default)s)")


def _workers(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.scale import bench_workers, format_workers

    result = bench_workers(c.recipe, shards=c.shards, workers=tuple(range(args.max_workers + 1)), epochs=args.epochs,
                           progress=not args.no_progress)
    return result, format_workers(result)


def _soak_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--images", type=_positive, default=100_000,
                   help="images to stream (the shards repeated as often as needed; default: %(default)s)")
    p.add_argument("--samples", type=_positive, default=20,
                   help="times resident memory is sampled along the stream (default: %(default)s)")


def _soak(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.scale import bench_soak, format_soak

    result = bench_soak(c.recipe, shards=c.shards, images=args.images, samples=args.samples,
                        progress=not args.no_progress)
    return result, format_soak(result)


@dataclass(frozen=True, slots=True)
class Benchmark:
    """One `patchloom bench` subcommand."""

    help: str
    options: Callable[[argparse.ArgumentParser], None]
    run: Callable[[Corpus, argparse.Namespace], tuple[dict[str, Any], str]]
    reads_shards: bool = True  # False: only the corpus's recipe is used (no shard is made or read)


#: Subcommand name -> benchmark: the one place a benchmark is registered.
BENCHMARKS: dict[str, Benchmark] = {
    "pipeline": Benchmark("time the pipeline beside a plain square-resize baseline, per-stage cost and "
                          "decode quality; print the ratio", _pipeline_options, _pipeline),
    "drops": Benchmark("cost per image and realised rate of every token-drop mode", _drops_options, _drops),
    "packing": Benchmark("padding and cost of each packing algorithm and look-ahead size (planned token counts "
                         "under the corpus recipe; reads no shard)", _packing_options, _packing, reads_shards=False),
    "resume": Benchmark("cost of state_dict() and of resuming mid-epoch", _resume_options, _resume),
    "workers": Benchmark("images/s through a torch DataLoader at 0..N workers, and the ratio to 0",
                         _workers_options, _workers),
    "soak": Benchmark("stream many images (shards repeated) and trace resident memory", _soak_options, _soak),
}


def cmd_bench(args: argparse.Namespace) -> int:
    """Load the corpus (making its shards if needed), run the chosen benchmark, print it, write --json."""
    bench = BENCHMARKS[args.benchmark]
    progress = not args.no_progress
    corpus = load_corpus(args.corpus, shards=getattr(args, "shards", None), data=getattr(args, "data", None),
                         make=bench.reads_shards, progress=progress)
    if corpus.made_in is not None:
        print(f"made demo shards in {corpus.made_in}", file=sys.stderr)
    result, text = bench.run(corpus, args)
    print(text)
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    return 0


def add_bench_command(subparsers) -> None:
    """Add `bench` and its benchmark subcommands to the `patchloom` command's subparsers."""
    bench = subparsers.add_parser("bench", help="benchmarks: pipeline vs a square-resize baseline, drop modes, "
                                                "packing, resume, DataLoader workers, memory soak")
    sub = bench.add_subparsers(dest="benchmark", required=True, metavar="BENCHMARK")
    names = "|".join(CORPORA)
    for name, b in BENCHMARKS.items():
        p = sub.add_parser(name, help=b.help, description=b.help)
        p.add_argument("--corpus", default="demo", metavar=f"{names}|RECIPE",
                       help=f"`photos`: 300 web-sized JPEGs, made in {CORPORA['photos']}/ (196 tokens); `demo`: the "
                            f"demo recipe and archive, made in {CORPORA['demo']}/; or a recipe YAML file over its "
                            "own shards (default: %(default)s)")
        if b.reads_shards:
            p.add_argument("--shards", help="shard spec overriding the corpus's shards")
            p.add_argument("--data", help="folder the built-in corpus is made in (default: "
                                          f"{CORPORA['demo']}, or {CORPORA['photos']} for photos)")
        b.options(p)
        p.add_argument("--json", metavar="FILE", help="also write the full result as JSON")
        p.add_argument("--no-progress", action="store_true", help="no progress bars")
        p.set_defaults(func=cmd_bench)
