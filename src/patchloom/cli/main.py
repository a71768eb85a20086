"""The `patchloom` command: demo, run, bench, pack, verify, inspect, and recipe check/show.

Exit status is 0 only on success; recipe and input errors print one clear message (no traceback).
"""

from __future__ import annotations

import argparse
import json
import sys
import warnings
from pathlib import Path

from tqdm import tqdm

from ..extras import as_missing_extra
from ..pipeline import Pipeline, SampleError, SkipRatioError
from ..recipe.schema import Recipe, RecipeError
from ..read.shards import SourceError
from ..report import add_inspect_command
from ..store.core import add_store_commands
from ..summary import RunStats, format_table

#: The recipe `patchloom demo` runs: native aspect ratio under a 256-token budget, shuffled.
DEMO_RECIPE = {
    "seed": 0,
    "source": {"shuffle_buffer": 64, "label_key": "cls"},
    "sizing": {"patch_size": 16, "max_tokens": 256, "min_tokens": 16, "mode": "budget",
               "max_aspect": 8.0, "aspect_rule": "crop"},
    "packing": {"seq_len": 1024, "rows": 4, "max_images_per_row": 16, "buffer": 32},
}


def _stream(recipe: Recipe, *, shards, epoch: int, rank: int, world_size: int, max_batches: int | None,
            progress: bool, title: str, allow_shell: bool = False,
            ledger_path: str | None = None) -> tuple[RunStats, dict]:
    """Run one reader's epoch, printing the summary table (also when a data error stops the run,
    so the failed shards and skip reasons are on screen above the error)."""
    pipe = Pipeline(recipe, shards=shards, rank=rank, world_size=world_size, epoch=epoch, allow_shell=allow_shell)
    stats = RunStats()
    bar = tqdm(desc="packing", unit=" img", disable=not progress, file=sys.stderr, dynamic_ncols=True)
    try:
        for batch in pipe:
            stats.add(batch)
            bar.update(batch.num_images)
            bar.set_postfix(batches=stats.batches, skipped=pipe.ledger.skipped_count, refresh=False)
            if max_batches is not None and stats.batches >= max_batches:
                break
    except (SourceError, SampleError, SkipRatioError):
        bar.close()
        print(format_table(stats, pipe.ledger.to_dict(), title=f"{title}  (stopped by the error below)"))
        raise
    finally:
        bar.close()
        if ledger_path:
            pipe.ledger.write_jsonl(ledger_path)
    ledger = pipe.ledger.to_dict()
    print(format_table(stats, ledger, title=title))
    return stats, ledger


def cmd_demo(args: argparse.Namespace) -> int:
    from ..demo.data import demo_shard_pattern, make_demo_shards

    data = Path(args.data)
    if not list(data.glob("demo-*.tar")):
        print(f"making demo shards in {data} ...", file=sys.stderr)
        make_demo_shards(data, progress=not args.no_progress)
    recipe = Recipe.from_dict(DEMO_RECIPE, origin="built-in demo recipe")
    _stream(recipe, shards=demo_shard_pattern(data), epoch=0, rank=0, world_size=1, max_batches=None,
            progress=not args.no_progress, title=f"patchloom demo  (recipe {recipe.fingerprint()[:12]})")
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    recipe = Recipe.from_file(args.recipe)
    stats, ledger = _stream(
        recipe, shards=args.shards, epoch=args.epoch, rank=args.rank, world_size=args.world_size,
        max_batches=args.max_batches, progress=not args.no_progress, allow_shell=args.allow_shell,
        ledger_path=args.ledger,
        title=f"patchloom run {args.recipe}  (recipe {recipe.fingerprint()[:12]})",
    )
    if args.json:
        Path(args.json).write_text(json.dumps({"stats": stats.to_dict(), "ledger": ledger}, indent=2))
    return 0


def cmd_bench(args: argparse.Namespace) -> int:
    from ..bench.pipeline import ensure_demo_shards, format_bench, run_bench
    from ..demo.data import demo_shard_pattern

    progress = not args.no_progress
    if args.recipe == "photos":
        from ..bench.photos import PHOTO_RECIPE, make_photo_shards, photo_shard_pattern

        args.data = args.data or "patchloom-bench"
        recipe = Recipe.from_dict(PHOTO_RECIPE, origin="built-in benchmark recipe")
        make_photo_shards(args.data, progress=progress)
        shards = args.shards or photo_shard_pattern(args.data)
    elif args.recipe == "demo":
        args.data = args.data or "patchloom-demo"
        recipe = Recipe.from_dict(DEMO_RECIPE, origin="built-in demo recipe")
        shards = args.shards or demo_shard_pattern(args.data, shards=4)
    else:
        args.data = args.data or "patchloom-demo"
        recipe = Recipe.from_file(args.recipe)
        shards = args.shards
    spec = shards if shards is not None else recipe.source.shards
    if ensure_demo_shards(spec, demo_dir=args.data, progress=progress):
        print(f"made demo shards in {args.data}", file=sys.stderr)
    if args.packing:
        from ..bench.packing import bench_packing, format_packing_bench

        result = bench_packing(recipe)
        text = format_packing_bench(result)
    elif args.resume:
        from ..bench.resume import bench_resume, format_resume_bench

        result = bench_resume(recipe, shards=shards)
        text = format_resume_bench(result)
    elif args.workers is not None:
        from ..bench.scale import bench_workers, format_workers

        result = bench_workers(recipe, shards=shards, workers=tuple(range(args.workers + 1)), progress=progress)
        text = format_workers(result)
    elif args.soak is not None:
        from ..bench.scale import bench_soak, format_soak

        result = bench_soak(recipe, shards=shards, images=args.soak, progress=progress)
        text = format_soak(result)
    elif args.drop_modes:
        from ..bench.drops import bench_drop_modes, format_drop_bench

        result = bench_drop_modes(recipe, shards=shards, max_images=args.max_images or 200, repeats=args.repeats)
        text = format_drop_bench(result)
    else:
        result = run_bench(recipe, shards=shards, max_images=args.max_images, repeats=args.repeats,
                           progress=progress)
        text = format_bench(result)
    print(text)
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    return 0


