"""Merge-ready grids checked against an independent computation.

- Patch merging (common practice in vision encoders that shorten the token sequence after the
  encoder, e.g. 2x2 merging): each 2x2 block of neighbouring patch tokens becomes one token, here
  by averaging. With sizing.grid_multiple 2 and output.token_order windows, a model does that with
  one reshape: tokens [N, D] -> [N / 4, 4, D] -> mean over axis 1. The reference is the same
  average computed with numpy straight from the resized image's pixels: cut it into 2p x 2p
  blocks, average the four p x p patches of each block, flatten as (row, col, channel), blocks in
  raster order.
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from patchloom import Recipe
from patchloom.image.chain import from_pixels


def reference_merge(resized: np.ndarray, p: int, m: int) -> np.ndarray:
    """[n_windows, p*p*C]: mean of the m x m patches of each (m*p) x (m*p) block of the image, by numpy alone."""
    h, w, c = resized.shape
    blocks = resized.astype(np.float64).reshape(h // (m * p), m, p, w // (m * p), m, p, c)
    mean = blocks.mean(axis=(1, 4))  # [bh, p, bw, p, c]: the m x m patches of a block averaged
    return mean.transpose(0, 2, 1, 3, 4).reshape(-1, p * p * c)


@pytest.mark.parametrize(("h", "w", "p", "budget"), [(96, 160, 8, 64), (211, 97, 4, 300), (50, 50, 5, 36)])
def test_merge2_by_reshape_in_window_order_equals_the_numpy_block_average(h, w, p, budget):
    rng = np.random.default_rng(h + w)
    image = Image.fromarray(rng.integers(0, 256, (h, w, 3), dtype=np.uint8))
    m = 2
    recipe = Recipe.from_dict({"sizing": {"patch_size": p, "max_tokens": budget, "grid_multiple": m},
                               "output": {"token_order": "windows"}})
    trace: dict = {}
    ps = from_pixels(image, recipe, seed=0, epoch=0, key="ref", label=None, meta={}, trace=trace)
    resized = np.asarray(trace["resized"])
    gh, gw = ps.grid
    assert resized.shape == (gh * p, gw * p, 3) and gh % m == 0 and gw % m == 0
    merged = ps.patches.astype(np.float64).reshape(-1, m * m, ps.patches.shape[1]).mean(axis=1)
    np.testing.assert_allclose(merged, reference_merge(resized, p, m), rtol=0, atol=1e-9)
    # the same reshape on raster order would mix rows: it must not match (the check can fail)
    raster = Recipe.from_dict({"sizing": {"patch_size": p, "max_tokens": budget, "grid_multiple": m}})
    plain = from_pixels(image, raster, seed=0, epoch=0, key="ref", label=None, meta={})
    wrong = plain.patches.astype(np.float64).reshape(-1, m * m, plain.patches.shape[1]).mean(axis=1)
    assert not np.allclose(wrong, reference_merge(resized, p, m))
