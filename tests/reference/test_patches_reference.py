"""Patches checked against outside references.

- Patch layout: einops (a general-purpose tensor-rearrangement library) `rearrange` with the
  pattern '(h p1) (w p2) c -> (h w) (p1 p2 c)' is the reference for raster-order patches
  flattened as (patch_row, patch_col, channel).
- Pixels: Pillow's own `Image.resize` and PNG/JPEG decoders are the reference for what a resized
  image looks like; patchloom must add nothing of its own when reduced decode is off.
- Normalisation: (x / 255 - mean) / std per channel is common practice for float model inputs,
  with mean (0.485, 0.456, 0.406) and std (0.229, 0.224, 0.225) the usual ImageNet values (from
  memory).
"""

from __future__ import annotations

import io
import tarfile

import numpy as np
import pytest
from einops import rearrange
from PIL import Image

from patchloom import Pipeline, Recipe, image_to_patches, patchify, unpatchify
from patchloom.image.sizing import plan_size


def einops_patchify(img: np.ndarray, p: int) -> np.ndarray:
    """Reference patchify (einops)."""
    return rearrange(img, "(h p1) (w p2) c -> (h w) (p1 p2 c)", p1=p, p2=p)


def raster_coords(gh: int, gw: int) -> np.ndarray:
    """(row, col) of every cell in raster order, by plain loops."""
    return np.array([(r, c) for r in range(gh) for c in range(gw)], dtype=np.int32).reshape(-1, 2)


SHAPES = [  # (grid_h, grid_w, patch, channels)
    (1, 1, 1, 1),
    (1, 1, 16, 3),
    (2, 3, 4, 3),
    (3, 2, 4, 3),
    (7, 5, 14, 3),
    (14, 14, 16, 3),
    (1, 9, 8, 4),
    (5, 1, 2, 1),
]


@pytest.mark.parametrize(("gh", "gw", "p", "c"), SHAPES)
@pytest.mark.parametrize("dtype", [np.uint8, np.float32])
def test_patchify_equals_einops(gh, gw, p, c, dtype):
    """Source: einops rearrange (general-purpose reference library)."""
    rng = np.random.default_rng(gh * 1000 + gw * 100 + p * 10 + c)
    img = (rng.integers(0, 256, (gh * p, gw * p, c))).astype(dtype)
    got = patchify(img, p)
    want = einops_patchify(img, p)
    assert got.shape == (gh * gw, p * p * c) == want.shape
    assert got.dtype == img.dtype
    np.testing.assert_array_equal(got, want)


def test_patchify_first_patch_by_hand():
    """Source: the documented (patch_row, patch_col, channel) order, spelled out element by element."""
    img = np.arange(4 * 6 * 3, dtype=np.int32).reshape(4, 6, 3)
    got = patchify(img, 2)  # grid 2 x 3
    want0 = [img[0, 0, 0], img[0, 0, 1], img[0, 0, 2], img[0, 1, 0], img[0, 1, 1], img[0, 1, 2],
             img[1, 0, 0], img[1, 0, 1], img[1, 0, 2], img[1, 1, 0], img[1, 1, 1], img[1, 1, 2]]
    assert got[0].tolist() == want0
    assert got[1].tolist()[:3] == img[0, 2].tolist()  # next patch along the row starts at x=2
    assert got[3].tolist()[:3] == img[2, 0].tolist()  # second grid row starts at y=2


@pytest.mark.parametrize(("gh", "gw", "p", "c"), SHAPES)
def test_unpatchify_inverts_einops_layout(gh, gw, p, c):
    """Source: einops rearrange (inverse pattern) as the reference inverse."""
    rng = np.random.default_rng(7 + gh + gw)
    img = rng.integers(0, 256, (gh * p, gw * p, c)).astype(np.uint8)
    patches = einops_patchify(img, p)
    back = unpatchify(patches, raster_coords(gh, gw), (gh, gw), p, channels=c)
    np.testing.assert_array_equal(back, img)
    ref_back = rearrange(patches, "(h w) (p1 p2 c) -> (h p1) (w p2) c", h=gh, w=gw, p1=p, p2=p)
    np.testing.assert_array_equal(back, ref_back)


def test_unpatchify_follows_coords_and_fills_gaps():
    """Source: einops layout; shuffled and dropped tokens go back to their own cells."""
    gh, gw, p, c = 4, 5, 3, 3
    rng = np.random.default_rng(0)
    img = rng.integers(1, 256, (gh * p, gw * p, c)).astype(np.uint8)
    patches = einops_patchify(img, p)
    coords = raster_coords(gh, gw)
    order = rng.permutation(gh * gw)[:13]  # shuffle and drop 7 tokens
    back = unpatchify(patches[order], coords[order], (gh, gw), p, channels=c, fill=0)
    kept = np.zeros((gh, gw), bool)
    kept[coords[order, 0], coords[order, 1]] = True
    cell = np.repeat(np.repeat(kept, p, axis=0), p, axis=1)
    np.testing.assert_array_equal(back[cell], img[cell])
    assert (back[~cell] == 0).all()


