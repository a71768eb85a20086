from __future__ import annotations

import numpy as np
import pytest

from patchloom import PatchSet, Packer, pack
from patchloom.packing.assign import ALGORITHMS, MAX_WAIT_BATCHES, assign_rows
from patchloom.image.patches import grid_coords


def ps(n: int, key: str, d: int = 12, label: int | None = 1) -> PatchSet:
    gh, gw = 1, n
    patches = np.full((n, d), hash(key) % 251, dtype=np.uint8)
    return PatchSet(patches, grid_coords(gh, gw), (gh, gw), key, label)


@pytest.mark.parametrize("algorithm", sorted(ALGORITHMS))
def test_assign_rows_respects_capacity_and_image_limit(algorithm):
    rng = np.random.default_rng(0)
    sizes = rng.integers(1, 60, size=200).tolist()
    rows, left = assign_rows(sizes, seq_len=64, rows=6, max_images_per_row=3, algorithm=algorithm)
    placed = [i for r in rows for i in r]
    assert sorted(placed + left) == list(range(200))  # every item placed or left, once
    for r in rows:
        assert sum(sizes[i] for i in r) <= 64
        assert len(r) <= 3


def test_first_fit_and_best_fit_differ_as_defined():
    sizes = [6, 5, 3]
    ff, _ = assign_rows(sizes, seq_len=10, rows=2, algorithm="first_fit")
    bf, _ = assign_rows(sizes, seq_len=10, rows=2, algorithm="best_fit")
    # first fit: 6 -> row0, 5 -> row1, 3 -> row0 (first with room). best fit: 3 -> row1 (5 left) vs row0 (4 left) -> row0.
    assert ff == [[0, 2], [1]]
    assert bf == [[0, 2], [1]]  # here the tightest row is also the first one
    sizes = [4, 7, 2]
    bf, _ = assign_rows(sizes, seq_len=10, rows=2, algorithm="best_fit")
    ff, _ = assign_rows(sizes, seq_len=10, rows=2, algorithm="first_fit")
    assert ff == [[0, 2], [1]]  # 2 goes into row0 (6 left), the first that fits
    assert bf == [[0], [1, 2]]  # 2 goes into row1 (3 left), the tightest


def test_in_order_keeps_arrival_order():
    sizes = [8, 8, 1, 1]
    rows, left = assign_rows(sizes, seq_len=10, rows=1, algorithm="in_order")
    assert rows == [[0]] and left == [1, 2, 3]  # no jumping ahead, unlike first fit
    rows, left = assign_rows(sizes, seq_len=10, rows=1, algorithm="first_fit")
    assert rows == [[0, 2, 3]] and left == [1]


def test_unbounded_rows_open_as_needed():
    rows, left = assign_rows([10, 10, 10], seq_len=10, rows=None)
    assert rows == [[0], [1], [2]] and left == []


@pytest.mark.parametrize("algorithm", sorted(ALGORITHMS))
def test_nothing_to_place_opens_no_unbounded_row_and_fills_no_fixed_one(algorithm):
    assert assign_rows([], seq_len=10, rows=None, algorithm=algorithm) == ([], [])
    assert assign_rows([], seq_len=10, rows=2, algorithm=algorithm) == ([[], []], [])


def test_item_larger_than_row_is_an_error():
    with pytest.raises(ValueError, match="seq_len"):
        assign_rows([11], seq_len=10, rows=1)


def test_pack_writes_segments_coords_and_labels():
    items = [ps(3, "a", label=4), ps(2, "b", label=None), ps(4, "c", label=7)]
    batch = pack(items, seq_len=6)
    assert batch.patches.shape == (2, 6, 12)
    assert batch.keys == [["a", "b"], ["c"]]
    np.testing.assert_array_equal(batch.segment_ids, [[1, 1, 1, 2, 2, 0], [1, 1, 1, 1, 0, 0]])
    np.testing.assert_array_equal(batch.coords[0, :, 1], [0, 1, 2, 0, 1, 0])
    np.testing.assert_array_equal(batch.labels, [[4, -1], [7, -1]])
    np.testing.assert_array_equal(batch.grids[1], [[1, 4], [0, 0]])
    np.testing.assert_array_equal(batch.patches[0, 3], items[1].patches[0])
    assert not batch.patches[0, 5].any()  # padding is zeros


