"""Token-drop statistics checked against outside references.

- Per-image Beta rates: 2,000 per-image draws (each image with its own generator from the
  project's seeding rule) pass a one-sample Kolmogorov-Smirnov test against Beta(a, b) at
  alpha = 0.01, using scipy.stats (general-purpose reference library: `scipy.stats.kstest`
  with the `beta` distribution). The same test rejects a nearby wrong (a, b), which shows it
  has the power to notice a wrong draw.
- Random mode: a uniform random subset of k of n tokens drops each token with probability k/n,
  so over M images each token place is dropped Binomial(M, k/n) times (scipy.stats.binom).
  Every place, and the pooled fraction over all tokens, must lie within 4 standard deviations.
- Block mode: blockwise masking as described by Bao et al. 2021 (BEiT, Algorithm 1), with the
  setting given there for a 224x224 image at patch 16: a 14x14 grid, 75 masked patches, blocks of
  at least 16 patches with aspect in [0.3, 1/0.3]; and other grids. The reference is the procedure
  drop_block's docstring states (BEiT's loop plus the project's overshoot, stopping and anchoring
  rules), simulated here plainly, one draw at a time, with its own generator. The realised count
  per image must follow the same distribution: the mean difference within 4 standard errors of the
  two samples (a two-sample z bound), and the share of images reaching the target within 4 binomial
  standard errors. Each image's overshoot is checked exactly: under half its last block.
"""

from __future__ import annotations

import math

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


#: The stopping and anchoring counts drop_block documents (BLOCK_MAX_FAILS, BLOCK_ANCHOR_AFTER), written
#: out here so that the reference does not follow a change to the module: a deliberate change must
#: change them here too.
MAX_FAILS, ANCHOR_AFTER = 32, 8


def documented_block_process(grid: tuple[int, int], rate: float, rng: np.random.Generator, *, min_area: int = 16,
                             aspect: tuple[float, float] = (0.3, 1 / 0.3), max_fails: int = MAX_FAILS,
                             skip_any_overshoot: bool = False) -> int:
    """Tokens dropped by the procedure drop_block's docstring states, one plain draw at a time:
    area s ~ U[min_area, min(remaining, largest)], log-aspect uniform within `aspect` narrowed to
    where an area-s block rounds to fit, h = round(sqrt(s r)), w = round(sqrt(s / r)), a uniform
    position (after ANCHOR_AFTER rejections in a row: a uniform position covering a random
    kept token); a block is skipped when it adds nothing or its new tokens are >= 2 x the tokens
    missing; stop at the target or after `max_fails` rejections in a row. skip_any_overshoot: BEiT's
    own rule instead (skip a block that would pass the target), to show the test can tell them apart."""
    gh, gw = grid
    n = gh * gw
    target = math.floor(rate * n + 0.5)
    lo, hi = aspect
    largest = max((h * w for h in range(1, gh + 1) for w in range(1, gw + 1) if lo <= h / w <= hi), default=0)
    if target == 0 or largest == 0:
        return 0
    a_min = min(min_area, largest)
    keep = np.ones((gh, gw), bool)
    dropped = fails = 0
    while dropped < target and fails < max_fails:
        fails += 1
        missing = target - dropped
        s = rng.uniform(a_min, max(a_min, min(missing, largest)))
        r_lo = max(math.log(lo), math.log(s) - 2 * math.log(gw + 0.5))  # w = round(sqrt(s / r)) <= gw
        r_hi = min(math.log(hi), 2 * math.log(gh + 0.5) - math.log(s))  # h = round(sqrt(s * r)) <= gh
        if r_lo > r_hi:
            continue
        r = math.exp(rng.uniform(r_lo, r_hi))
        h, w = math.floor(math.sqrt(s * r) + 0.5), math.floor(math.sqrt(s / r) + 0.5)
        if not (1 <= h <= gh and 1 <= w <= gw and h * w >= a_min and lo <= h / w <= hi):
            continue
        if fails <= ANCHOR_AFTER:
            top, left = int(rng.integers(0, gh - h + 1)), int(rng.integers(0, gw - w + 1))
        else:
            rows, cols = np.nonzero(keep)
            k = int(rng.integers(0, rows.size))
            top = int(rng.integers(max(0, rows[k] - h + 1), min(rows[k], gh - h) + 1))
            left = int(rng.integers(max(0, cols[k] - w + 1), min(cols[k], gw - w) + 1))
        new = int(keep[top:top + h, left:left + w].sum())
        if new == 0 or new >= (missing + 1 if skip_any_overshoot else 2 * missing):
            continue
        keep[top:top + h, left:left + w] = False
        dropped += new
        fails = 0
    return dropped


