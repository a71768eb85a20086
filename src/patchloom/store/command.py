"""The `patchloom pack` and `patchloom verify` commands."""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from ..errors import PatchloomError
from ..recipe import Recipe
from .verify import verify_dir
from .writer import ENGINES, failed_inputs, pack_to_dir
from ..cli.args import non_negative, positive

__all__ = ["add_store_commands", "cmd_pack", "cmd_verify"]


def cmd_pack(args: argparse.Namespace) -> int:
    """`patchloom pack RECIPE --out DIR`: exit 0 on success, 2 on usage, recipe or input errors."""
    started = time.perf_counter()
    shards = args.shards
    try:
        if args.recipe == "demo" and not Path(args.recipe).exists():
            from ..demo.data import demo_shard_pattern
            from ..demo.recipe import DEMO_RECIPE

            recipe = Recipe.from_dict(DEMO_RECIPE, origin="built-in demo recipe")
            shards = shards or demo_shard_pattern("patchloom-demo")
        else:
            recipe = Recipe.from_file(args.recipe)
        man = pack_to_dir(recipe, args.out, shards=shards, workers=args.workers, epoch=args.epoch,
                          progress=not args.no_progress, allow_shell=args.allow_shell,
                          max_batches_per_shard=args.max_batches_per_shard, overwrite=args.overwrite,
                          engine=args.engine, address=args.address, resume=args.resume, compress=args.compress)
    except PatchloomError as err:
        print(f"patchloom: error: {err}", file=sys.stderr)
        return 2
    t = man["totals"]
    led = man["ledger"]
    failed = failed_inputs(led.get("shard_errors") or [], [i["path"] for i in man["inputs"]])
    # pack_to_dir named each failed shard once (from the merged ledgers); here only the count.
    if failed:
        print(f"patchloom: warning: {len(failed)} of {len(man['inputs'])} input shards failed (under "
              "source.max_skip_ratio, so the pack went on); manifest.json lists them under ledger.shard_errors",
              file=sys.stderr)
    print(f"packed {args.out}  (recipe {man['fingerprint'][:12]}, epoch {man['epoch']}, {man['workers']} worker(s))")
    print(f"  shards written   {len(man['shards'])}")
    print(f"  batches          {t['batches']}")
    print(f"  images           {t['images']}  (read {led.get('read')}, skipped {led.get('skipped')})")
    if failed:
        print(f"  inputs failed    {len(failed)} of {len(man['inputs'])}")
    print(f"  tokens           {t['tokens']}")
    print(f"  padding          {100 * t['padding_fraction']:.1f} %")
    print(f"  seconds          {time.perf_counter() - started:.2f}")
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    """`patchloom verify DIR`: exit 0 when everything matches, 1 on a mismatch, 2 on usage errors."""
    started = time.perf_counter()
    try:
        res = verify_dir(args.dir, progress=not args.no_progress, allow_shell=args.allow_shell, shards=args.shards)
    except PatchloomError as err:
        print(f"patchloom: error: {err}", file=sys.stderr)
        return 2
    seconds = time.perf_counter() - started
    if res.ok:
        print(f"OK: {args.dir}: inputs unchanged; {res.batches} batches match the manifest, stored and re-run "
              f"({seconds:.2f} s)")
    else:
        print(f"MISMATCH: {args.dir}: {res.messages[0]}")
        for msg in res.messages[1:]:
            print(f"  {msg}")
    for note in res.notes:
        print(f"  note: {note}")
    return 0 if res.ok else 1


def add_store_commands(subparsers) -> None:
    """Add `pack` and `verify` to the `patchloom` command's subparsers."""
    pack = subparsers.add_parser("pack", help="run a recipe once and write its packed batches as tar shards")
    pack.add_argument("recipe", help="recipe YAML file, or `demo` for the built-in demo recipe")
    pack.add_argument("--out", required=True, help="output folder (must be empty unless --overwrite)")
    pack.add_argument("--shards", help="shard spec overriding the recipe's source.shards")
    pack.add_argument("--workers", type=positive, default=1,
                      help="worker groups: processes (local) or Ray tasks (ray); the output depends on this "
                           "number, not on the engine (default: %(default)s)")
    pack.add_argument("--epoch", type=non_negative, default=0)
    pack.add_argument("--max-batches-per-shard", type=positive, default=64, help="(default: %(default)s)")
    pack.add_argument("--engine", choices=list(ENGINES), default="local",
                      help="where the worker groups run: local processes, or tasks on a Ray cluster (needs "
                           "pip install 'patchloom[ray]'); same output either way (default: %(default)s)")
    pack.add_argument("--address", default=None,
                      help="with --engine ray: the Ray cluster to use (`auto`, or HOST:PORT of the head node); "
                           "default: $RAY_ADDRESS if set, else start Ray on this machine with all its CPUs")
    pack.add_argument("--compress", choices=["zstd"], default=None,
                      help="store the arrays zstd-compressed (about 1.7x smaller for uint8 photos, slower to read; "
                           "needs pip install 'patchloom[compress]'; manifest version 2)")
    pack.add_argument("--overwrite", action="store_true",
                      help="replace a previous pack in --out (removes only pack's own files; refuses a folder "
                           "that holds others)")
    pack.add_argument("--resume", action="store_true",
                      help="with --engine ray: continue an interrupted pack in --out, keeping the groups it "
                           "finished (same recipe, inputs, --workers, --epoch and --max-batches-per-shard)")
    pack.add_argument("--allow-shell", action="store_true",
                      help="allow pipe: shard URLs, which run shell commands (only for shard lists you wrote)")
    pack.add_argument("--no-progress", action="store_true", help="no progress bar")
    pack.set_defaults(func=cmd_pack)

    verify = subparsers.add_parser("verify", help="check a packed folder against its inputs and a re-run")
    verify.add_argument("dir", help="packed folder (holds manifest.json)")
    verify.add_argument("--shards", default=None,
                        help="shard spec naming the inputs (default: the spec recorded when packing); only "
                             "inputs both this spec and the manifest name are read, or, when the inputs moved, "
                             "as many as were recorded and none at a recorded path: they pair up by file name "
                             "(by content when renamed) and each must hash as recorded")
    verify.add_argument("--allow-shell", action="store_true",
                        help="allow pipe: input shard URLs (they run commands: only for folders you packed)")
    verify.add_argument("--no-progress", action="store_true", help="no progress bar")
    verify.set_defaults(func=cmd_verify)