def test_pack_with_fixed_rows_refuses_to_drop():
    with pytest.raises(ValueError, match="do not fit"):
        pack([ps(5, "a"), ps(5, "b"), ps(5, "c")], seq_len=6, rows=2)


def test_packer_never_drops_and_keeps_shape():
    rng = np.random.default_rng(3)
    items = [ps(int(n), f"k{i}") for i, n in enumerate(rng.integers(1, 30, size=101))]
    packer = Packer(seq_len=32, rows=3, max_images_per_row=4, buffer=10)
    batches = []
    for n_pushed, it in enumerate(items, 1):
        batches += packer.push(it)
        # Held items are exactly those not yet emitted.
        emitted = sum(b.num_images for b in batches)
        assert emitted + len(packer.pending) == n_pushed
    batches += list(packer.flush())
    keys = [k for b in batches for row in b.keys for k in row]
    assert sorted(keys) == sorted(p.key for p in items)
    assert {b.patches.shape for b in batches} == {(3, 32, 12)}
    assert {b.grids.shape for b in batches} == {(3, 4, 2)}


def test_packer_carries_what_does_not_fit():
    packer = Packer(seq_len=10, rows=1, buffer=3)
    out = []
    for n, k in [(6, "a"), (6, "b"), (3, "c")]:
        out += packer.push(ps(n, k))
    assert [b.keys for b in out] == [[["a", "c"]]]
    assert [p.key for p in packer.pending] == ["b"]
    assert [b.keys for b in packer.flush()] == [[["b"]]]


def test_packer_rejects_oversized_image_with_advice():
    with pytest.raises(ValueError, match="max_tokens"):
        Packer(seq_len=4, rows=1).push(ps(5, "big"))


def test_mixed_patch_dims_are_an_error():
    with pytest.raises(ValueError, match="patch dimension"):
        pack([ps(2, "a", d=12), ps(2, "b", d=48)], seq_len=8)


def test_small_buffer_waits_for_a_batch_worth_of_tokens():
    """A buffer smaller than a batch's capacity must not emit half-empty batches."""
    packer = Packer(seq_len=10, rows=4, max_images_per_row=2, buffer=2)
    out = []
    for i in range(8):
        out += packer.push(ps(5, f"k{i}"))
    assert len(out) == 1 and out[0].num_tokens == 40  # 8 images of 5 fill 4 rows of 10 exactly
    assert not packer.pending


def test_packing_bench_reports_each_algorithm_and_buffer():
    from patchloom import Recipe
    from patchloom.bench.packing import bench_packing

    res = bench_packing(Recipe.from_dict({"sizing": {"max_tokens": 64}, "packing": {"seq_len": 256, "rows": 2}}),
                        images=300, buffers=(4, 32))
    assert {(r["algorithm"], r["buffer"]) for r in res["results"]} == {
        (a, b) for a in ("largest_first", "first_fit", "best_fit", "in_order") for b in (4, 32)}
    assert all(0 <= r["padding_pct"] < 50 for r in res["results"])


# ----------------------------------------------------------------------------- largest_first


def test_largest_first_places_big_items_first_and_fills_gaps_with_small():
    sizes = [4, 7, 3, 6]
    rows, left = assign_rows(sizes, seq_len=10, rows=2, algorithm="largest_first")
    assert rows == [[1, 2], [3, 0]]  # 7+3 and 6+4: both rows exactly full
    assert left == []
    ff_rows, ff_left = assign_rows(sizes, seq_len=10, rows=2, algorithm="first_fit")
    assert ff_left  # arrival order strands an item here
    assert sum(sizes[i] for r in rows for i in r) > sum(sizes[i] for r in ff_rows for i in r)


