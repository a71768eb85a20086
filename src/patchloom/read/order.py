"""Who reads what, in which order: the epoch's seeded shard order and its split over ranks and
DataLoader workers (slots), so that every sample is read once across all readers."""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

from ..seeding import stream_rng


@dataclass(slots=True, frozen=True)
class ShardTask:
    """Read `url`, keeping the samples whose index i satisfies i % parts == part."""

    url: str
    part: int = 0
    parts: int = 1


def shard_order(shards: Sequence[str], *, seed: int, epoch: int, shuffle: bool) -> list[str]:
    """The epoch's shard order, identical on every rank and worker (seeded by seed and epoch only)."""
    shards = list(shards)
    if not shuffle:
        return shards
    perm = stream_rng(seed, epoch, "shard-order").permutation(len(shards))
    return [shards[i] for i in perm]


def split_shards(shards: Sequence[str], *, slot: int, slots: int) -> list[ShardTask]:
    """This reader's share of the shards, so that every sample is read once across all slots.

    With at least as many shards as slots, slot s takes shards s, s+slots, ... With fewer shards,
    several slots share a shard and each keeps every k-th sample of it, so no reader idles and no
    sample is duplicated (each sharing reader streams past the others' samples without copying them).
    """
    if not 0 <= slot < slots:
        raise ValueError(f"reader slot {slot} out of range for {slots} slots")
    n = len(shards)
    if n == 0:
        return []
    if n >= slots:
        return [ShardTask(url) for url in shards[slot::slots]]
    shard = slot % n
    parts = len(range(shard, slots, n))
    return [ShardTask(shards[shard], part=slot // n, parts=parts)]


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
) -> list[ShardTask]:
    """The shard tasks one reader (rank, worker) gets in one epoch."""
    if not 0 <= rank < world_size:
        raise ValueError(f"rank must be in 0..{world_size - 1} (got {rank})")
    if not 0 <= worker < num_workers:
        raise ValueError(f"worker must be in 0..{num_workers - 1} (got {worker})")
    slots = world_size * num_workers
    if len(shards) < slots and worker == 0 and rank == 0:
        warnings.warn(
            f"{len(shards)} shards for {slots} readers (ranks x workers): readers share shards, each "
            "keeping every k-th sample and streaming past the rest; more, smaller shards read faster",
            stacklevel=2,
        )
    order = shard_order(shards, seed=seed, epoch=epoch, shuffle=shuffle_shards)
    return split_shards(order, slot=rank * num_workers + worker, slots=slots)
