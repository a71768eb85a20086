"""The `patchloom inspect` command: argument parsing and the terminal summary."""

from __future__ import annotations

import argparse
import sys

from ..cli.args import non_negative, positive


def add_inspect_command(subparsers) -> argparse.ArgumentParser:
    """Add `inspect` to the `patchloom` command's subparsers."""
    p = subparsers.add_parser(
        "inspect", help="write an HTML report (one page + PNGs) of what a recipe does to its shards",
        description="Run a recipe's pipeline over its shards once and write a self-contained report: "
                    "summary numbers and flags, sampled images stage by stage, packed rows, "
                    "distributions and a determinism check.",
    )
    p.add_argument("recipe", help="recipe YAML file")
    p.add_argument("--shards", help="shard spec overriding the recipe's source.shards")
    p.add_argument("--samples", type=non_negative, default=12, help="images to draw stage by stage (default: %(default)s)")
    p.add_argument("--epoch", type=non_negative, default=0)
    p.add_argument("--out", default="patchloom-report", help="report folder (default: %(default)s)")
    p.add_argument("--seed", type=non_negative, help="seed of the sample choice (default: the recipe's seed)")
    p.add_argument("--max-images", type=positive, help="stop reading after this many records (default: all)")
    p.add_argument("--screenshot", metavar="PNG", help="also save a screenshot of the page (needs Chromium)")
    p.add_argument("--fail-on-flags", action="store_true", help="exit with status 1 when anything is flagged")
    p.add_argument("--allow-shell", action="store_true",
                   help="allow pipe: shard URLs, which run shell commands (only for shard lists you wrote)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_inspect)
    return p


def cmd_inspect(args: argparse.Namespace) -> int:
    """Build the report, print its summary; 0 on success (1 with --fail-on-flags and any flag)."""
    from .build import build_report, format_summary

    if args.samples < 0:
        print("patchloom: error: --samples must be >= 0", file=sys.stderr)
        return 2
    if args.max_images is not None and args.max_images < 1:
        print("patchloom: error: --max-images must be >= 1", file=sys.stderr)
        return 2
    result = build_report(
        args.recipe, args.out, shards=args.shards, samples=args.samples, epoch=args.epoch,
        progress=not args.no_progress, allow_shell=args.allow_shell, seed=args.seed, max_images=args.max_images,
    )
    print(format_summary(result))
    if getattr(args, "screenshot", None):
        from .browser import screenshot

        try:
            path = screenshot(result["index"], args.screenshot)
        except (FileNotFoundError, RuntimeError) as err:
            print(f"patchloom: error: screenshot: {err}", file=sys.stderr)
            return 2
        print(f"screenshot: {path}")
    if getattr(args, "fail_on_flags", False) and result["flags"]:
        return 1
    return 0
