from __future__ import annotations

import math

import numpy as np
import pytest

from patchloom import PatchSet, Recipe, RecipeError, pack
from patchloom.image.patches import grid_coords, patchify
from patchloom.image.patchops import apply_patch_ops, gaussian_noise, jitter, standardize
from patchloom.recipe.schema import CropConfig, PatchOp
from patchloom.image.sizing import draw_crop


def patches(n=64, d=48, seed=0):
    return np.random.default_rng(seed).integers(40, 200, size=(n, d)).astype(np.uint8)


def test_jitter_moves_each_patch_by_its_own_amount():
    x = np.full((200, 12), 128, np.float32)
    y = jitter(x, np.random.default_rng(0), brightness=0.2, contrast=0.0)
    shifts = y.mean(axis=1) - 128
    assert np.all(np.abs(shifts) <= 0.2 * 255 + 1e-3)
    assert shifts.std() > 20  # independent per patch, not one global shift
    assert np.allclose(y.std(axis=1), 0, atol=1e-3)  # a flat patch stays flat


def test_noise_has_the_asked_sigma():
    x = np.full((100, 300), 128, np.float32)
    y = gaussian_noise(x, np.random.default_rng(1), sigma=5.0)
    assert abs((y - x).std() - 5.0) < 0.1 and abs((y - x).mean()) < 0.1


def test_standardize_gives_zero_mean_unit_variance_per_patch():
    y = standardize(patches().astype(np.float32), eps=1e-6)
    np.testing.assert_allclose(y.mean(axis=1), 0, atol=1e-4)
    np.testing.assert_allclose(y.var(axis=1), 1, atol=1e-3)


def test_shuffle_moves_coords_with_patches():
    img = np.random.default_rng(2).integers(0, 256, size=(32, 48, 3), dtype=np.uint8)
    p = patchify(img, 8)
    coords = grid_coords(4, 6)
    x, (c,), _ = apply_patch_ops(p, [PatchOp(name="shuffle")], np.random.default_rng(3), extra=[coords])
    assert not np.array_equal(c, coords)
    for patch, (r, col) in zip(x.astype(np.uint8), c):
        np.testing.assert_array_equal(patch, img[r * 8:(r + 1) * 8, col * 8:(col + 1) * 8].reshape(-1))


def test_probability_zero_changes_nothing_and_same_seed_same_result():
    p = patches()
    x, _, std = apply_patch_ops(p, [PatchOp(name="noise", p=0.0)], np.random.default_rng(0))
    np.testing.assert_array_equal(x, p.astype(np.float32))
    assert not std
    ops = [PatchOp(name="jitter"), PatchOp(name="noise", sigma=3)]
    a, _, _ = apply_patch_ops(p, ops, np.random.default_rng(7))
    b, _, _ = apply_patch_ops(p, ops, np.random.default_rng(7))
    c, _, _ = apply_patch_ops(p, ops, np.random.default_rng(8))
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)


def test_recipe_rules_for_standardize():
    with pytest.raises(RecipeError, match="float32"):
        Recipe.from_dict({"patch_ops": [{"name": "standardize"}]})
    with pytest.raises(RecipeError, match="after jitter"):
        Recipe.from_dict({"patch_ops": [{"name": "standardize"}, {"name": "noise"}],
                          "output": {"dtype": "float32"}})
    Recipe.from_dict({"patch_ops": [{"name": "jitter"}, {"name": "standardize"}, {"name": "shuffle"}],
                      "output": {"dtype": "float32"}})
    with pytest.raises(RecipeError, match="patch_ops.0.name"):
        Recipe.from_dict({"patch_ops": [{"name": "blur"}]})


