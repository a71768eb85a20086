"""Token-drop statistics checked against outside references.

- Per-image Beta rates: 2,000 per-image draws (each image with its own generator from the
  project's seeding rule) pass a one-sample Kolmogorov-Smirnov test against Beta(a, b) at
  alpha = 0.01, using scipy.stats (general-purpose reference library: `scipy.stats.kstest`
  with the `beta` distribution). The same test rejects a nearby wrong (a, b), which shows it
  has the power to notice a wrong draw.
- Random mode: a uniform random subset of k of n tokens drops each token with probability k/n,
  so over M images each token place is dropped Binomial(M, k/n) times (scipy.stats.binom).
  Every place, and the pooled fraction over all tokens, must lie within 4 standard deviations.
- Block mode: blockwise masking as described by Bao et al. 2021 (BEiT), with the setting given
  there for a 224x224 image at patch 16: a 14x14 grid, 75 masked patches, blocks of at least
  16 patches with aspect in [0.3, 1/0.3]. The mean realised masked share over many images must
  be within one mean block area (over the grid) of the target, on that grid and others.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from patchloom.image.dropping import decide_drop, drop_block
from patchloom.recipe.schema import DropConfig
from patchloom.seeding import sample_rng

IMAGES = 2_000
ALPHA = 0.01


def beta_rates(a: float, b: float, *, seed: int = 0, images: int = IMAGES) -> np.ndarray:
    """The rate each image's DropDecision carries, images drawn as the pipeline would seed them."""
    cfg = DropConfig(mode="random", beta=(a, b))
    return np.array([
        decide_drop(cfg, (14, 14), None, sample_rng(seed, 0, f"img-{i:05d}", "drop")).rate
        for i in range(images)
    ])


@pytest.mark.parametrize("a, b", [(2.0, 5.0), (0.5, 0.5)])
def test_beta_rates_pass_kolmogorov_smirnov(a, b) -> None:
    rates = beta_rates(a, b)
    result = stats.kstest(rates, stats.beta(a, b).cdf)
    assert result.pvalue > ALPHA, (a, b, result)


@pytest.mark.parametrize("drawn, tested", [((2.0, 5.0), (2.5, 5.0)), ((0.5, 0.5), (0.7, 0.7))])
def test_kolmogorov_smirnov_rejects_a_wrong_beta(drawn, tested) -> None:
    rates = beta_rates(*drawn)
    result = stats.kstest(rates, stats.beta(*tested).cdf)
    assert result.pvalue < ALPHA, (drawn, tested, result)


@pytest.mark.parametrize("grid, rate", [((14, 14), 0.3), ((7, 40), 0.75), ((3, 3), 0.5)])
def test_random_mode_drop_frequency_is_binomial(grid, rate) -> None:
    n = grid[0] * grid[1]
    cfg = DropConfig(mode="random", rate=rate, min_keep=0)
    dropped = np.zeros(n, dtype=np.int64)
    for i in range(IMAGES):
        dropped += ~decide_drop(cfg, grid, None, sample_rng(1, 0, f"img-{i:05d}", "drop")).keep
    k = int(np.floor(rate * n + 0.5))
    p = k / n
    per_place = stats.binom(IMAGES, p)
    lo, hi = per_place.mean() - 4 * per_place.std(), per_place.mean() + 4 * per_place.std()
    assert dropped.min() >= lo and dropped.max() <= hi, (dropped.min(), dropped.max(), lo, hi)
    pooled = stats.binom(IMAGES * n, p)  # all tokens of all images together
    assert abs(dropped.sum() - pooled.mean()) <= 4 * pooled.std(), dropped.sum()
    assert abs(p - rate) <= 0.5 / n + 1e-12  # the count is the rate rounded to whole tokens

@pytest.mark.parametrize("grid, target", [((14, 14), 75), ((14, 14), 98), ((7, 40), 120), ((32, 32), 400)])
def test_block_mode_mean_share_is_within_one_block_of_the_target(grid, target) -> None:
    n = grid[0] * grid[1]
    rate = target / n
    shares, areas = [], []
    for i in range(500):
        keep, rects = drop_block(grid, rate, sample_rng(2, 0, f"img-{i:05d}", "drop"), min_area=16,
                                 aspect=(0.3, 1 / 0.3))
        shares.append(1 - keep.mean())
        areas.extend(h * w for *_, h, w in rects)
    mean_block = float(np.mean(areas))
    assert abs(np.mean(shares) - rate) <= mean_block / n, (np.mean(shares), rate, mean_block)
    # and each image lands within one block of its target (the module's stated bound)
    assert max(abs(s - rate) for s in shares) < max(areas) / n
