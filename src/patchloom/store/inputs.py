"""The input shards of a pack: the spec expanded as pack expands it, and each input's size and sha256,
which the manifest records and `verify` checks again. An image folder is one input whose sha256 is
taken over its files, each hashed (`read.folder_digest`), so a changed, added or removed file shows."""

from __future__ import annotations

import hashlib
import os
from typing import Any

import braceexpand

from ..read import SHELL_PREFIXES, expand_shards, folder_digest, open_shard, source_kind
from .format import open_regular

__all__ = ["hash_input", "hash_inputs", "input_paths", "is_local", "spec_items"]


def is_local(url: str) -> bool:
    """True for a local path (plain or file:), False for a URL or a pipe: command."""
    return "://" not in url and not url.startswith(SHELL_PREFIXES)


def hash_input(url: str, *, allow_shell: bool) -> tuple[int, str]:
    """(bytes, sha256) of a shard: a local one only when it is a regular file (or an image folder:
    its files, each hashed), a URL through open_shard."""
    if is_local(url) and source_kind(url) == "folder":
        return folder_digest(url)
    h = hashlib.sha256()
    size = 0
    if is_local(url):
        stream = open_regular(url.removeprefix("file:"), "shards")
    else:
        stream = open_shard(url, allow_shell=allow_shell)
    try:
        while chunk := stream.read(1 << 20):
            h.update(chunk)
            size += len(chunk)
    finally:
        stream.close()
    return size, h.hexdigest()


def input_paths(spec: str | list[str] | None, *, allow_shell: bool, image_keys: list[str] | None = None) -> list[str]:
    """Expanded shard list, local paths made absolute (a sample's tokens depend on its key, not its path);
    `image_keys` (the recipe's) say which folders are image folders."""
    urls = expand_shards(spec, allow_shell=allow_shell, image_keys=image_keys)
    return [os.path.abspath(u.removeprefix("file:")) if is_local(u) else u for u in urls]


def spec_items(spec: str | list[str]) -> list[str]:
    """The shard spec as pack expanded it, local items brace-expanded and made absolute (globs kept): the
    manifest's `input_spec`, which verify expands again to confirm the recorded inputs."""
    out: list[str] = []
    for item in [spec] if isinstance(spec, str) else list(spec):
        item = item.strip()
        if not is_local(item):
            out.append(item)
            continue
        out.extend(os.path.join(os.getcwd(), os.path.expanduser(one.removeprefix("file:")))
                   for one in braceexpand.braceexpand(item))
    return out


def hash_inputs(inputs: list[str], *, allow_shell: bool) -> list[dict[str, Any]]:
    """The manifest's `inputs`: path, byte count and sha256 of each input shard, in input order."""
    hashed = []
    for url in inputs:
        size, digest = hash_input(url, allow_shell=allow_shell)
        hashed.append({"path": url, "bytes": size, "sha256": digest})
    return hashed
