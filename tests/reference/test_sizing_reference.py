"""Sizing checked against outside references.

- Resampling: Pillow's own `Image.resize` (the imaging library patchloom resizes with) is the
  reference for each named filter; with a full decode and no crop, resize_to_plan must give the
  very same bytes.
- Token counts of the classic vision-transformer input sizes at patch 16: 224x224 -> 14x14 = 196
  tokens and 384x384 -> 24x24 = 576 tokens (common practice); a 16x16 RGB patch flattens to
  768 values (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from patchloom import Recipe, image_to_patches
from patchloom.image.sizing import plan_size, resize_to_plan

# Pillow's constants, looked up by Pillow's own names (independent of patchloom's table).
FILTERS = {
    "nearest": Image.Resampling.NEAREST,
    "box": Image.Resampling.BOX,
    "bilinear": Image.Resampling.BILINEAR,
    "hamming": Image.Resampling.HAMMING,
    "bicubic": Image.Resampling.BICUBIC,
    "lanczos": Image.Resampling.LANCZOS,
}


def _sizing(**kw):
    return Recipe.from_dict({"sizing": kw, "packing": {"seq_len": max(1024, kw.get("max_tokens", 256))}}).sizing


def _noise(h: int, w: int, seed: int) -> Image.Image:
    rng = np.random.default_rng(seed)
    return Image.fromarray(rng.integers(0, 256, (h, w, 3), dtype=np.uint8))


@pytest.mark.parametrize("name", sorted(FILTERS))
@pytest.mark.parametrize(
    ("h", "w", "p", "budget"),
    [
        (480, 640, 16, 256),  # downscale
        (37, 53, 16, 256),  # upscale
        (1000, 90, 8, 200),  # tall: down in one axis, up in the other
        (224, 224, 16, 196),  # already the plan size
    ],
)
def test_resize_to_plan_is_pillow_resize(name, h, w, p, budget):
    """Source: Pillow Image.resize with the same filter, byte for byte."""
    img = _noise(h, w, seed=h * w)
    plan = plan_size(h, w, _sizing(mode="budget", patch_size=p, max_tokens=budget, resample=name))
    got = resize_to_plan(img, plan, resample=name)
    want = img.resize((plan.grid_w * p, plan.grid_h * p), FILTERS[name])
    assert got.size == want.size
    assert got.mode == "RGB"
    assert got.tobytes() == want.tobytes()


@pytest.mark.parametrize("name", sorted(FILTERS))
def test_image_to_patches_uses_the_recipe_filter(name):
    """Source: Pillow Image.resize; the recipe's `resample` picks the filter for image_to_patches."""
    h, w, p = 120, 200, 8
    img = _noise(h, w, seed=5)
    recipe = Recipe.from_dict({"decode": {"reduced_jpeg": False},
                               "sizing": {"patch_size": p, "max_tokens": 150, "resample": name}})
    plan = plan_size(h, w, recipe.sizing)
    ref = np.asarray(img.resize((plan.grid_w * p, plan.grid_h * p), FILTERS[name]))
    ps = image_to_patches(img, recipe)
    gh, gw = ps.grid
    back = ps.patches.reshape(gh, gw, p, p, 3).transpose(0, 2, 1, 3, 4).reshape(gh * p, gw * p, 3)
    np.testing.assert_array_equal(back, ref)


def test_filters_differ_from_each_other():
    """Sanity for the tests above: on a downscale of noise every pair of Pillow filters gives
    different bytes, so a wrong filter table could not pass by accident. (On an upscale nearest
    and box coincide, which is why the byte-for-byte test includes downscales.)"""
    img = _noise(37, 53, seed=1)
    outs = {n: img.resize((40, 30), f).tobytes() for n, f in FILTERS.items()}
    assert len(set(outs.values())) == len(FILTERS)


@pytest.mark.parametrize("mode", ["budget", "native", "fixed"])
def test_classic_224_at_patch_16_is_196_tokens(mode):
    """Source: common practice (224x224 input, 16x16 patches -> a 14x14 grid of 196 tokens)."""
    recipe = Recipe.from_dict({"sizing": {"mode": mode, "patch_size": 16, "max_tokens": 196}})
    plan = plan_size(224, 224, recipe.sizing)
    assert (plan.grid_h, plan.grid_w) == (14, 14)
    assert plan.tokens == 196
    ps = image_to_patches(np.zeros((224, 224, 3), np.uint8), recipe)
    assert ps.patches.shape == (196, 768)  # 16*16*3 = 768 values a token (common practice)
    assert ps.grid == (14, 14)


def test_classic_224_native_with_room_to_spare():
    """Source: common practice; native mode does not grow 224x224 past 14x14 with a bigger budget."""
    plan = plan_size(224, 224, _sizing(mode="native", patch_size=16, max_tokens=1024))
    assert (plan.grid_h, plan.grid_w) == (14, 14)


@pytest.mark.parametrize("mode", ["budget", "native", "fixed"])
def test_classic_384_at_patch_16_is_576_tokens(mode):
    """Source: common practice (384x384 input, 16x16 patches -> a 24x24 grid of 576 tokens)."""
    recipe = Recipe.from_dict({"sizing": {"mode": mode, "patch_size": 16, "max_tokens": 576}})
    plan = plan_size(384, 384, recipe.sizing)
    assert (plan.grid_h, plan.grid_w) == (24, 24)
    assert plan.tokens == 576
    assert (plan.height, plan.width) == (384, 384)
