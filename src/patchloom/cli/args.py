"""Argument types shared by the commands: numbers in range and output files that can be written,
checked when the command line is read, not after a long run."""

from __future__ import annotations

import argparse
import os

from ..errors import PatchloomError


class UsageError(PatchloomError, ValueError):
    """Options that are each valid but do not fit together (e.g. a rank not below the world size)."""


def non_negative(text: str) -> int:
    """An integer >= 0 (epochs, ranks, counts that may be zero)."""
    return _int_at_least(text, 0)


def positive(text: str) -> int:
    """An integer >= 1 (world sizes, worker counts, batch limits)."""
    return _int_at_least(text, 1)


def _int_at_least(text: str, low: int) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < low:
        raise argparse.ArgumentTypeError(f"{value} is below {low}")
    return value


def writable_file(text: str) -> str:
    """A file path whose folder exists and that is not itself a folder (written at the end of a run)."""
    folder = os.path.dirname(os.path.abspath(text))
    if os.path.isdir(text):
        raise argparse.ArgumentTypeError(f"{text!r} is a folder; give a file name")
    if not os.path.isdir(folder):
        raise argparse.ArgumentTypeError(f"the folder {folder!r} does not exist; create it first")
    if not os.access(folder, os.W_OK):
        raise argparse.ArgumentTypeError(f"cannot write in the folder {folder!r}")
    return text
