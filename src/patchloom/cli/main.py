"""The `patchloom` command: demo, run, bench, recipe check/show, pack, verify and inspect.

Exit status is 0 only on success; every error of ours (a PatchloomError: recipe, input, store, a
missing optional package) prints one line naming what to change, no traceback, and exits 2.
"""

from __future__ import annotations

import argparse
import sys
import warnings

from ..errors import PatchloomError
from ..extras import as_missing_extra
from ..report.command import add_inspect_command
from ..store.command import add_store_commands
from .bench import add_bench_command
from .recipe import add_recipe_command
from .run import add_run_commands

__all__ = ["build_parser", "main"]


def build_parser() -> argparse.ArgumentParser:
    """The `patchloom` parser: one subcommand group per module (run.py, bench.py, recipe.py,
    store/command.py, report/command.py)."""
    parser = argparse.ArgumentParser(
        prog="patchloom",
        description="Stream images from tar shards into packed, fixed-shape patch-token batches.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    add_run_commands(sub)
    add_bench_command(sub)
    add_recipe_command(sub)
    add_store_commands(sub)
    add_inspect_command(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run one `patchloom` command; its exit status (2 on an error of ours, 130 on Ctrl-C)."""
    args = build_parser().parse_args(argv)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            return args.func(args)
    except PatchloomError as err:  # ours: the message says what to change (a missing extra included)
        print(f"patchloom: error: {err}", file=sys.stderr)
        return 2
    except ImportError as err:
        message = as_missing_extra(err)
        if message is None:
            raise
        print(f"patchloom: error: {message}", file=sys.stderr)
        return 2
    except OSError as err:  # a folder that cannot be written, a file that vanished: say which
        print(f"patchloom: error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("patchloom: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
