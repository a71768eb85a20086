"""patchloom.read.order on its own: the epoch's shard order and its split over reader slots, at the
boundaries (as many shards as slots, one fewer, one more, none) and with the argument checks.
Expectations are worked out by hand: slot s of S takes shards s, s+S, ...; with n < S shards,
slot s reads shard s % n keeping samples i with i % parts == s // n."""

from __future__ import annotations

import warnings

import pytest

from patchloom.read.order import reader_tasks, shard_order, split_shards

SHARDS = [f"/data/s{i}.tar" for i in range(7)]


def urls(tasks) -> list[str]:
    return [t.url for t in tasks]


@pytest.mark.parametrize("slots", [1, 2, 3, 6, 7])
def test_with_at_least_as_many_shards_as_slots_each_slot_takes_every_slots_th(slots):
    shares = [split_shards(SHARDS, slot=s, slots=slots) for s in range(slots)]
    for s, share in enumerate(shares):
        assert urls(share) == SHARDS[s::slots]
        assert all((t.part, t.parts) == (0, 1) for t in share)  # whole shards, nothing shared
    assert sorted(u for share in shares for u in urls(share)) == sorted(SHARDS)


@pytest.mark.parametrize("slots", [8, 9, 14, 15])
def test_with_fewer_shards_than_slots_slots_share_a_shard_by_sample_index(slots):
    n = len(SHARDS)
    shares = [split_shards(SHARDS, slot=s, slots=slots) for s in range(slots)]
    assert all(len(share) == 1 for share in shares)  # nobody idles
    for s, (task,) in enumerate(shares):
        assert task.url == SHARDS[s % n] and task.part == s // n
        assert task.parts == len(range(s % n, slots, n))  # how many slots share that shard
    for shard in SHARDS:  # the parts of each shard are 0..parts-1, once each: every sample read once
        parts = sorted((t.part, t.parts) for (t,) in shares if t.url == shard)
        assert [p for p, _ in parts] == list(range(len(parts))) and {q for _, q in parts} == {len(parts)}


def test_empty_and_out_of_range():
    assert split_shards([], slot=0, slots=3) == []
    for slot, slots in ((3, 3), (-1, 3), (0, 0)):
        with pytest.raises(ValueError, match="out of range"):
            split_shards(SHARDS, slot=slot, slots=slots)
    with pytest.raises(ValueError, match=r"rank must be in 0..1 \(got 2\)"):
        reader_tasks(SHARDS, seed=0, epoch=0, rank=2, world_size=2)
    for worker in (-1, 4):
        with pytest.raises(ValueError, match=rf"worker must be in 0..3 \(got {worker}\)"):
            reader_tasks(SHARDS, seed=0, epoch=0, worker=worker, num_workers=4)
    with pytest.raises(ValueError, match=r"rank must be in 0..1 \(got -1\)"):
        reader_tasks(SHARDS, seed=0, epoch=0, rank=-1, world_size=2)
    assert reader_tasks(SHARDS, seed=0, epoch=0, rank=1, world_size=2, worker=3, num_workers=4)  # the last slot


def test_shard_order_is_a_seeded_permutation_shared_by_every_reader():
    order = shard_order(SHARDS, seed=4, epoch=1, shuffle=True)
    assert sorted(order) == sorted(SHARDS) and order != SHARDS
    assert order == shard_order(list(SHARDS), seed=4, epoch=1, shuffle=True)
    assert order != shard_order(SHARDS, seed=4, epoch=2, shuffle=True)
    assert order != shard_order(SHARDS, seed=5, epoch=1, shuffle=True)
    assert shard_order(SHARDS, seed=4, epoch=1, shuffle=False) == SHARDS
    assert shard_order([], seed=4, epoch=1, shuffle=True) == []


def test_reader_tasks_are_the_split_of_the_epoch_order_by_rank_then_worker():
    order = shard_order(SHARDS, seed=2, epoch=3, shuffle=True)
    for rank in range(2):
        for worker in range(2):
            tasks = reader_tasks(SHARDS, seed=2, epoch=3, rank=rank, world_size=2, worker=worker, num_workers=2)
            assert urls(tasks) == order[rank * 2 + worker::4]
    plain = reader_tasks(SHARDS, seed=2, epoch=3, shuffle_shards=False, rank=1, world_size=3)
    assert urls(plain) == SHARDS[1::3]


def test_sharing_is_warned_once_by_the_first_reader_only():
    with pytest.warns(UserWarning, match="7 shards for 8 readers"):
        reader_tasks(SHARDS, seed=0, epoch=0, rank=0, world_size=8)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        reader_tasks(SHARDS, seed=0, epoch=0, rank=1, world_size=8)  # not the first reader
        reader_tasks(SHARDS, seed=0, epoch=0, rank=0, world_size=4, worker=1, num_workers=2)
        reader_tasks(SHARDS, seed=0, epoch=0, rank=0, world_size=7)  # exactly one shard each