def _stream_padding_and_waits(algorithm: str, seed: int = 0) -> tuple[float, int]:
    rng = np.random.default_rng(seed)
    packer = Packer(seq_len=256, rows=4, max_images_per_row=16, buffer=32, algorithm=algorithm)
    arrived: dict[str, int] = {}
    real = slots = worst = 0
    for i, n in enumerate(rng.integers(8, 120, size=3000)):
        key = f"k{i}"
        arrived[key] = packer.emitted
        for batch in packer.push(ps(int(n), key)):
            real += batch.num_tokens
            slots += batch.segment_ids.size
            worst = max(worst, max(packer.emitted - 1 - arrived[k] for row in batch.keys for k in row))
    return 1 - real / slots, worst


def test_largest_first_pads_less_than_first_fit_and_caps_the_wait():
    pad_lf, wait_lf = _stream_padding_and_waits("largest_first")
    pad_ff, _ = _stream_padding_and_waits("first_fit")
    assert pad_lf < pad_ff
    # An image arriving while batch e is being filled goes out in batch e + MAX_WAIT_BATCHES at the
    # latest (it goes first once it has waited that many batches, and any image fits an empty row).
    assert wait_lf <= MAX_WAIT_BATCHES


def test_packer_restore_keeps_waits():
    packer = Packer(seq_len=10, rows=1, buffer=1, algorithm="largest_first")
    items = [ps(6, "a"), ps(6, "b")]
    for item in items:
        list(packer.push(item))
    assert packer.emitted == 1 and packer.waited() == [1]  # "b" was there when the first batch was made
    fresh = Packer(seq_len=10, rows=1, buffer=1, algorithm="largest_first")
    fresh.restore(list(packer.pending), [3])
    assert fresh.waited() == [3]
    with pytest.raises(ValueError, match="waits"):
        fresh.restore([ps(1, "x")], [1, 2])


# ----------------------------------------------------------------------------- the algorithm table


@pytest.mark.parametrize("algorithm", sorted(ALGORITHMS))
def test_every_algorithm_opens_rows_as_needed_and_leaves_nothing(algorithm):
    sizes = np.random.default_rng(1).integers(1, 11, size=50).tolist()
    rows, left = assign_rows(sizes, seq_len=10, rows=None, max_images_per_row=3, algorithm=algorithm)
    assert left == [] and sorted(i for r in rows for i in r) == list(range(50))
    assert all(sum(sizes[i] for i in r) <= 10 and 0 < len(r) <= 3 for r in rows)


def test_a_name_added_to_the_table_is_all_a_new_algorithm_needs(monkeypatch):
    def one_per_row(sizes, *, seq_len, rows, cap, waited=None):
        n = len(sizes) if rows is None else min(rows, len(sizes))
        return [[i] for i in range(n)], list(range(n, len(sizes)))

    with pytest.raises(ValueError, match="one_per_row"):
        Packer(seq_len=10, rows=2, algorithm="one_per_row")
    monkeypatch.setitem(ALGORITHMS, "one_per_row", one_per_row)
    packer = Packer(seq_len=10, rows=2, buffer=3, algorithm="one_per_row")
    out = [b for n, k in [(2, "a"), (2, "b"), (9, "c"), (9, "d")] for b in packer.push(ps(n, k))]
    assert [b.keys for b in out] == [[["a"], ["b"]]] and [p.key for p in packer.pending] == ["c", "d"]


def test_largest_first_puts_images_that_waited_long_before_bigger_ones():
    sizes = [3, 9, 8]
    assert assign_rows(sizes, seq_len=10, rows=1, algorithm="largest_first") == ([[1]], [0, 2])
    waited = [MAX_WAIT_BATCHES, 0, 0]  # item 0 has waited long enough: it goes first
    assert assign_rows(sizes, seq_len=10, rows=1, algorithm="largest_first", waited=waited) == ([[0]], [1, 2])
    waited = [MAX_WAIT_BATCHES - 1, 0, 0]
    assert assign_rows(sizes, seq_len=10, rows=1, algorithm="largest_first", waited=waited) == ([[1]], [0, 2])


