"""Packed attention checked against outside references.

- Attention: torch.nn.functional.scaled_dot_product_attention (PyTorch's reference attention) on
  each image alone is the reference; the packed batch with `attention_mask()` must give the same
  numbers on real tokens.
- cu_seqlens: the contract of the variable-length attention kernels (as documented with the
  kernels that take `cu_seqlens` / `max_seqlen`): int32 cumulative offsets over the flattened
  tokens, starting at 0, one more entry than sequences, non-decreasing, last entry the total
  token count, `max_seqlen` a host integer (common practice). Re-derived here independently from
  the segment-id runs.
"""

from __future__ import annotations

import numpy as np
import pytest

from patchloom import PatchSet, pack

torch = pytest.importorskip("torch")  # optional dependency: the attention checks need it
F = torch.nn.functional

HEADS, HEAD_DIM, D = 2, 8, 12


def _patchsets(sizes, seed=0):
    """PatchSets of the given token counts, float64 features, distinct keys."""
    rng = np.random.default_rng(seed)
    out = []
    for i, n in enumerate(sizes):
        gw = max(1, int(np.sqrt(n)))
        coords = np.array([divmod(j, gw) for j in range(n)], dtype=np.int32).reshape(n, 2)
        grid = (int(coords[:, 0].max()) + 1, gw)
        out.append(PatchSet(rng.normal(size=(n, D)), coords, grid, key=f"img{i}", label=i))
    return out


def _projections(seed=1):
    rng = np.random.default_rng(seed)
    return [torch.from_numpy(rng.normal(size=(D, HEADS * HEAD_DIM))) for _ in range(3)]


def _qkv(x: torch.Tensor, w) -> list[torch.Tensor]:
    """[..., T, D] features -> three [..., H, T, hd] tensors."""
    out = []
    for m in w:
        y = x @ m
        y = y.reshape(*y.shape[:-1], HEADS, HEAD_DIM)
        out.append(y.transpose(-3, -2))
    return out


CASES = {
    # (sizes, seq_len, rows): a full row, rows with padding, an empty row, single-token images
    "mixed": ([40, 24, 30, 17, 9, 50, 5], 64, None),
    "with-empty-row": ([10, 20, 1, 1], 64, 3),
    "one-each": ([64, 64], 64, None),
    "tiny": ([1, 2, 3], 8, None),
}


def _by_key(batch):
    """(row, segment id) -> key from the batch's own key lists."""
    return {(r, j + 1): k for r, row in enumerate(batch.keys) for j, k in enumerate(row)}


@pytest.mark.parametrize("padding_attends_self", [True, False])
@pytest.mark.parametrize("case", sorted(CASES))
def test_packed_attention_equals_per_image_attention(case, padding_attends_self):
    """Source: torch scaled_dot_product_attention per image (PyTorch reference attention)."""
    sizes, seq_len, rows = CASES[case]
    sets = _patchsets(sizes)
    batch = pack(sets, seq_len, rows)
    w = _projections()
    q, k, v = _qkv(torch.from_numpy(batch.patches), w)  # [B, H, L, hd]
    mask = torch.from_numpy(batch.attention_mask(padding_attends_self=padding_attends_self))
    assert mask.dtype == torch.bool and mask.shape == (batch.rows, seq_len, seq_len)
    out = F.scaled_dot_product_attention(q, k, v, attn_mask=mask[:, None])  # [B, H, L, hd]
    if padding_attends_self:
        assert torch.isfinite(out).all()
    seen = set()
    key_of = _by_key(batch)
    for r in range(batch.rows):
        seg = batch.segment_ids[r]
        for sid in sorted(set(seg.tolist()) - {0}):
            ps = next(s for s in sets if s.key == key_of[(r, sid)])
            idx = np.flatnonzero(seg == sid)
            assert len(idx) == ps.num_tokens
            np.testing.assert_array_equal(batch.patches[r, idx], ps.patches)
            qi, ki, vi = _qkv(torch.from_numpy(ps.patches)[None], w)
            alone = F.scaled_dot_product_attention(qi, ki, vi)[0]  # [H, n, hd]
            torch.testing.assert_close(out[r][:, idx], alone, rtol=0, atol=1e-6)
            seen.add(ps.key)
    assert seen == {s.key for s in sets}


def test_float32_attention_matches_to_1e6():
    """Source: torch scaled_dot_product_attention, float32 (same check at single precision)."""
    sets = _patchsets([33, 7, 20], seed=4)
    batch = pack(sets, 64, None)
    w = [m.float() * 0.3 for m in _projections(seed=5)]
    q, k, v = _qkv(torch.from_numpy(batch.patches).float(), w)
    mask = torch.from_numpy(batch.attention_mask(padding_attends_self=True))
    out = F.scaled_dot_product_attention(q, k, v, attn_mask=mask[:, None])
    key_of = _by_key(batch)
    for r in range(batch.rows):
        seg = batch.segment_ids[r]
        for sid in sorted(set(seg.tolist()) - {0}):
            ps = next(s for s in sets if s.key == key_of[(r, sid)])
            idx = np.flatnonzero(seg == sid)
            qi, ki, vi = _qkv(torch.from_numpy(ps.patches).float()[None], w)
            alone = F.scaled_dot_product_attention(qi, ki, vi)[0]
            torch.testing.assert_close(out[r][:, idx], alone, rtol=0, atol=1e-6)