def cmd_recipe(args: argparse.Namespace) -> int:
    recipe = Recipe.from_file(args.file)
    if args.action == "check":
        print(f"{args.file}: ok (fingerprint {recipe.fingerprint()})")
    else:
        print(f"# {args.file}, resolved with defaults; fingerprint {recipe.fingerprint()}")
        print(recipe.to_yaml(), end="")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="patchloom",
        description="Stream images from tar shards into packed, fixed-shape patch-token batches.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    demo = sub.add_parser("demo", help="make the built-in demo shards (if absent) and run a recipe over them")
    demo.add_argument("--data", default="patchloom-demo", help="folder for the demo shards (default: %(default)s)")
    demo.add_argument("--no-progress", action="store_true", help="no progress bar")
    demo.set_defaults(func=cmd_demo)

    run = sub.add_parser("run", help="stream a recipe over its shards and print a summary")
    run.add_argument("recipe", help="recipe YAML file")
    run.add_argument("--shards", help="shard spec overriding the recipe's source.shards")
    run.add_argument("--epoch", type=int, default=0)
    run.add_argument("--rank", type=int, default=0)
    run.add_argument("--world-size", type=int, default=1)
    run.add_argument("--max-batches", type=int, help="stop after this many batches")
    run.add_argument("--json", metavar="FILE", help="also write the summary and ledger as JSON")
    run.add_argument("--ledger", metavar="FILE",
                     help="write every skipped sample as JSON lines (a quarantine list), then a summary line")
    run.add_argument("--allow-shell", action="store_true",
                     help="allow pipe: shard URLs, which run shell commands (only for shard lists you wrote)")
    run.add_argument("--no-progress", action="store_true", help="no progress bar")
    run.set_defaults(func=cmd_run)

    bench = sub.add_parser("bench", help="time a recipe beside a plain square-resize baseline and print the ratio")
    bench.add_argument("recipe", help="recipe YAML file; `photos` for the built-in benchmark corpus (300 web-sized "
                                      "JPEGs, 196 tokens); `demo` for the demo recipe and data")
    bench.add_argument("--shards", help="shard spec overriding the recipe's source.shards")
    bench.add_argument("--repeats", type=int, default=3, help="interleaved runs of each side (default: %(default)s)")
    bench.add_argument("--max-images", type=int, help="stop each run after about this many images")
    bench.add_argument("--json", metavar="FILE", help="also write the full result as JSON")
    bench.add_argument("--data", help="where the demo or benchmark shards are made if needed "
                                      "(default: patchloom-demo, or patchloom-bench for `photos`)")
    bench.add_argument("--drop-modes", action="store_true",
                       help="instead: cost per image and realised rate of every token-drop mode")
    bench.add_argument("--packing", action="store_true",
                       help="instead: padding and cost of each packing algorithm and buffer size")
    bench.add_argument("--resume", action="store_true",
                       help="instead: cost of state_dict() and of resuming mid-epoch")
    bench.add_argument("--workers", type=int, metavar="N",
                       help="instead: images/s through a torch DataLoader at 0..N workers, and the ratio to 0")
    bench.add_argument("--soak", type=int, metavar="IMAGES",
                       help="instead: stream this many images (shards repeated) and trace resident memory")
    bench.add_argument("--no-progress", action="store_true", help="no progress bars")
    bench.set_defaults(func=cmd_bench)

    rec = sub.add_parser("recipe", help="check a recipe file, or show it resolved with defaults")
    rec.add_argument("action", choices=["check", "show"])
    rec.add_argument("file")
    rec.set_defaults(func=cmd_recipe)
    add_store_commands(sub)
    add_inspect_command(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            return args.func(args)
    except (RecipeError, SourceError, SampleError, SkipRatioError) as err:
        print(f"patchloom: error: {err}", file=sys.stderr)
        return 2
    except ImportError as err:
        message = as_missing_extra(err)
        if message is None:
            raise
        print(f"patchloom: error: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("patchloom: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