# ----------------------------------------------------------------------------- Packer state


def test_packer_state_holds_references_and_waits_and_resumes_exactly():
    def item(n: int, key: str, index: int) -> PatchSet:
        out = ps(n, key)
        out.meta.update(shard="s.tar", index=index)
        return out

    items = [item(n, f"k{i}", i) for i, n in enumerate([6, 6, 3, 7, 2, 5, 4, 6, 1, 8])]
    make = lambda: Packer(seq_len=10, rows=1, buffer=3, algorithm="largest_first")  # noqa: E731
    whole = make()
    full = [b.keys for it in items for b in whole.push(it)] + [b.keys for b in whole.flush()]
    first = make()
    head = [b.keys for it in items[:5] for b in first.push(it)]
    state = first.state_dict()
    assert state == {"pending": [["s.tar", p.meta["index"], w] for p, w in zip(first.pending, first.waited())]}
    asked = []

    def materialise(refs):
        asked.append(list(refs))
        return [items[index] for _, index in refs]

    again = make()
    again.load_state_dict(state, materialise)
    assert asked == [[("s.tar", p.meta["index"]) for p in first.pending]]
    assert again.waited() == first.waited()
    rest = [b.keys for it in items[5:] for b in again.push(it)] + [b.keys for b in again.flush()]
    assert head + rest == full


def test_packer_state_needs_images_read_from_shards():
    packer = Packer(seq_len=10, rows=2, buffer=8)
    packer.push(ps(2, "loose"))
    with pytest.raises(ValueError, match="loose"):
        packer.state_dict()
    for meta in ({"shard": "s.tar"}, {"index": 3}):  # both are needed
        half = Packer(seq_len=10, rows=2, buffer=8)
        item = ps(2, "half")
        item.meta.update(meta)
        half.push(item)
        with pytest.raises(ValueError, match="half"):
            half.state_dict()


# ----------------------------------------------------------------------------- exact thresholds


def test_a_small_image_goes_out_after_exactly_eight_batches_of_bigger_ones():
    """README: "an image that has waited 8 batches goes first". A 1-token image behind a stream of
    row-filling 10-token images loses to them in batches 0..7 and goes out, alone, in batch 8."""
    assert MAX_WAIT_BATCHES == 8
    packer = Packer(seq_len=10, rows=1, buffer=1, algorithm="largest_first")
    out = packer.push(ps(1, "small"))
    for i in range(12):
        out += packer.push(ps(10, f"big{i}"))
    big = [[f"big{i}"] for i in range(12)]
    assert [b.keys[0] for b in out] == big[:8] + [["small"]] + big[8:11]
    assert [p.key for p in packer.pending] == ["big11"] and packer.waited() == [1]  # passed over once


def test_the_wait_guard_is_what_bounds_the_wait():
    """Without the waits, largest_first would leave the small image behind for ever: the guard, not
    the stream, gets it out (so the test above can fail)."""
    sizes = [1] + [10] * 9
    rows, left = assign_rows(sizes, seq_len=10, rows=1, algorithm="largest_first")
    assert rows == [[1]] and 0 in left
    rows, left = assign_rows(sizes, seq_len=10, rows=1, algorithm="largest_first", waited=[8] + [0] * 9)
    assert rows == [[0]] and left == list(range(1, 10))


@pytest.mark.parametrize("algorithm", sorted(ALGORITHMS))
def test_a_row_takes_an_image_of_exactly_its_free_tokens_and_exactly_cap_images(algorithm):
    """Both row limits are inclusive: an image of exactly the free tokens fits, and a row holds
    exactly max_images_per_row images, not one more."""
    rows, left = assign_rows([4, 6], seq_len=10, rows=1, algorithm=algorithm)
    assert sorted(rows[0]) == [0, 1] and left == []
    rows, left = assign_rows([4, 7], seq_len=10, rows=1, algorithm=algorithm)
    assert len(rows[0]) == 1 and len(left) == 1
    rows, left = assign_rows([1, 1, 1, 1], seq_len=10, rows=1, max_images_per_row=3, algorithm=algorithm)
    assert len(rows[0]) == 3 and len(left) == 1
    rows, left = assign_rows([10], seq_len=10, rows=1, algorithm=algorithm)
    assert rows == [[0]] and left == []


