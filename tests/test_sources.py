from __future__ import annotations

import json
from collections import Counter

import numpy as np
import pytest

from patchloom.seeding import stream_rng
from patchloom.read import (
    ReaderCursor,
    Record,
    ShuffleBuffer,
    SourceError,
    expand_shards,
    read_tasks,
    reader_tasks,
    shard_order,
    split_shards,
)

from conftest import make_shards


def all_keys(shards, **kw):
    tasks = reader_tasks(shards, seed=0, epoch=kw.pop("epoch", 0), **kw)
    return [r.key for r in read_tasks(tasks)]


def test_expand_brace_glob_list(tmp_path):
    paths = make_shards(tmp_path, 3, 2)
    assert expand_shards(str(tmp_path / "part-{000..002}.tar")) == paths
    assert expand_shards(str(tmp_path / "part-*.tar")) == paths
    assert expand_shards(paths[:2]) == paths[:2]
    assert expand_shards("https://example.invalid/x-{0..1}.tar") == [
        "https://example.invalid/x-0.tar", "https://example.invalid/x-1.tar"]


def test_expand_errors_name_the_problem(tmp_path):
    with pytest.raises(SourceError, match="does not exist"):
        expand_shards(str(tmp_path / "missing.tar"))
    with pytest.raises(SourceError, match="matches no file"):
        expand_shards(str(tmp_path / "*.tar"))
    with pytest.raises(SourceError, match="no shards"):
        expand_shards(None)


def test_shell_urls_refused_unless_allowed(tmp_path):
    with pytest.raises(SourceError, match="allow_shell"):
        expand_shards("pipe:cat /etc/passwd")
    marker = tmp_path / "ran"
    # Refused at open time too, even if a caller skipped expansion.
    with pytest.raises(SourceError):
        list(read_tasks(split_shards([f"pipe:touch {marker}"], slot=0, slots=1)))
    assert not marker.exists()
    paths = make_shards(tmp_path, 1, 3)
    urls = expand_shards(f"pipe:cat {paths[0]}", allow_shell=True)
    tasks = split_shards(urls, slot=0, slots=1)
    assert len(list(read_tasks(tasks, allow_shell=True))) == 3


def test_records_carry_key_url_and_index(tmp_path):
    paths = make_shards(tmp_path, 1, 4)
    recs = list(read_tasks(split_shards(paths, slot=0, slots=1)))
    assert [r.key for r in recs] == [f"s00-{i:04d}" for i in range(4)]
    assert all(r.url == paths[0] for r in recs)
    assert [r.index for r in recs] == [0, 1, 2, 3]
    assert set(recs[0].members) == {"png", "cls"}


@pytest.mark.parametrize("n_shards,world,workers", [(8, 2, 2), (5, 2, 2), (3, 2, 2), (1, 3, 2), (2, 1, 4)])
def test_every_sample_read_exactly_once_across_ranks_and_workers(tmp_path, n_shards, world, workers):
    paths = make_shards(tmp_path, n_shards, 7)  # at least as many samples per shard as readers
    expected = Counter(all_keys(paths))
    seen = Counter()
    busy = 0
    for rank in range(world):
        for worker in range(workers):
            with pytest.warns(UserWarning) if (n_shards < world * workers and rank == worker == 0) else _nowarn():
                keys = all_keys(paths, rank=rank, world_size=world, worker=worker, num_workers=workers)
            seen.update(keys)
            busy += bool(keys)
    assert seen == expected
    assert busy == world * workers  # nobody idles, even with fewer shards than readers


class _nowarn:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


def test_shard_order_is_seeded_per_epoch_and_shared_by_ranks():
    shards = [f"s{i}" for i in range(20)]
    a = shard_order(shards, seed=1, epoch=0, shuffle=True)
    assert a == shard_order(shards, seed=1, epoch=0, shuffle=True)
    assert a != shard_order(shards, seed=1, epoch=1, shuffle=True)
    assert sorted(a) == sorted(shards)
    assert shard_order(shards, seed=1, epoch=3, shuffle=False) == shards


