from __future__ import annotations

import numpy as np
import pytest

from patchloom import PatchSet, pack
from patchloom.packing.batch import PackedBatch
from patchloom.image.patches import grid_coords


def make(n_tokens: list[int], seq_len: int, d: int = 3):
    sets = []
    for i, n in enumerate(n_tokens):
        patches = np.arange(n * d, dtype=np.uint8).reshape(n, d)
        sets.append(PatchSet(patches, grid_coords(1, n), (1, n), f"k{i}", i))
    return pack(sets, seq_len, max_images_per_row=3)


def test_attention_mask_is_block_diagonal_and_padding_attends_nothing():
    b = make([2, 3, 4], seq_len=6)  # rows: [2,3] + pad 1 ; [4] + pad 2
    m = b.attention_mask()
    assert m.shape == (2, 6, 6) and m.dtype == bool
    expect0 = np.zeros((6, 6), bool)
    expect0[:2, :2] = True
    expect0[2:5, 2:5] = True
    np.testing.assert_array_equal(m[0], expect0)
    assert not m[1, 4:].any() and not m[1, :, 4:].any()
    m2 = b.attention_mask(padding_attends_self=True)
    assert m2[1, 4, 4] and m2[1, 5, 5] and not m2[1, 4, 5] and not m2[1, 4, :4].any()


def test_cu_seqlens_counts_pad_tails_as_segments():
    b = make([2, 3, 4], seq_len=6)
    np.testing.assert_array_equal(b.cu_seqlens(), [0, 2, 5, 6, 10, 12])
    assert b.cu_seqlens().dtype == np.int32
    assert b.max_seqlen == 4 and isinstance(b.max_seqlen, int)
    padded = b.cu_seqlens_fixed()
    assert padded.shape == (2 * (3 + 1) + 1,)
    np.testing.assert_array_equal(padded, [0, 2, 5, 6, 10, 12, 12, 12, 12])


def test_full_row_has_no_pad_segment():
    b = make([3, 3], seq_len=3)
    np.testing.assert_array_equal(b.cu_seqlens(), [0, 3, 6])


def test_segment_lengths_and_pool():
    b = make([2, 3, 4], seq_len=6)
    np.testing.assert_array_equal(b.segment_lengths(), [[2, 3, 0], [4, 0, 0]])
    feats = np.arange(2 * 6, dtype=np.float32).reshape(2, 6, 1)
    pooled = b.pool(feats)
    np.testing.assert_allclose(pooled[0, :, 0], [0.5, 3.0, 0.0])
    np.testing.assert_allclose(pooled[1, :, 0], [7.5, 0.0, 0.0])


def test_padding_fraction_and_counts():
    b = make([2, 3, 4], seq_len=6)
    assert b.num_tokens == 9 and b.num_images == 3
    assert abs(b.padding_fraction - 3 / 12) < 1e-12


def test_to_torch_shares_values():
    torch = __import__("torch")
    b = make([2, 3], seq_len=6)
    t = b.to_torch()
    assert t["segment_ids"].dtype == torch.int32 and t["labels"].dtype == torch.int64
    np.testing.assert_array_equal(t["patches"].numpy(), b.patches)
    assert t["keys"] == b.keys


def test_every_field_and_helper_has_its_documented_dtype_and_shape():
    """README / DESIGN: segment_ids, coords, grids int32; labels int64; masked bool; groups int32;
    attention_mask bool [B, L, L]; cu_seqlens int32; segment_lengths int32 [B, S]."""
    sets = []
    for i, n in enumerate([2, 3, 4]):
        masked = np.arange(n) % 2 == 0
        sets.append(PatchSet(np.full((n, 12), i, np.float16), grid_coords(1, n), (1, n), f"k{i}", i, masked=masked))
    b = pack(sets, 6, max_images_per_row=3)  # B=2, L=6, S=3, D=12
    B, L, S = 2, 6, 3
    expect = {"patches": ((B, L, 12), np.float16), "segment_ids": ((B, L), np.int32), "coords": ((B, L, 2), np.int32),
              "grids": ((B, S, 2), np.int32), "labels": ((B, S), np.int64), "masked": ((B, L), np.bool_),
              "groups": ((B, S), np.int32)}
    arrays = b.to_arrays()
    for name, (shape, dtype) in expect.items():
        value = getattr(b, name)
        assert value.shape == shape and value.dtype == dtype, (name, value.shape, value.dtype)
        if name in arrays:
            assert arrays[name] is value
    assert (b.rows, b.seq_len, b.max_images, b.num_images, b.num_tokens) == (B, L, S, 3, 9)
    assert all(isinstance(v, int) for v in (b.rows, b.seq_len, b.max_images, b.num_images, b.num_tokens))
    m = b.attention_mask()
    assert m.shape == (B, L, L) and m.dtype == np.bool_
    assert b.attention_mask(padding_attends_self=True).dtype == np.bool_
    cu = b.cu_seqlens()
    assert cu.dtype == np.int32 and cu.ndim == 1 and cu[0] == 0 and cu[-1] == B * L
    fixed = b.cu_seqlens_fixed()
    assert fixed.dtype == np.int32 and fixed.shape == (B * (S + 1) + 1,)
    lengths = b.segment_lengths()
    assert lengths.dtype == np.int32 and lengths.shape == (B, S)
    np.testing.assert_array_equal(lengths, [[2, 3, 0], [4, 0, 0]])
    pooled = b.pool(np.ones((B, L, 5), np.float32))
    assert pooled.shape == (B, S, 5) and pooled.dtype == np.float32  # float32 features in, float32 means out
    assert isinstance(b.max_seqlen, int) and isinstance(b.padding_fraction, float)
    np.testing.assert_array_equal(b.masked[0], [True, False, True, False, True, False])  # [T F] + [T F T] + pad
    np.testing.assert_array_equal(b.groups, [[1, 2, 0], [1, 0, 0]])