@pytest.mark.parametrize("hw", [(300, 400), (100, 900), (900, 120), (7, 5)])
def test_random_crop_keeps_area_share_and_relative_aspect(hw):
    h, w = hw
    cfg = CropConfig(mode="random", area=(0.3, 0.9), aspect_jitter=(0.8, 1.25))
    rng = np.random.default_rng(0)
    for _ in range(200):
        left, top, right, bottom = draw_crop(h, w, cfg, rng)
        assert 0 <= left < right <= w and 0 <= top < bottom <= h
        cw, ch = right - left, bottom - top
        if (cw, ch) == (w, h):
            continue  # the fallback after 10 failed draws keeps the whole image
        if min(cw, ch) >= 20:  # rounding dominates on tiny crops
            share = cw * ch / (w * h)
            assert 0.3 * 0.9 <= share <= 0.9 * 1.1
            rel = (cw / ch) / (w / h)
            assert 0.8 / 1.1 <= rel <= 1.25 * 1.1
    assert draw_crop(h, w, CropConfig(), rng) == (0, 0, w, h)


def test_crop_draws_vary_and_repeat_with_the_seed():
    cfg = CropConfig(mode="random")
    a = [draw_crop(480, 640, cfg, np.random.default_rng(s)) for s in range(20)]
    b = [draw_crop(480, 640, cfg, np.random.default_rng(s)) for s in range(20)]
    assert a == b and len(set(a)) > 15


def test_masked_flags_are_packed_with_their_tokens():
    sets = []
    for i, n in enumerate([3, 4]):
        m = np.zeros(n, bool)
        m[i] = True
        sets.append(PatchSet(np.zeros((n, 3), np.uint8), grid_coords(1, n), (1, n), f"k{i}", masked=m))
    b = pack(sets, seq_len=8)
    np.testing.assert_array_equal(b.masked, [[1, 0, 0, 0, 1, 0, 0, 0]])
    assert "masked" in b.to_arrays()
    plain = pack([PatchSet(np.zeros((2, 3), np.uint8), grid_coords(1, 2), (1, 2), "x")], seq_len=4)
    assert plain.masked is None and "masked" not in plain.to_arrays()
    assert math.isclose(b.padding_fraction, 1 / 8)


# --- the PATCH_OPS table ---------------------------------------------------------------------


def test_every_patch_op_in_the_table_is_reached_through_apply_patch_ops():
    from patchloom.image.patchops import PATCH_OPS

    p = patches()
    coords = grid_coords(8, 8)
    for name, run in PATCH_OPS.items():
        op = PatchOp(name=name)
        x, (c,), std = apply_patch_ops(p, [op], np.random.default_rng(4), extra=[coords])
        values, order = run(p.astype(np.float32), op, np.random.default_rng(4))
        np.testing.assert_array_equal(x, values)
        np.testing.assert_array_equal(c, coords if order is None else coords[order])
        assert not np.array_equal(x, p.astype(np.float32)), name  # every op changes something
        assert std == (name == "standardize")


def test_an_op_added_to_the_table_is_dispatched(monkeypatch):
    from patchloom.image.patchops import PATCH_OPS

    monkeypatch.setitem(PATCH_OPS, "invert", lambda x, op, rng: (255.0 - x, None))
    op = PatchOp(name="noise").model_copy(update={"name": "invert"})
    x, _, _ = apply_patch_ops(patches(), [op], np.random.default_rng(0))
    np.testing.assert_array_equal(x, 255.0 - patches().astype(np.float32))


def test_unknown_patch_op_names_the_recipe_key_and_after_standardize_only_reorders():
    bad = PatchOp(name="noise").model_copy(update={"name": "blur"})
    with pytest.raises(ValueError, match=r"unknown patch op 'blur'.*patch_ops\[\]\.name.*standardize, jitter"):
        apply_patch_ops(patches(), [bad], np.random.default_rng(0))
    apply_patch_ops(patches(), [PatchOp(name="standardize"), PatchOp(name="shuffle")], np.random.default_rng(0))
    with pytest.raises(ValueError, match="'jitter' after standardize"):
        apply_patch_ops(patches(), [PatchOp(name="standardize"), PatchOp(name="jitter")], np.random.default_rng(0))