def test_shuffle_buffer_is_a_seeded_permutation():
    recs = [Record(f"k{i}", "u", i, {}) for i in range(100)]
    out1 = [r.key for r in ShuffleBuffer(16, stream_rng(0, 0, "t"))(iter(recs))]
    out2 = [r.key for r in ShuffleBuffer(16, stream_rng(0, 0, "t"))(iter(recs))]
    out3 = [r.key for r in ShuffleBuffer(16, stream_rng(0, 1, "t"))(iter(recs))]
    assert out1 == out2 != out3
    assert sorted(out1) == sorted(r.key for r in recs)
    assert out1 != [r.key for r in recs]
    # A buffer of k cannot move a record earlier than k-1 places before its arrival.
    pos = {k: i for i, k in enumerate(out1)}
    assert all(pos[f"k{i}"] >= i - 15 for i in range(100))


def test_unreadable_shard_is_reported_not_silent(tmp_path):
    good = make_shards(tmp_path, 1, 3)[0]
    bad = tmp_path / "bad.tar"
    bad.write_bytes(open(good, "rb").read()[:700])  # truncated mid-member
    errors = []
    recs = list(read_tasks(split_shards([str(bad), good], slot=0, slots=1),
                           on_shard_error=lambda url, exc: errors.append(url)))
    assert errors == [str(bad)]
    assert len([r for r in recs if r.url == good]) == 3
    with pytest.raises(SourceError, match="bad.tar"):
        list(read_tasks(split_shards([str(bad)], slot=0, slots=1)))


def test_split_within_shards_uses_sample_index_modulo():
    tasks = [split_shards(["a", "b"], slot=s, slots=5) for s in range(5)]
    assert [(t[0].url, t[0].part, t[0].parts) for t in tasks] == [
        ("a", 0, 3), ("b", 0, 2), ("a", 1, 3), ("b", 1, 2), ("a", 2, 3)]
    assert np.all([len(t) == 1 for t in tasks])


def test_shuffle_buffer_state_resumes_the_same_order():
    recs = [Record(f"k{i}", "u.tar", i, {}) for i in range(40)]
    whole = [r.key for r in ShuffleBuffer(8, stream_rng(0, 0, "t"))(iter(recs))]
    buf = ShuffleBuffer(8, stream_rng(0, 0, "t"))
    it = buf(iter(recs))
    head = [next(it).key for _ in range(10)]  # 18 records read: 8 held, 10 out
    state = json.loads(json.dumps(buf.state_dict()))
    assert sorted(state["held"]) == sorted([r.url, r.index] for r in buf.held) and len(state["held"]) == 8
    by_ref = {(r.url, r.index): r for r in recs}
    again = ShuffleBuffer(8, stream_rng(0, 0, "t"))
    again.load_state_dict(state, lambda refs: [by_ref[ref] for ref in refs])
    assert head + [r.key for r in again(iter(recs[18:]))] == whole
    unrestored = ShuffleBuffer(8, stream_rng(0, 0, "t"))  # the same records held, the generator not restored
    unrestored.held = [by_ref[(url, index)] for url, index in state["held"]]
    assert head + [r.key for r in unrestored(iter(recs[18:]))] != whole


def test_reader_cursor_state_continues_where_it_stopped(tmp_path):
    paths = make_shards(tmp_path, 2, 5)
    tasks = split_shards(paths, slot=0, slots=1)
    whole = [r.key for r in ReaderCursor(tasks)]
    cur = ReaderCursor(tasks)
    it = iter(cur)
    head = [next(it).key for _ in range(7)]
    again = ReaderCursor(tasks)
    again.load_state_dict(json.loads(json.dumps(cur.state_dict())))
    assert head + [r.key for r in again] == whole and len(whole) == 10
