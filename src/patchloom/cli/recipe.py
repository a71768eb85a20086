"""`patchloom recipe check|show FILE`: validate a recipe, or print it resolved with defaults."""

from __future__ import annotations

import argparse

from ..recipe import Recipe

__all__ = ["add_recipe_command", "cmd_recipe"]


def cmd_recipe(args: argparse.Namespace) -> int:
    """`check` prints ok and the fingerprint; `show` prints the recipe with every default filled in."""
    recipe = Recipe.from_file(args.file)
    if args.action == "check":
        print(f"{args.file}: ok (fingerprint {recipe.fingerprint()})")
    else:
        print(f"# {args.file}, resolved with defaults; fingerprint {recipe.fingerprint()}")
        print(recipe.to_yaml(), end="")
    return 0


def add_recipe_command(subparsers) -> None:
    """Add `recipe` to the `patchloom` command's subparsers."""
    rec = subparsers.add_parser("recipe", help="check a recipe file, or show it resolved with defaults")
    rec.add_argument("action", choices=["check", "show"])
    rec.add_argument("file")
    rec.set_defaults(func=cmd_recipe)