def test_packer_emits_exactly_when_the_buffer_and_the_tokens_are_both_reached():
    """A batch is assembled at the push that makes the look-ahead hold `buffer` images and a batch's
    worth (rows x seq_len) of tokens, not one push earlier or later."""
    packer = Packer(seq_len=10, rows=2, max_images_per_row=4, buffer=4)
    assert packer.push(ps(5, "a")) == [] and packer.push(ps(5, "b")) == [] and packer.push(ps(5, "c")) == []
    assert packer.pending_tokens == 15
    out = packer.push(ps(5, "d"))  # 4 images, 20 tokens = 2 rows x 10: both thresholds met exactly
    assert len(out) == 1 and out[0].num_tokens == 20 and not packer.pending
    few = Packer(seq_len=10, rows=2, max_images_per_row=4, buffer=5)
    assert [b for k in "abcd" for b in few.push(ps(5, k))] == []  # 20 tokens but only 4 < 5 images
    thin = Packer(seq_len=10, rows=2, max_images_per_row=4, buffer=2)
    assert [b for k in "abc" for b in thin.push(ps(5, k))] == []  # 3 images but 15 < 20 tokens
    assert len(thin.push(ps(5, "d"))) == 1


def test_packer_defaults_are_the_recipe_defaults():
    """A Packer built by hand behaves like the recipe's default packing section."""
    from patchloom import Recipe

    p = Recipe.from_dict({}).packing
    packer = Packer(seq_len=p.seq_len, rows=p.rows)
    assert (packer.max_images_per_row, packer.buffer, packer.algorithm) == (p.max_images_per_row, p.lookahead,
                                                                           p.algorithm)


def test_rows_opened_as_needed_start_empty():
    """rows=None: each new row has the whole seq_len and room for max_images_per_row images."""
    for algorithm in sorted(ALGORITHMS):
        rows, left = assign_rows([1, 1, 1, 1, 1], seq_len=10, rows=None, max_images_per_row=2, algorithm=algorithm)
        assert rows == [[0, 1], [2, 3], [4]] and left == [], algorithm
        rows, _ = assign_rows([6, 4, 6, 4], seq_len=10, rows=None, max_images_per_row=4, algorithm=algorithm)
        assert all(sum([6, 4, 6, 4][i] for i in r) <= 10 for r in rows) and len(rows) == 2, algorithm


def test_an_unknown_algorithm_is_a_value_error_naming_the_known_ones():
    with pytest.raises(ValueError, match="largest_first, first_fit, best_fit, in_order"):
        assign_rows([1], seq_len=4, rows=1, algorithm="worst_fit")


def test_build_batch_of_no_images_is_all_padding_when_told_the_patch_shape():
    from patchloom.packing.packer import build_batch

    b = build_batch([], [[], []], seq_len=4, max_images_per_row=3, patch_dim=6, dtype=np.float16)
    assert b.patches.shape == (2, 4, 6) and b.patches.dtype == np.float16 and not b.patches.any()
    assert not b.segment_ids.any() and (b.labels == -1).all() and b.keys == [[], []]
    with pytest.raises(ValueError, match="an empty batch needs patch_dim and dtype"):
        build_batch([], [[]], seq_len=4, max_images_per_row=3)