BLOCK_CASES = [((14, 14), 75), ((14, 14), 98), ((7, 40), 120), ((32, 32), 400)]
BLOCK_IMAGES = 2_000


def _module_counts(grid, target) -> tuple[np.ndarray, list[int]]:
    """Dropped tokens per image from drop_block, and each image's overshoot bound (half its last block)."""
    n = grid[0] * grid[1]
    counts, halves = [], []
    for i in range(BLOCK_IMAGES):
        keep, rects = drop_block(grid, target / n, sample_rng(3, 0, f"img-{i:05d}", "drop"), min_area=16,
                                 aspect=(0.3, 1 / 0.3))
        counts.append(int(np.count_nonzero(~keep)))
        halves.append(rects[-1][2] * rects[-1][3] / 2 if rects else 0)
    return np.array(counts), halves


def _same_distribution(a: np.ndarray, b: np.ndarray, target: int) -> tuple[float, float]:
    """(z of the mean difference, z of the difference in the share reaching the target)."""
    se = math.sqrt(a.var(ddof=1) / a.size + b.var(ddof=1) / b.size)
    pa, pb = float(np.mean(a >= target)), float(np.mean(b >= target))
    p = (pa * a.size + pb * b.size) / (a.size + b.size)
    se_p = math.sqrt(p * (1 - p) * (1 / a.size + 1 / b.size))
    return (a.mean() - b.mean()) / se, (pa - pb) / se_p


@pytest.mark.parametrize("grid, target", BLOCK_CASES)
def test_block_mode_follows_the_documented_procedure(grid, target) -> None:
    counts, halves = _module_counts(grid, target)
    rng = np.random.default_rng([4, *grid, target])
    ref = np.array([documented_block_process(grid, target / (grid[0] * grid[1]), rng) for _ in range(BLOCK_IMAGES)])
    z_mean, z_reach = _same_distribution(counts, ref, target)
    assert abs(z_mean) <= 4 and abs(z_reach) <= 4, (counts.mean(), ref.mean(), z_mean, z_reach)
    # exact, per image: an overshoot is under half of the image's last block
    assert all(c - target < h for c, h in zip(counts, halves) if c > target)


@pytest.mark.parametrize("grid, target", BLOCK_CASES[:2])
def test_the_block_comparison_rejects_nearby_procedures(grid, target) -> None:
    """Power: BEiT's own overshoot rule, or giving up after 2 rejections instead of
    MAX_FAILS, moves the counts by a token or two, and the same bound notices."""
    counts, _ = _module_counts(grid, target)
    rate = target / (grid[0] * grid[1])
    for kw in ({"skip_any_overshoot": True}, {"max_fails": 2}):
        rng = np.random.default_rng([5, *grid, target])
        other = np.array([documented_block_process(grid, rate, rng, **kw) for _ in range(BLOCK_IMAGES)])
        z_mean, z_reach = _same_distribution(counts, other, target)
        assert max(abs(z_mean), abs(z_reach)) > 4, (kw, z_mean, z_reach)


@pytest.mark.parametrize("grid, target", [((14, 14), 75), ((7, 40), 120)])
def test_block_positions_are_symmetric(grid, target) -> None:
    """Every position is drawn uniformly (or uniformly among those covering a kept token), so the
    procedure is symmetric under flipping the grid: per image, the tokens dropped in the first row
    minus those in the last row have mean 0 (a one-sample z bound of 4 standard errors, from the
    sample's own spread), and likewise the first and last columns."""
    gh, gw = grid
    rows, cols = [], []
    for i in range(BLOCK_IMAGES):
        keep, _ = drop_block(grid, target / (gh * gw), sample_rng(6, 0, f"img-{i:05d}", "drop"), min_area=16)
        dropped = ~keep.reshape(gh, gw)
        rows.append(int(dropped[0].sum()) - int(dropped[-1].sum()))
        cols.append(int(dropped[:, 0].sum()) - int(dropped[:, -1].sum()))
    for diffs in (np.array(rows), np.array(cols)):
        z = diffs.mean() / (diffs.std(ddof=1) / math.sqrt(diffs.size))
        assert abs(z) <= 4, z
