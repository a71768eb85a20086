"""`patchloom bench BENCHMARK`: one subcommand per benchmark, each with its own options, over one or
more corpora chosen with `--corpus photos|photos-small|demo|RECIPE.yaml[,...]` (default: demo; for
`pipeline` both photo corpora). Several corpora run one after another, each reported in full, then
a table of the ratios per corpus.

    patchloom bench pipeline --repeats 5                  # photos and photos-small
    patchloom bench pipeline --corpus photos-small
    patchloom bench drops --corpus demo
    patchloom bench packing --corpus recipes/pretrain.yaml
    patchloom bench resume | workers | soak | store | clips ...

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
from ..errors import PatchloomError

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


def _store_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--repeats", type=_positive, default=3,
                   help="interleaved reads of each folder (default: %(default)s)")


def _store(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.store import bench_store, format_store_bench

    result = bench_store(c.recipe, shards=c.shards, repeats=args.repeats, progress=not args.no_progress)
    return result, format_store_bench(result)


def _workers_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--max-workers", type=_at_least(0), default=2, metavar="N",
                   help="time 0, 1, ..., N DataLoader workers (default: %(default)s)")
    p.add_argument("--epochs", type=_at_least(2), default=4,
                   help="epochs per worker count: the first (cold) and the rest (warm, median) (default: %(default)s)")
    p.add_argument("--epoch-images", type=_at_least(0), default=2000, metavar="N",
                   help="list the shards again until an epoch holds at least N images, so that filling the "
                        "workers and the last one's tail, paid once an epoch, weigh as little as in training "
                        "(0: each shard once; default: %(default)s)")
    p.add_argument("--pool-slots", type=_at_least(0), default=None, metavar="N",
                   help="reusable shared-memory batch slots per worker (0: a new shared segment per batch, "
                        "torch's own way; default: the dataset's)")


def _workers(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.scale import bench_workers, format_workers

    result = bench_workers(c.recipe, shards=c.shards, workers=tuple(range(args.max_workers + 1)), epochs=args.epochs,
                           progress=not args.no_progress, pool_slots=args.pool_slots, epoch_images=args.epoch_images)
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


def _clips_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--repeats", type=_positive, default=3, help="interleaved runs of each side (default: %(default)s)")
    p.add_argument("--max-images", type=_positive, default=200, help="images per run (default: %(default)s)")
    p.add_argument("--clips", metavar="TAR", help="a shard of clips (default: the demo clips, made in the demo "
                                                  "folder on first use)")


def _clips(c: Corpus, args: argparse.Namespace) -> tuple[dict[str, Any], str]:
    from ..bench.clips import bench_clips, format_clips_bench
    from ..demo.clips import clip_shard_path, make_demo_clips

    clips = args.clips
    if clips is None:
        clips = clip_shard_path(Path(getattr(args, "data", None) or CORPORA["demo"]))
        if not clips.is_file():
            make_demo_clips(clips.parent)
    result = bench_clips(c.recipe, shards=c.shards, clips=clips, repeats=args.repeats, max_images=args.max_images)
    return result, format_clips_bench(result)


@dataclass(frozen=True, slots=True)
class Benchmark:
    """One `patchloom bench` subcommand."""

    help: str
    options: Callable[[argparse.ArgumentParser], None]
    run: Callable[[Corpus, argparse.Namespace], tuple[dict[str, Any], str]]
    reads_shards: bool = True  # False: only the corpus's recipe is used (no shard is made or read)
    default_corpus: str = "demo"


#: Subcommand name -> benchmark: the one place a benchmark is registered.
BENCHMARKS: dict[str, Benchmark] = {
    "pipeline": Benchmark("time the pipeline beside a plain square-resize baseline (bilinear, and bicubic) and "
                          "its own kernels alone, per-stage cost and decode quality; print the ratios per corpus",
                          _pipeline_options, _pipeline, default_corpus="photos,photos-small"),
    "drops": Benchmark("cost per image and realised rate of every token-drop mode", _drops_options, _drops),
    "packing": Benchmark("padding and cost of each packing algorithm and look-ahead size (planned token counts "
                         "under the corpus recipe; reads no shard)", _packing_options, _packing, reads_shards=False),
    "resume": Benchmark("cost of state_dict() and of resuming mid-epoch", _resume_options, _resume),
    "store": Benchmark("pack the corpus raw and zstd-compressed; folder sizes and read_packed speed (hash checks "
                       "on and off)", _store_options, _store),
    "workers": Benchmark("images/s through a torch DataLoader at 0..N workers, and the ratio to 0",
                         _workers_options, _workers),
    "clips": Benchmark("clips/s (and frames/s) beside images/s through one recipe: the demo clips and the corpus's "
                       "images (needs the video extra)", _clips_options, _clips),
    "soak": Benchmark("stream many images (shards repeated) and trace resident memory", _soak_options, _soak),
}


def cmd_bench(args: argparse.Namespace) -> int:
    """Load each corpus (making its shards if needed), run the chosen benchmark on it, print it, write
    --json (one corpus: its result; several: {"corpora": {name: result}})."""
    bench = BENCHMARKS[args.benchmark]
    progress = not args.no_progress
    names = [c.strip() for c in args.corpus.split(",") if c.strip()]
    if not names:
        raise PatchloomError("--corpus names no corpus: give photos, photos-small, demo or a recipe file")
    if len(names) > 1 and (getattr(args, "shards", None) or getattr(args, "data", None)):
        raise PatchloomError(f"--shards and --data apply to one corpus, and --corpus names {len(names)}: "
                             "give a single --corpus with them")
    results: dict[str, dict[str, Any]] = {}
    for name in names:
        corpus = load_corpus(name, shards=getattr(args, "shards", None), data=getattr(args, "data", None),
                             make=bench.reads_shards, progress=progress)
        if corpus.made_in is not None:
            print(f"made demo shards in {corpus.made_in}", file=sys.stderr)
        result, text = bench.run(corpus, args)
        if len(names) > 1:
            print(f"== corpus {name}")
        print(text)
        results[name] = result
    if len(names) > 1 and args.benchmark == "pipeline":
        from ..bench.pipeline import format_corpus_ratios

        print(format_corpus_ratios(results))
    if args.json:
        out = results[names[0]] if len(names) == 1 else {"corpora": results}
        Path(args.json).write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    return 0


def add_bench_command(subparsers) -> None:
    """Add `bench` and its benchmark subcommands to the `patchloom` command's subparsers."""
    bench = subparsers.add_parser("bench", help="benchmarks: pipeline vs a square-resize baseline, drop modes, "
                                                "packing, resume, DataLoader workers, memory soak")
    sub = bench.add_subparsers(dest="benchmark", required=True, metavar="BENCHMARK")
    names = "|".join(CORPORA)
    for name, b in BENCHMARKS.items():
        p = sub.add_parser(name, help=b.help, description=b.help)
        p.add_argument("--corpus", default=b.default_corpus, metavar=f"{names}|RECIPE[,...]",
                       help=f"`photos`: 300 web-sized JPEGs, made in {CORPORA['photos']}/ (196 tokens); "
                            f"`photos-small`: 320 real photos at everyday sizes, 20 %% PNG, made in "
                            f"{CORPORA['photos-small']}/ (196 tokens); `demo`: the demo recipe and archive, made in "
                            f"{CORPORA['demo']}/; or a recipe YAML file over its own shards; several, comma-separated, "
                            "run one after another (default: %(default)s)")
        if b.reads_shards:
            p.add_argument("--shards", help="shard spec overriding the corpus's shards")
            p.add_argument("--data", help="folder the built-in corpus is made in (default: "
                                          f"{CORPORA['demo']}, {CORPORA['photos']} for photos, "
                                          f"{CORPORA['photos-small']} for photos-small)")
        b.options(p)
        p.add_argument("--json", metavar="FILE", help="also write the full result as JSON")
        p.add_argument("--no-progress", action="store_true", help="no progress bars")
        p.set_defaults(func=cmd_bench)
