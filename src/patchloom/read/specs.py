"""Shard specs -> shard URLs (paths, globs, brace ranges, URLs, refused shell commands; tar shards,
Parquet files and image folders), what one reader task reads (ShardTask), which members a sample
needs (Fields), and the identity a resume state keeps of each file to notice that it changed."""

from __future__ import annotations

import glob
import hashlib
import os
import stat
from collections.abc import Sequence
from dataclasses import dataclass

import braceexpand

from ..errors import PatchloomError

SHELL_PREFIXES = ("pipe:",)
#: The recipe's default `source.image_keys` (recipe/schema.py; a test keeps the two equal): the image
#: extensions a folder is searched for when the caller names none.
DEFAULT_IMAGE_KEYS = ("jpg", "jpeg", "png", "webp", "gif", "bmp", "tif", "tiff")
PARQUET_SUFFIX = ".parquet"


class SourceError(PatchloomError, ValueError):
    """A shard spec or shard that cannot be read; the message names it and what to change."""


@dataclass(slots=True, frozen=True)
class ShardTask:
    """Read `url`, keeping the samples whose index i satisfies i % parts == part.

    `unit` narrows the task to one piece of the source: a row group of a Parquet file, a chunk of
    `FOLDER_CHUNK` samples of an image folder; -1 is the whole source (a tar shard always is).
    """

    url: str
    part: int = 0
    parts: int = 1
    unit: int = -1


@dataclass(slots=True, frozen=True)
class Fields:
    """The members a sample needs, for sources that hold more than them: the Parquet columns to read
    (the first of `image_keys` present, or with `all_images` every one and lists of images, the label
    and text columns) and an image folder's image
    extensions. Readers given None read every column (and folders use DEFAULT_IMAGE_KEYS)."""

    image_keys: tuple[str, ...] = DEFAULT_IMAGE_KEYS
    label_key: str | None = None
    text_key: str | None = None
    all_images: bool = False  # source.images_per_sample all: every image column, list columns unrolled
    video_keys: tuple[str, ...] = ()  # an image folder's clip files (Parquet reads no clips)

    @property
    def sample_keys(self) -> tuple[str, ...]:
        """The extensions that make a file a sample in an image folder: image_keys, then video_keys."""
        return tuple(dict.fromkeys((*self.image_keys, *self.video_keys)))


def split_ext(name: str) -> tuple[str, str]:
    """(stem, extension) of a file name in an image folder: the extension is what follows the last
    dot, lower-cased ("" for a name without one: never a sample's member)."""
    stem, dot, ext = name.rpartition(".")
    if not dot or not stem or "/" in ext:
        return name, ""
    return stem, ext.lower()


def is_hidden(name: str) -> bool:
    """Names starting with a dot (`.DS_Store`, `.cache/`) are not read from image folders."""
    return name.startswith(".")


def folder_has_images(path: str, image_keys: Sequence[str]) -> bool:
    """True when the folder (or a sub-folder, links not followed, hidden entries skipped) holds a file
    with one of the image extensions; stops at the first one (this is no listing)."""
    keys = {k.lower() for k in image_keys}
    stack = [path]
    while stack:
        try:
            with os.scandir(stack.pop()) as it:
                for entry in it:
                    if is_hidden(entry.name):
                        continue
                    if entry.is_dir(follow_symlinks=False):
                        stack.append(entry.path)
                    elif split_ext(entry.name)[1] in keys:
                        return True
        except OSError:
            continue
    return False


def expand_shards(spec: str | Sequence[str] | None, *, allow_shell: bool = False,
                  image_keys: Sequence[str] | None = None) -> list[str]:
    """Shard spec (path, glob, brace range `part-{000..015}.tar`, URL, or a list of them) -> URLs.

    Tar shards, `.parquet` files and image folders (a folder holding image files with one of
    `image_keys`, default DEFAULT_IMAGE_KEYS, in it or its sub-folders) may be mixed. Shell-command
    URLs (`pipe:`) run a program: they are refused unless allow_shell is True.
    """
    keys = tuple(image_keys) if image_keys is not None else DEFAULT_IMAGE_KEYS
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
                folders = [m for m in matches if os.path.isdir(m) and not folder_has_images(m, keys)]
                if folders:
                    raise SourceError(f"shard glob {expanded!r} matches a folder: " + _folder_message(folders[0], keys))
                out.extend(matches)
            else:
                path = os.path.expanduser(expanded.removeprefix("file:"))
                if os.path.isdir(path):
                    if not folder_has_images(path, keys):
                        raise SourceError(_folder_message(path, keys))
                    path = path.rstrip(os.sep) or path  # one name per folder: `photos/` is `photos`
                elif not os.path.isfile(path):
                    raise SourceError(_missing_message(path, item))
                out.append(path)
    _check_parquet(out)
    return out


def _check_parquet(urls: list[str]) -> None:
    """Parquet files are read from local paths with pyarrow (the `parquet` extra): say so up front."""
    parquet = [u for u in urls if u.lower().endswith(PARQUET_SUFFIX) and not u.startswith(SHELL_PREFIXES)]
    if not parquet:
        return
    remote = next((u for u in parquet if "://" in u), None)
    if remote is not None:
        raise SourceError(f"Parquet file {remote!r} is a URL: patchloom reads Parquet files from local paths (a "
                          "mounted file system is fine); copy it, or write it as tar shards")
    from ..extras import require

    require("pyarrow", "reading Parquet files")


def _folder_message(path: str, image_keys: Sequence[str] = DEFAULT_IMAGE_KEYS) -> str:
    tars = glob.glob(os.path.join(glob.escape(path), "*.tar"))
    pattern = os.path.join(path, "*.tar")
    if tars:
        return f"shard path {path!r} is a folder; did you mean {pattern!r}? (it holds {len(tars)} .tar files)"
    return (f"shard path {path!r} is a folder without image files (looked for {', '.join(image_keys)} in it and "
            "its sub-folders) and without .tar files: name the image extensions in source.image_keys (clip "
            "files' in source.video_keys), or give the shard files themselves")


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


def file_identity(url: str) -> dict:
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
    swapped, rewritten or gone), or None when they match. (An image folder's "size" is its file
    count and its "probe" a hash of its file names.)"""
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
