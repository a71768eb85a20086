"""The one base class of every error patchloom raises on purpose, so callers and the CLI can catch
ours apart from bugs. Each error also derives from the builtin it always was (ValueError, ...)."""

from __future__ import annotations


class PatchloomError(Exception):
    """An error of ours: its message names what was wrong and what to change."""