# ----------------------------------------------------------------------------- image_to_patches


def _photo_like(h: int, w: int, seed: int) -> np.ndarray:
    """Noise over a smooth gradient, so every resampling filter sees both detail and structure."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:h, 0:w]
    base = np.stack([x * 255 / max(w - 1, 1), y * 255 / max(h - 1, 1), (x + y) * 127 / max(h + w - 2, 1)], -1)
    return np.clip(base + rng.normal(0, 25, (h, w, 3)), 0, 255).astype(np.uint8)


def _png(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, "PNG")
    return buf.getvalue()


def _jpeg(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, "JPEG", quality=90)
    return buf.getvalue()


PIL_FILTERS = {  # Pillow's own constants, named here independently of patchloom's table
    "nearest": Image.Resampling.NEAREST,
    "bilinear": Image.Resampling.BILINEAR,
    "bicubic": Image.Resampling.BICUBIC,
    "lanczos": Image.Resampling.LANCZOS,
}


@pytest.mark.parametrize("resample", sorted(PIL_FILTERS))
@pytest.mark.parametrize(("h", "w", "budget"), [(300, 451, 256), (40, 90, 64), (224, 224, 196)])
def test_image_to_patches_png_equals_pillow_resize_then_einops(resample, h, w, budget):
    """Source: Pillow PNG decode + Image.resize, then einops patchify (reference libraries)."""
    p = 16
    recipe = Recipe.from_dict({
        "decode": {"reduced_jpeg": False},
        "sizing": {"patch_size": p, "max_tokens": budget, "resample": resample},
    })
    data = _png(_photo_like(h, w, seed=h + w))
    ps = image_to_patches(Image.open(io.BytesIO(data)), recipe, key="k")
    plan = plan_size(h, w, recipe.sizing)
    ref_img = Image.open(io.BytesIO(data)).convert("RGB").resize(
        (plan.grid_w * p, plan.grid_h * p), PIL_FILTERS[resample]
    )
    want = einops_patchify(np.asarray(ref_img), p)
    assert ps.grid == (plan.grid_h, plan.grid_w)
    assert ps.patches.dtype == np.uint8
    np.testing.assert_array_equal(ps.patches, want)
    np.testing.assert_array_equal(ps.coords, raster_coords(plan.grid_h, plan.grid_w))


def test_pipeline_without_reduced_decode_equals_pillow_full_decode(tmp_path):
    """Source: Pillow full decode (PNG and JPEG) + Image.resize + einops, through a real shard."""
    p = 16
    recipe = Recipe.from_dict({
        "source": {"shuffle_shards": False},
        "decode": {"reduced_jpeg": False},
        "sizing": {"patch_size": p, "max_tokens": 64, "resample": "bicubic"},
        "packing": {"seq_len": 64, "rows": 1, "lookahead": 1, "max_images_per_row": 1},
    })
    members = {
        "a.png": _png(_photo_like(600, 800, 1)),
        "b.jpg": _jpeg(_photo_like(1200, 900, 2)),  # big enough for a 1/8 draft if one were taken
    }
    shard = tmp_path / "s-000.tar"
    with tarfile.open(shard, "w") as tar:
        for name, data in members.items():
            info = tarfile.TarInfo(name)
            info.size = len(data)
            tar.addfile(info, io.BytesIO(data))
    batches = list(Pipeline(recipe, shards=str(shard)))
    assert [k for b in batches for k in b.keys[0]] == ["a", "b"]
    for batch, data in zip(batches, members.values()):
        ref = Image.open(io.BytesIO(data))
        ref.load()
        ref = ref.convert("RGB")
        plan = plan_size(ref.height, ref.width, recipe.sizing)
        want = einops_patchify(np.asarray(ref.resize((plan.grid_w * p, plan.grid_h * p), Image.Resampling.BICUBIC)), p)
        n = plan.grid_h * plan.grid_w
        assert (batch.segment_ids[0, :n] == 1).all() and (batch.segment_ids[0, n:] == 0).all()
        np.testing.assert_array_equal(batch.patches[0, :n], want)


def test_float_output_is_common_practice_normalisation():
    """Source: (x/255 - mean)/std per channel, common practice; ImageNet mean/std from memory."""
    mean, std = (0.485, 0.456, 0.406), (0.229, 0.224, 0.225)
    recipe = Recipe.from_dict({
        "sizing": {"patch_size": 8, "max_tokens": 16},
        "output": {"dtype": "float32", "mean": list(mean), "std": list(std)},
    })
    arr = _photo_like(32, 32, 3)  # 4 x 4 patches of 8: no resize
    ps = image_to_patches(arr, recipe)
    assert ps.patches.dtype == np.float32
    want = (arr.astype(np.float64) / 255.0 - np.array(mean)) / np.array(std)
    np.testing.assert_allclose(ps.patches, einops_patchify(want, 8), rtol=0, atol=1e-5)
