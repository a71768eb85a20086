from __future__ import annotations

import numpy as np

from patchloom import PatchSet, pack
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
