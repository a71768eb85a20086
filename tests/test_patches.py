"""patchloom.image.patches on its own: PatchSet's checks, patchify / unpatchify, grid coords, window
order and normalisation. Expected values come from plain loops over pixels, not from the module."""

from __future__ import annotations

import numpy as np
import pytest

from patchloom.image.patches import (
    PatchSet,
    grid_coords,
    normalize,
    patchify,
    slice_times,
    tubeletify,
    unpatchify,
    window_order,
)


def loop_patches(image: np.ndarray, p: int) -> np.ndarray:
    """[N, p*p*C] by explicit loops: patches in raster order, each in (row, col, channel) order."""
    h, w, c = image.shape
    out = []
    for r in range(h // p):
        for q in range(w // p):
            out.append([image[r * p + i, q * p + j, k] for i in range(p) for j in range(p) for k in range(c)])
    return np.array(out, dtype=image.dtype)


@pytest.mark.parametrize(("h", "w", "p", "c"), [(4, 6, 2, 3), (3, 3, 1, 3), (8, 4, 4, 1), (6, 6, 3, 2)])
def test_patchify_is_raster_order_and_row_col_channel_within_a_patch(h, w, p, c):
    image = np.arange(h * w * c, dtype=np.int64).reshape(h, w, c) % 251
    out = patchify(image.astype(np.uint8), p)
    assert out.shape == ((h // p) * (w // p), p * p * c) and out.dtype == np.uint8 and out.flags.c_contiguous
    np.testing.assert_array_equal(out, loop_patches(image.astype(np.uint8), p))


def test_patchify_refuses_sizes_that_are_not_whole_patches():
    with pytest.raises(ValueError, match="multiple of patch_size=4"):
        patchify(np.zeros((8, 6, 3), np.uint8), 4)
    with pytest.raises(ValueError, match="multiple of patch_size=4"):
        patchify(np.zeros((6, 8, 3), np.uint8), 4)
    with pytest.raises(ValueError, match=r"\[H, W, C\]"):
        patchify(np.zeros((8, 8), np.uint8), 4)
    assert patchify(np.zeros((4, 4, 3), np.uint8), 4).shape == (1, 48)  # exactly one patch is fine


def test_grid_coords_are_int32_raster_order():
    c = grid_coords(2, 3)
    assert c.dtype == np.int32 and c.shape == (6, 2)
    assert c.tolist() == [[r, q] for r in range(2) for q in range(3)]
    assert grid_coords(1, 1).tolist() == [[0, 0]]


def test_unpatchify_puts_patches_back_and_fills_missing_cells():
    rng = np.random.default_rng(0)
    image = rng.integers(0, 256, (6, 9, 3), dtype=np.uint8)
    patches, coords = patchify(image, 3), grid_coords(2, 3)
    np.testing.assert_array_equal(unpatchify(patches, coords, (2, 3), 3), image)
    keep = np.array([0, 2, 5])
    part = unpatchify(patches[keep], coords[keep], (2, 3), 3, fill=7)
    for i in range(6):
        r, q = divmod(i, 3)
        cell = part[r * 3:(r + 1) * 3, q * 3:(q + 1) * 3]
        expect = image[r * 3:(r + 1) * 3, q * 3:(q + 1) * 3] if i in keep else np.full((3, 3, 3), 7)
        np.testing.assert_array_equal(cell, expect)
    shuffled = np.array([4, 1, 3, 0, 5, 2])  # order does not matter: coords place each patch
    np.testing.assert_array_equal(unpatchify(patches[shuffled], coords[shuffled], (2, 3), 3), image)
    default = unpatchify(patches[keep], coords[keep], (2, 3), 3)  # missing cells are 0 unless told
    assert default.dtype == np.uint8 and (default[3:6, 0:3] == 0).all()


def test_window_order_groups_each_window_in_raster_order():
    order = window_order(4, 6, 2)
    assert order.dtype == np.int64  # as documented: int64 [gh*gw]
    expect = [r * 6 + q for wr in range(2) for wq in range(3) for r in (2 * wr, 2 * wr + 1) for q in (2 * wq, 2 * wq + 1)]
    assert order.tolist() == expect
    assert window_order(3, 3, 1).tolist() == list(range(9))
    with pytest.raises(ValueError, match="grid_multiple=2"):
        window_order(4, 5, 2)
    with pytest.raises(ValueError, match="grid_multiple=0"):
        window_order(4, 4, 0)


def test_patchset_checks_its_shapes():
    ps = PatchSet(np.zeros((3, 12), np.uint8), grid_coords(1, 3), (1, 3), "k")
    assert ps.num_tokens == len(ps) == 3 and isinstance(ps.num_tokens, int)
    with pytest.raises(ValueError, match="patches must be"):
        PatchSet(np.zeros((3, 12), np.uint8), grid_coords(1, 2), (1, 3), "k")
    with pytest.raises(ValueError, match="patches must be"):
        PatchSet(np.zeros(3, np.uint8), np.zeros((3, 2), np.int32), (1, 3), "k")
    with pytest.raises(ValueError, match="masked must be"):
        PatchSet(np.zeros((3, 12), np.uint8), grid_coords(1, 3), (1, 3), "k", masked=np.zeros(2, bool))
    assert PatchSet(np.zeros((0, 12), np.uint8), np.zeros((0, 2), np.int32), (1, 1), "k").num_tokens == 0


def test_normalize_uint8_is_a_no_op_or_a_round_and_clip():
    x = np.arange(24, dtype=np.uint8).reshape(2, 12)
    assert normalize(x, (0.5,) * 3, (0.2,) * 3, "uint8") is x
    f = np.array([[-3.0, 0.49, 0.5, 1.5, 254.5, 255.4, 300.0, 2.5, 3.5, 7.0, 8.0, 9.0]])
    out = normalize(f, (0.5,) * 3, (0.2,) * 3, "uint8")
    assert out.dtype == np.uint8
    assert out.tolist() == [[0, 0, 0, 2, 254, 255, 255, 2, 4, 7, 8, 9]]  # half to even, then clipped


@pytest.mark.parametrize("dtype", ["float32", "float16"])
def test_normalize_float_is_per_channel_with_channel_fastest(dtype):
    mean, std = (0.1, 0.5, 0.9), (0.2, 0.25, 0.5)
    x = np.arange(2 * 12, dtype=np.uint8).reshape(2, 12) * 10  # D = 2 x 2 pixels x 3 channels
    out = normalize(x, mean, std, dtype)
    assert out.dtype == np.dtype(dtype) and out.shape == x.shape
    expect = np.empty(x.shape)
    for i in range(2):
        for d in range(12):
            k = d % 3  # the channel of value d
            expect[i, d] = (x[i, d] / 255 - mean[k]) / std[k]
    np.testing.assert_allclose(out.astype(np.float64), expect, rtol=1e-3 if dtype == "float16" else 1e-6, atol=1e-3)


@pytest.mark.parametrize(("f", "h", "w", "t", "p"), [(4, 4, 6, 2, 2), (3, 2, 2, 1, 2), (6, 3, 3, 3, 3)])
def test_tubeletify_is_slice_major_raster_order_and_frame_row_col_channel_inside(f, h, w, t, p):
    """Token k of slice s covers frames s*t .. s*t+t-1 of one p x p patch, flattened (frame, row, col,
    channel); slices one after the other, raster order inside each (plain loops)."""
    frames = (np.arange(f * h * w * 3).reshape(f, h, w, 3) % 253).astype(np.uint8)
    out = tubeletify(frames, p, t)
    expect = []
    for s in range(f // t):
        for r in range(h // p):
            for q in range(w // p):
                expect.append([frames[s * t + a, r * p + i, q * p + j, k]
                               for a in range(t) for i in range(p) for j in range(p) for k in range(3)])
    assert out.shape == ((f // t) * (h // p) * (w // p), t * p * p * 3) and out.flags.c_contiguous
    np.testing.assert_array_equal(out, np.array(expect, np.uint8))
    if t == 1:  # one frame a tubelet: each slice is that frame's patchify
        np.testing.assert_array_equal(out[: (h // p) * (w // p)], patchify(frames[0], p))


def test_tubeletify_refuses_frames_that_do_not_split():
    for shape, t, p in (((3, 4, 4, 3), 2, 2), ((4, 5, 4, 3), 2, 2), ((4, 4, 5, 3), 2, 2)):
        with pytest.raises(ValueError, match="do not split into tubelets"):
            tubeletify(np.zeros(shape, np.uint8), p, t)
    with pytest.raises(ValueError, match=r"\[F, H, W, C\]"):
        tubeletify(np.zeros((4, 4, 3), np.uint8), 2, 2)


def test_slice_times_number_the_slices_token_by_token():
    times = slice_times(3, 2)
    assert times.dtype == np.int32 and times.tolist() == [0, 0, 1, 1, 2, 2]
    assert slice_times(1, 4).tolist() == [0, 0, 0, 0] and slice_times(2, 0).size == 0


def test_patchset_times_are_one_per_token():
    patches, coords = np.zeros((4, 12), np.uint8), grid_coords(2, 2)
    ps = PatchSet(patches, coords, (2, 2), "clip", times=slice_times(2, 2), frames=2)
    assert ps.frames == 2 and ps.times.tolist() == [0, 0, 1, 1]
    assert PatchSet(patches, coords, (2, 2), "img").times is None and PatchSet(patches, coords, (2, 2), "img").frames == 1
    with pytest.raises(ValueError, match="times must be int"):
        PatchSet(patches, coords, (2, 2), "clip", times=np.zeros(3, np.int32))