def test_restore_without_waits_counts_them_as_zero_and_a_directly_set_buffer_counts_from_now():
    packer = Packer(seq_len=10, rows=1, buffer=8, algorithm="largest_first")
    packer.restore([ps(3, "a"), ps(4, "b")])
    assert packer.waited() == [0, 0]
    direct = Packer(seq_len=10, rows=1, buffer=8, algorithm="largest_first")
    direct.pending = [ps(3, "a"), ps(4, "b"), ps(5, "c")]  # set by hand: nothing has waited yet
    assert [b.keys for b in direct.flush()] == [[["c", "b"]], [["a"]]]
    assert direct.emitted == 2 and direct.pending == []
    items = [ps(3, "a"), ps(4, "b")]
    for i, item in enumerate(items):
        item.meta.update(shard="s.tar", index=i)
    direct.pending = list(items)  # after two batches: waits count from now, for every item
    assert direct.waited() == [0, 0]
    fresh = Packer(seq_len=10, rows=1, buffer=8)
    fresh.pending = list(items)
    assert fresh.state_dict() == {"pending": [["s.tar", 0, 0], ["s.tar", 1, 0]]}


def test_a_saved_state_carries_each_pending_image_s_wait():
    """The state's third column is batches waited (emitted since arrival), for a packer that has
    emitted some batches already."""
    packer = Packer(seq_len=10, rows=1, buffer=1, algorithm="largest_first")
    small = ps(1, "small")
    small.meta.update(shard="s.tar", index=0)
    packer.push(small)
    for i in range(3):
        big = ps(10, f"big{i}")
        big.meta.update(shard="s.tar", index=i + 1)
        packer.push(big)
    assert packer.emitted == 3 and packer.waited() == [3]
    assert packer.state_dict() == {"pending": [["s.tar", 0, 3]]}


def test_a_sample_of_several_images_is_one_unit_named_by_its_first_image():
    from patchloom.packing.packer import Sample, as_unit

    a, b = ps(2, "first"), ps(3, "second")
    a.meta["shard"] = "a.tar"
    b.meta["shard"] = "b.tar"
    sample = as_unit([a, b])
    assert isinstance(sample, Sample) and sample.key == "first" and sample.meta["shard"] == "a.tar"
    assert sample.num_tokens == 5
    assert as_unit([a]) is a and as_unit(a) is a and as_unit(sample) is sample
    for bad in ([], [a, "not a PatchSet"]):
        with pytest.raises(TypeError, match="non-empty list"):
            as_unit(bad)


def test_a_buffer_of_one_emits_at_the_first_full_batch():
    for buffer in (1, 0):  # a buffer below one counts as one
        packer = Packer(seq_len=10, rows=1, buffer=buffer)
        assert packer.buffer == 1
        assert len(packer.push(ps(10, "full"))) == 1 and not packer.pending


def test_temporal_tokens_carry_their_slice_and_segments_their_frames():
    """With times (a temporal recipe), the batch has times int32 [B, L] (each token's slice, 0 on
    padding and for still images) and frames int32 [B, S] (slices per segment, 0 where absent)."""
    clip = PatchSet(np.ones((4, 12), np.uint8), grid_coords(1, 2).repeat(2, axis=0), (1, 2), "clip", 1,
                    times=np.array([0, 0, 1, 1], np.int32), frames=2)
    still = PatchSet(np.ones((2, 12), np.uint8), grid_coords(1, 2), (1, 2), "still", 2,
                     times=np.zeros(2, np.int32), frames=1)
    b = pack([clip, still], seq_len=8, max_images_per_row=3)
    assert b.times.dtype == np.int32 and b.frames.dtype == np.int32
    assert b.times.tolist() == [[0, 0, 1, 1, 0, 0, 0, 0]] and b.frames.tolist() == [[2, 1, 0]]
    plain = pack([ps(2, "a"), ps(3, "b")], seq_len=8)
    assert plain.times is None and plain.frames is None


def test_each_segment_keeps_its_text():
    a, b, c = ps(3, "a"), ps(2, "b"), ps(4, "c")
    a.text, c.text = "a red kite", "two boats"
    batch = pack([a, b, c], seq_len=6, max_images_per_row=2)
    assert batch.keys == [["a", "b"], ["c"]] and batch.texts == [["a red kite", ""], ["two boats"]]
