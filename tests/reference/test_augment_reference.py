"""Augmentation checked against outside references.

- Flips: numpy's `np.fliplr` / `np.flipud` define a horizontal / vertical mirror of an [H, W, C]
  array. Cutting a mirrored image into patches equals cutting first, then reversing the order of
  the grid's columns (rows) and mirroring each patch's pixel columns (rows): a geometric identity,
  common practice when reasoning about flips of patch sequences.
- Photometric transforms (albumentations' ColorJitter, RandomBrightnessContrast) change pixel
  values only, never the image size, so the patch grid and its (row, col) coordinates are
  unchanged (albumentations documents them as pixel-level, image-only transforms).
"""

from __future__ import annotations

import numpy as np
import pytest

from patchloom.image.augment import Augmenter
from patchloom.image.patches import grid_coords, patchify

CASES = [(1, 1, 4), (2, 3, 4), (3, 5, 2), (4, 4, 8)]  # (grid_h, grid_w, patch)


@pytest.fixture(scope="module")
def flips() -> dict[str, Augmenter]:
    return {name: Augmenter([{"name": name, "p": 1.0}]) for name in ("HorizontalFlip", "VerticalFlip")}


def _image(gh: int, gw: int, p: int) -> np.ndarray:
    return np.random.default_rng(gh * 100 + gw * 10 + p).integers(0, 256, (gh * p, gw * p, 3), dtype=np.uint8)


@pytest.mark.parametrize(("gh", "gw", "p"), CASES)
def test_horizontal_flip_reverses_grid_columns_and_patch_columns(flips, gh, gw, p):
    """Source: np.fliplr, and the flip/patchify identity (common practice)."""
    img = _image(gh, gw, p)
    flipped = flips["HorizontalFlip"].after_resize(img, 0)
    np.testing.assert_array_equal(flipped, np.fliplr(img))
    want = patchify(img, p).reshape(gh, gw, p, p, 3)[:, ::-1, :, ::-1, :].reshape(gh * gw, -1)
    np.testing.assert_array_equal(patchify(flipped, p), want)
    np.testing.assert_array_equal(grid_coords(flipped.shape[0] // p, flipped.shape[1] // p), grid_coords(gh, gw))


@pytest.mark.parametrize(("gh", "gw", "p"), CASES)
def test_vertical_flip_reverses_grid_rows_and_patch_rows(flips, gh, gw, p):
    """Source: np.flipud, and the flip/patchify identity (common practice)."""
    img = _image(gh, gw, p)
    flipped = flips["VerticalFlip"].after_resize(img, 0)
    np.testing.assert_array_equal(flipped, np.flipud(img))
    want = patchify(img, p).reshape(gh, gw, p, p, 3)[::-1, :, ::-1, :, :].reshape(gh * gw, -1)
    np.testing.assert_array_equal(patchify(flipped, p), want)


@pytest.mark.parametrize("spec", [
    {"name": "ColorJitter", "p": 1.0, "brightness": 0.4, "contrast": 0.4, "saturation": 0.4, "hue": 0.1},
    {"name": "RandomBrightnessContrast", "p": 1.0, "brightness_limit": 0.3, "contrast_limit": 0.3},
])
def test_photometric_ops_keep_size_and_coords(spec):
    """Source: albumentations' pixel-level transforms change values, never geometry."""
    aug = Augmenter([spec])
    assert aug.describe() == {"before": [], "after": [spec["name"]]}
    gh, gw, p = 3, 5, 8
    img = _image(gh, gw, p)
    changed = False
    for seed in range(4):
        out = aug.after_resize(img, seed)
        assert out.shape == img.shape and out.dtype == np.uint8
        changed |= not np.array_equal(out, img)
        patches = patchify(out, p)
        assert patches.shape == (gh * gw, p * p * 3)
        np.testing.assert_array_equal(grid_coords(out.shape[0] // p, out.shape[1] // p), grid_coords(gh, gw))
    assert changed