@pytest.mark.parametrize("case", sorted(CASES))
def test_mask_is_block_diagonal_by_segment(case):
    """Source: block-diagonal masking by segment id (common practice), built here by loops."""
    sizes, seq_len, rows = CASES[case]
    batch = pack(_patchsets(sizes), seq_len, rows)
    seg = batch.segment_ids.tolist()
    want = np.array([[[a == b and a > 0 for b in row] for a in row] for row in seg])
    np.testing.assert_array_equal(batch.attention_mask(), want)
    for i in range(seq_len):
        for r, row in enumerate(seg):
            if row[i] == 0:
                want[r, i, i] = True  # padding may attend to itself only
    np.testing.assert_array_equal(batch.attention_mask(padding_attends_self=True), want)


def test_mask_blocks_attention_across_images():
    """Source: block-diagonal masking as common practice; a change to one image's values must not
    move another image's outputs."""
    sets = _patchsets([10, 12, 9], seed=2)
    batch = pack(sets, 32, None)
    w = _projections()
    x = torch.from_numpy(batch.patches.copy())
    seg = torch.from_numpy(batch.segment_ids)
    mask = torch.from_numpy(batch.attention_mask(padding_attends_self=True))[:, None]
    base = F.scaled_dot_product_attention(*_qkv(x, w), attn_mask=mask)
    x2 = x.clone()
    x2[seg == 1] += 5.0
    moved = F.scaled_dot_product_attention(*_qkv(x2, w), attn_mask=mask)
    other = (seg != 1)[:, None, :, None].expand_as(base)
    torch.testing.assert_close(moved[other], base[other], rtol=0, atol=1e-12)
    assert not torch.allclose(moved[~other], base[~other])


# ----------------------------------------------------------------------------- cu_seqlens


def _runs_reference(segment_ids: np.ndarray) -> list[int]:
    """Segment lengths over the flattened batch: each maximal run of one id within a row."""
    lengths = []
    for row in segment_ids.tolist():
        run = 1
        for a, b in zip(row, row[1:]):
            if a == b:
                run += 1
            else:
                lengths.append(run)
                run = 1
        lengths.append(run)
    return lengths


@pytest.mark.parametrize("case", sorted(CASES))
def test_cu_seqlens_contract(case):
    """Source: the variable-length attention kernels' documented cu_seqlens contract."""
    sizes, seq_len, rows = CASES[case]
    sets = _patchsets(sizes)
    batch = pack(sets, seq_len, rows)
    b, length = batch.segment_ids.shape
    cu = batch.cu_seqlens()
    assert isinstance(cu, np.ndarray) and cu.dtype == np.int32 and cu.ndim == 1
    assert cu[0] == 0 and cu[-1] == b * length
    assert (np.diff(cu) >= 0).all()
    lengths = _runs_reference(batch.segment_ids)
    assert cu.size == len(lengths) + 1
    np.testing.assert_array_equal(cu, np.concatenate([[0], np.cumsum(lengths)]))
    # Each image is exactly one segment, each row's padding tail one more (when there is one).
    images = sum(len(k) for k in batch.keys)
    tails = int((batch.segment_ids[:, -1] == 0).sum())
    assert cu.size - 1 == images + tails
    ms = batch.max_seqlen
    assert type(ms) is int and ms == max(lengths)
    padded = batch.cu_seqlens_fixed()
    s = batch.max_images
    assert padded.dtype == np.int32 and padded.shape == (b * (s + 1) + 1,)
    np.testing.assert_array_equal(padded[: cu.size], cu)
    assert (padded[cu.size :] == b * length).all()


def test_cu_seqlens_fixed_keeps_one_shape_across_batches():
    """Source: static shapes for compiled steps (common practice); two different batches of the
    same [B, L, S] get cu_seqlens_fixed() of the same length."""
    a = pack(_patchsets([5, 5, 5, 5]), 32, 2, max_images_per_row=4)
    b = pack(_patchsets([30, 2]), 32, 2, max_images_per_row=4)
    assert a.cu_seqlens().size != b.cu_seqlens().size
    assert a.cu_seqlens_fixed().shape == b.cu_seqlens_fixed().shape == (2 * 5 + 1,)


@pytest.mark.parametrize("case", sorted(CASES))
def test_varlen_slices_give_per_image_attention(case):
    """Source: how variable-length kernels use cu_seqlens (attention within each [cu[i], cu[i+1])
    slice of the flattened tokens), emulated with torch scaled_dot_product_attention."""
    sizes, seq_len, rows = CASES[case]
    sets = _patchsets(sizes, seed=9)
    batch = pack(sets, seq_len, rows)
    w = _projections(seed=3)
    flat = torch.from_numpy(batch.patches.reshape(-1, D))
    flat_seg = batch.segment_ids.reshape(-1)
    flat_keys = {}
    for (r, sid), key in _by_key(batch).items():
        flat_keys[r * seq_len + int(np.flatnonzero(batch.segment_ids[r] == sid)[0])] = key
    cu = batch.cu_seqlens().tolist()
    found = 0
    for start, end in zip(cu, cu[1:]):
        if flat_seg[start] == 0:
            assert (flat_seg[start:end] == 0).all()
            continue
        ps = next(s for s in sets if s.key == flat_keys[start])
        assert end - start == ps.num_tokens
        qi, ki, vi = _qkv(flat[start:end][None], w)
        got = F.scaled_dot_product_attention(qi, ki, vi)
        qa, ka, va = _qkv(torch.from_numpy(ps.patches)[None], w)
        torch.testing.assert_close(got, F.scaled_dot_product_attention(qa, ka, va), rtol=0, atol=1e-6)
        found += 1
    assert found == len(sets)