def test_to_torch_keeps_every_dtype():
    torch = __import__("torch")
    sets = [PatchSet(np.zeros((n, 3), np.uint8), grid_coords(1, n), (1, n), f"k{n}", n, masked=np.zeros(n, bool))
            for n in (2, 3)]
    t = pack(sets, 6, max_images_per_row=2).to_torch()
    want = {"patches": torch.uint8, "segment_ids": torch.int32, "coords": torch.int32, "grids": torch.int32,
            "labels": torch.int64, "masked": torch.bool, "groups": torch.int32}
    assert {k: t[k].dtype for k in want} == want
    assert tuple(t["patches"].shape) == (1, 6, 3) and tuple(t["grids"].shape) == (1, 2, 2)


def test_cu_seqlens_of_a_row_ending_exactly_full_and_a_segment_change_mid_row():
    """Boundaries: a row whose last image ends at L has no padding segment; the next row's first
    image starts a new segment even with the same segment id as the previous row's last."""
    b = make([3, 3, 2], seq_len=3)  # rows [3], [3], [2]+pad 1 (each row holds one image: 3+3 > 3)
    np.testing.assert_array_equal(b.cu_seqlens(), [0, 3, 6, 8, 9])
    assert b.max_seqlen == 3
    np.testing.assert_array_equal(b.cu_seqlens_fixed(), [0, 3, 6, 8, 9] + [9] * (3 * 4 + 1 - 5))


def test_a_batch_built_without_groups_has_one_sample_per_segment():
    """DESIGN: groups int32 [B, S], the 1-based sample of each segment within its row, 0 where
    absent; a PackedBatch made without groups (one image a sample) numbers its segments 1, 2, ...
    and has no texts ("" each)."""
    seg = np.array([[1, 1, 2, 3], [1, 1, 1, 0]], np.int32)
    grids = np.array([[[1, 2], [1, 1], [1, 1]], [[1, 3], [0, 0], [0, 0]]], np.int32)
    b = PackedBatch(np.zeros((2, 4, 3), np.uint8), seg, np.zeros((2, 4, 2), np.int32), grids,
                    np.full((2, 3), -1, np.int64), [["a", "b", "c"], ["d"]])
    assert b.groups.dtype == np.int32 and b.groups.tolist() == [[1, 2, 3], [1, 0, 0]]
    assert b.num_samples == 4 and isinstance(b.num_samples, int) and b.num_images == 4
    assert b.texts == [["", "", ""], [""]]
    given = np.array([[1, 1, 2], [1, 0, 0]], np.int32)  # a two-image sample: one group for both
    two = PackedBatch(b.patches, seg, b.coords, grids, b.labels, b.keys, groups=given)
    assert two.groups is given and two.num_samples == 3
    empty = PackedBatch(np.zeros((1, 2, 3), np.uint8), np.zeros((1, 2), np.int32), np.zeros((1, 2, 2), np.int32),
                        np.zeros((1, 2, 2), np.int32), np.full((1, 2), -1, np.int64), [[]])
    assert empty.num_samples == 0 and empty.groups.tolist() == [[0, 0]]
    with pytest.raises(ValueError, match="one string per segment"):
        PackedBatch(b.patches, seg, b.coords, grids, b.labels, b.keys, texts=[["x"], ["y"]])
