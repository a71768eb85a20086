"""`patchloom run RECIPE` and `patchloom demo`: stream a recipe over its shards and print a summary."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from tqdm import tqdm

from ..pipeline import Pipeline, SampleError, SkipRatioError
from ..read import FOLDER_LABEL_MEMBER, SourceError, folder_classes, source_kind
from ..recipe import Recipe
from ..summary import RunStats, format_table
from .args import UsageError, non_negative, positive, writable_file

__all__ = ["add_run_commands", "cmd_demo", "cmd_run", "print_classes"]


def _stream(recipe: Recipe, *, shards, epoch: int, rank: int, world_size: int, max_batches: int | None,
            progress: bool, title: str, allow_shell: bool = False,
            ledger_path: str | None = None) -> tuple[RunStats, dict]:
    """Run one reader's epoch, printing the summary table (also when a data error stops the run,
    so the failed shards and skip reasons are on screen above the error)."""
    pipe = Pipeline(recipe, shards=shards, rank=rank, world_size=world_size, epoch=epoch, allow_shell=allow_shell)
    print_classes(pipe)
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


def print_classes(pipe: Pipeline) -> None:
    """With `label_key: folder`, each image folder's class -> label table (its first-level sub-folders, sorted)."""
    source = pipe.recipe.source
    if source.label_key != FOLDER_LABEL_MEMBER:
        return
    for url in pipe.shards:
        if source_kind(url) != "folder":
            continue
        names = folder_classes(url, source.sample_keys)
        print(f"classes of image folder {url} (label_key: folder): {len(names)}")
        for i, name in enumerate(names):
            print(f"  {i:>6}  {name if name.isprintable() else ascii(name)}")


def cmd_demo(args: argparse.Namespace) -> int:
    """Make the demo shards if absent, then stream the demo recipe over them."""
    from ..demo.data import demo_shard_pattern, make_demo_shards
    from ..demo.recipe import DEMO_CLIP_RECIPE, DEMO_RECIPE

    data = Path(args.data)
    if not list(data.glob("demo-*.tar")):
        print(f"making demo shards in {data} ...", file=sys.stderr)
        make_demo_shards(data, progress=not args.no_progress)
    recipe = Recipe.from_dict(DEMO_RECIPE, origin="built-in demo recipe")
    shards: str | list[str] = demo_shard_pattern(data)
    if args.clips:  # the clip shard beside the image shards (needs the video extra)
        from ..demo.clips import clip_shard_path, make_demo_clips

        if not clip_shard_path(data).is_file():
            print(f"making demo clips in {data} ...", file=sys.stderr)
            make_demo_clips(data)
        recipe = Recipe.from_dict(DEMO_CLIP_RECIPE, origin="built-in demo recipe with clips")
        shards = [shards, str(clip_shard_path(data))]
    _stream(recipe, shards=shards, epoch=0, rank=0, world_size=1, max_batches=None,
            progress=not args.no_progress, title=f"patchloom demo  (recipe {recipe.fingerprint()[:12]})")
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    """Stream a recipe file over its shards (or --shards); optionally write the summary and ledger."""
    if args.rank >= args.world_size:
        raise UsageError(f"--rank {args.rank} is not below --world-size {args.world_size}; ranks count from 0")
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


def add_run_commands(subparsers) -> None:
    """Add `demo` and `run` to the `patchloom` command's subparsers."""
    demo = subparsers.add_parser("demo", help="make the built-in demo shards (if absent) and run a recipe over them")
    demo.add_argument("--data", default="patchloom-demo", help="folder for the demo shards (default: %(default)s)")
    demo.add_argument("--clips", action="store_true",
                      help="also make the demo clips (clips-000000.tar; needs the video extra) and pack them beside "
                           "the images")
    demo.add_argument("--no-progress", action="store_true", help="no progress bar")
    demo.set_defaults(func=cmd_demo)

    run = subparsers.add_parser("run", help="stream a recipe over its shards and print a summary")
    run.add_argument("recipe", help="recipe YAML file")
    run.add_argument("--shards", help="shard spec overriding the recipe's source.shards")
    run.add_argument("--epoch", type=non_negative, default=0)
    run.add_argument("--rank", type=non_negative, default=0)
    run.add_argument("--world-size", type=positive, default=1)
    run.add_argument("--max-batches", type=positive, help="stop after this many batches")
    run.add_argument("--json", metavar="FILE", type=writable_file, help="also write the summary and ledger as JSON")
    run.add_argument("--ledger", metavar="FILE", type=writable_file,
                     help="write every skipped sample as JSON lines (a quarantine list), then a summary line")
    run.add_argument("--allow-shell", action="store_true",
                     help="allow pipe: shard URLs, which run shell commands (only for shard lists you wrote)")
    run.add_argument("--no-progress", action="store_true", help="no progress bar")
    run.set_defaults(func=cmd_run)
