"""Who reads what, in which order: the epoch's seeded order of reader units (tar shards, Parquet
files or row groups, chunks of image folders: `sources.source_units`) and its split over ranks and
DataLoader workers (slots), so that every sample is read once across all readers."""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import replace
from typing import TypeVar

from ..seeding import stream_rng
from .sources import source_units
from .specs import Fields, ShardTask

T = TypeVar("T")

__all__ = ["ShardTask", "reader_tasks", "shard_order", "split_shards"]


def shard_order(shards: Sequence[T], *, seed: int, epoch: int, shuffle: bool) -> list[T]:
    """The epoch's shard (unit) order, identical on every rank and worker (seeded by seed and epoch only)."""
    shards = list(shards)
    if not shuffle:
        return shards
    perm = stream_rng(seed, epoch, "shard-order").permutation(len(shards))
    return [shards[i] for i in perm]


def split_shards(shards: Sequence[str | ShardTask], *, slot: int, slots: int,
                 fields: Fields | None = None) -> list[ShardTask]:
    """This reader's share of the shards, so that every sample is read once across all slots.

    URLs are first made reader units (`source_units`: a folder's chunks, a Parquet file's row
    groups when there are fewer files than slots); ShardTasks are units already. With at least as
    many units as slots, slot s takes units s, s+slots, ... With fewer, several slots share a unit
    and each keeps every k-th sample of it, so no reader idles and no sample is duplicated (each
    sharing reader streams past the others' samples without copying them).
    """
    if not 0 <= slot < slots:
        raise ValueError(f"reader slot {slot} out of range for {slots} slots")
    units = source_units(shards, slots=slots, fields=fields)
    n = len(units)
    if n == 0:
        return []
    if n >= slots:
        return units[slot::slots]
    shard = slot % n
    parts = len(range(shard, slots, n))
    return [replace(units[shard], part=slot // n, parts=parts)]


def reader_tasks(
    shards: Sequence[str],
    *,
    seed: int,
    epoch: int,
    rank: int = 0,
    world_size: int = 1,
    worker: int = 0,
    num_workers: int = 1,
    shuffle_shards: bool = True,
    fields: Fields | None = None,
) -> list[ShardTask]:
    """The shard tasks one reader (rank, worker) gets in one epoch: the sources made reader units
    (`source_units`), put in the epoch's order, then split."""
    if not 0 <= rank < world_size:
        raise ValueError(f"rank must be in 0..{world_size - 1} (got {rank})")
    if not 0 <= worker < num_workers:
        raise ValueError(f"worker must be in 0..{num_workers - 1} (got {worker})")
    slots = world_size * num_workers
    units = source_units(shards, slots=slots, fields=fields)
    if len(units) < slots and worker == 0 and rank == 0:
        warnings.warn(
            f"{len(units)} shards for {slots} readers (ranks x workers): readers share shards, each "
            "keeping every k-th sample and streaming past the rest; more, smaller shards read faster",
            stacklevel=2,
        )
    order = shard_order(units, seed=seed, epoch=epoch, shuffle=shuffle_shards)
    return split_shards(order, slot=rank * num_workers + worker, slots=slots)
