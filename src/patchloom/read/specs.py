"""Shard specs -> shard URLs (paths, globs, brace ranges, URLs, refused shell commands), and the
identity a resume state keeps of each shard to notice that it changed."""

from __future__ import annotations

import glob
import hashlib
import os
import stat
from collections.abc import Sequence

import braceexpand

from ..errors import PatchloomError

SHELL_PREFIXES = ("pipe:",)


class SourceError(PatchloomError, ValueError):
    """A shard spec or shard that cannot be read; the message names it and what to change."""


def expand_shards(spec: str | Sequence[str] | None, *, allow_shell: bool = False) -> list[str]:
    """Shard spec (path, glob, brace range `part-{000..015}.tar`, URL, or a list of them) -> URLs.

    Shell-command URLs (`pipe:`) run a program: they are refused unless allow_shell is True.
    """
    if spec is None:
        raise SourceError("no shards given: set source.shards in the recipe or pass shards=")
    items = [spec] if isinstance(spec, str) else list(spec)
    if not items:
        raise SourceError("the shard list is empty")
    out: list[str] = []
    for item in items:
        if not isinstance(item, str) or not item.strip():
            raise SourceError(f"a shard spec must be a non-empty string (got {item!r})")
        item = item.strip()
        if item.startswith(SHELL_PREFIXES):
            if not allow_shell:
                raise SourceError(
                    f"shard spec {item!r} runs a shell command; this is refused by default because a "
                    "recipe is data. Pass allow_shell=True to Pipeline (or --allow-shell on the "
                    "command line) only for shard lists you wrote yourself"
                )
            out.extend(braceexpand.braceexpand(item))
            continue
        for expanded in braceexpand.braceexpand(item):
            if "://" in expanded:
                out.append(expanded)
            elif any(ch in expanded for ch in "*?["):
                matches = sorted(glob.glob(os.path.expanduser(expanded)))
                if not matches:
                    raise SourceError(f"shard glob {expanded!r} matches no file")
                folders = [m for m in matches if os.path.isdir(m)]
                if folders:
                    raise SourceError(f"shard glob {expanded!r} matches a folder: " + _folder_message(folders[0]))
                out.extend(matches)
            else:
                path = os.path.expanduser(expanded.removeprefix("file:"))
                if os.path.isdir(path):
                    raise SourceError(_folder_message(path))
                if not os.path.isfile(path):
                    raise SourceError(_missing_message(path, item))
                out.append(path)
    return out


def _folder_message(path: str) -> str:
    tars = glob.glob(os.path.join(glob.escape(path), "*.tar"))
    pattern = os.path.join(path, "*.tar")
    return f"shard path {path!r} is a folder; did you mean {pattern!r}? (it holds {len(tars)} .tar files)"


def _missing_message(path: str, item: str) -> str:
    """'does not exist', saying where a relative path was looked for and how to make the demo shards."""
    text = f"shard {path!r} does not exist (from spec {item!r})"
    if not os.path.isabs(path):
        text += f"; relative paths are read from the current working directory {os.getcwd()!r}"
    if "demo-" in os.path.basename(path):
        text += "; these look like the demo shards: run `patchloom demo` first (it writes them to ./patchloom-demo)"
    return text


#: Bytes hashed at each end of a local shard for its identity: enough to tell apart two shards of
#: equal size and time (copied with `cp -p`, unpacked from one archive), cheap for thousands.
IDENTITY_PROBE_BYTES = 64 * 1024


def shard_identity(url: str) -> dict:
    """What a saved state remembers of a shard to notice it changed: its URL, and for a local file
    its size, modification time and a hash of its first and last 64 KiB (None where unknown:
    URLs, `pipe:` commands, missing files)."""
    out: dict = {"url": url, "size": None, "mtime": None, "probe": None}
    if "://" in url or url.startswith(SHELL_PREFIXES):
        return out
    path = os.path.expanduser(url.removeprefix("file:"))
    try:
        st = os.stat(path)
        if not stat.S_ISREG(st.st_mode):
            return out
        digest = hashlib.blake2b(digest_size=12)
        with open(path, "rb") as f:
            digest.update(f.read(IDENTITY_PROBE_BYTES))
            if st.st_size > IDENTITY_PROBE_BYTES:
                f.seek(max(IDENTITY_PROBE_BYTES, st.st_size - IDENTITY_PROBE_BYTES))
                digest.update(f.read(IDENTITY_PROBE_BYTES))
    except OSError:
        return out
    out.update(size=int(st.st_size), mtime=float(st.st_mtime), probe=digest.hexdigest())
    return out


def describe_identity_change(saved: Sequence[dict], now: Sequence[dict]) -> str | None:
    """One line naming the first difference between two lists of `shard_identity` (reordered,
    swapped, rewritten or gone), or None when they match."""
    then_urls = [str(s.get("url")) for s in saved]
    now_urls = [str(s.get("url")) for s in now]
    if then_urls != now_urls:
        i = next((k for k, (a, b) in enumerate(zip(then_urls, now_urls)) if a != b), min(len(then_urls), len(now_urls)))
        then_at = then_urls[i] if i < len(then_urls) else "(none)"
        now_at = now_urls[i] if i < len(now_urls) else "(none)"
        if sorted(then_urls) == sorted(now_urls):
            kind = "was reordered"
        elif len(then_urls) != len(now_urls):
            kind = f"changed from {len(then_urls)} to {len(now_urls)} shards"
        else:
            kind = "has a different shard"
        return (f"the shard list {kind} since the state was saved (position {i}: {then_at} then, "
                f"{now_at} now)")
    for a, b in zip(saved, now):
        for name in ("size", "mtime", "probe"):
            old, new = a.get(name), b.get(name)
            if old == new:
                continue
            if new is None:
                return f"shard {a.get('url')} can no longer be read ({name} {old} when the state was saved)"
            if name == "probe":
                return (f"shard {a.get('url')} holds other bytes than when the state was saved (same size "
                        "and time: swapped or copied over?)")
            return f"shard {a.get('url')} was rewritten since the state was saved ({name} {old} -> {new})"
    return None
