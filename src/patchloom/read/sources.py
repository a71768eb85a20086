"""The source kinds behind one reader interface: a URL is a tar shard, a Parquet file or an image
folder, and each kind gives the same `Record`s (key, url, index, members), its reader units and
its identity for resume.

A new source kind is one module with `read_x(task, *, start, wanted, max_sample_bytes, fields)`
(records in index order, `error` set on a bad sample, ShardError when the source fails), its units
and identity, and one branch in each function below (and `specs.expand_shards` if its paths need
recognising).
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Sequence

from .folder import folder_identity, folder_units, read_folder
from .parquet import parquet_units, read_parquet
from .specs import PARQUET_SUFFIX, SHELL_PREFIXES, Fields, ShardTask, file_identity
from .tar import Record, read_shard

__all__ = ["SOURCE_KINDS", "read_task", "shard_identity", "source_kind", "source_units"]

SOURCE_KINDS = ("tar", "parquet", "folder")


def source_kind(url: str) -> str:
    """"parquet" for a `.parquet` path, "folder" for a local folder, else "tar" (URLs and `pipe:` too)."""
    if url.startswith(SHELL_PREFIXES) or "://" in url:
        return "tar"
    path = os.path.expanduser(url.removeprefix("file:"))
    if path.lower().endswith(PARQUET_SUFFIX):
        return "parquet"
    if os.path.isdir(path):
        return "folder"
    return "tar"


def source_units(shards: Sequence[str | ShardTask], *, slots: int = 1, fields: Fields | None = None) -> list[ShardTask]:
    """The reader units of an epoch, in source order: a tar shard is one unit; an image folder is
    chunks of FOLDER_CHUNK samples; a Parquet file is one unit, or one per row group when there are
    fewer sources than `slots` (so a single large file still spreads over every reader). Items that
    are ShardTasks already are kept as they are."""
    few = len(shards) < slots
    out: list[ShardTask] = []
    for item in shards:
        if isinstance(item, ShardTask):
            out.append(item)
            continue
        kind = source_kind(item)
        if kind == "folder":
            out.extend(folder_units(item, fields))
        elif kind == "parquet" and few:
            out.extend(parquet_units(item))
        else:
            out.append(ShardTask(item))
    return out


def read_task(task: ShardTask, *, allow_shell: bool = False, start: int = 0, wanted: set[int] | None = None,
              max_sample_bytes: int | None = None, fields: Fields | None = None) -> Iterator[Record]:
    """Records of one reader task, whatever its source kind (see `tar.read_shard` for the rules all
    kinds follow: index order, `start`, parts, `wanted`, error Records, ShardError)."""
    kind = source_kind(task.url)
    if kind == "parquet":
        return read_parquet(task, start=start, wanted=wanted, max_sample_bytes=max_sample_bytes, fields=fields)
    if kind == "folder":
        return read_folder(task, start=start, wanted=wanted, max_sample_bytes=max_sample_bytes, fields=fields)
    return read_shard(task, allow_shell=allow_shell, start=start, wanted=wanted, max_sample_bytes=max_sample_bytes)


def shard_identity(url: str) -> dict:
    """What a saved state remembers of a source to notice it changed: for a file its size, time and
    a hash of its ends (`specs.file_identity`), for an image folder its file count and a hash of its
    file names (`folder.folder_identity`)."""
    if source_kind(url) == "folder":
        return folder_identity(url)
    return file_identity(url)
