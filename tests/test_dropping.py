"""Tests for patchloom.image.dropping: every mode on small, long and square grids, min_keep, the rate
settings, determinism, and applying a decision (drop and mask).

Expected values are worked out here independently of the module: target counts in exact
fractions, the grid stride by brute force over k, the largest allowed block by listing every
rectangle, lattices and stripes by their row/column structure.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from patchloom.image import dropping
from patchloom.image.dropping import (
    DropDecision,
    apply_drop,
    decide_drop,
    drop_block,
    drop_content,
    drop_grid,
    drop_random,
    drop_stripes,
    grid_stride,
    content_scores,
    target_rate,
)
from patchloom.image.patches import PatchSet, grid_coords, patchify
from patchloom.recipe.schema import DropConfig

GRIDS = [(1, 1), (1, 50), (3, 3), (14, 14), (7, 40)]
RATES = [0.0, 0.3, 0.75, 1.0]
MODES = ["random", "block", "grid", "stripes", "content", "tube"]
ASPECT = (0.3, 1 / 0.3)


def expected_drops(rate: float, n: int) -> int:
    """rate * n rounded half up, in exact decimal arithmetic."""
    return int(Fraction(str(rate)) * n + Fraction(1, 2))


def noise_patches(grid: tuple[int, int], seed: int = 0, d: int = 12) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 256, (grid[0] * grid[1], d), dtype=np.uint8)


def largest_allowed_block(grid: tuple[int, int], aspect: tuple[float, float]) -> int:
    lo, hi = aspect
    areas = [h * w for h in range(1, grid[0] + 1) for w in range(1, grid[1] + 1) if lo <= h / w <= hi]
    return max(areas, default=0)


def decide(mode: str, grid: tuple[int, int], seed: int = 0, **kw) -> DropDecision:
    cfg = DropConfig(mode=mode, **kw)
    return decide_drop(cfg, grid, noise_patches(grid), np.random.default_rng(seed))


# --- target_rate ----------------------------------------------------------------------------


def test_target_rate_fixed_rate_ignores_token_count() -> None:
    cfg = DropConfig(mode="random", rate=0.3)
    assert [target_rate(cfg, n, np.random.default_rng(0)) for n in (1, 196, 4096)] == [0.3, 0.3, 0.3]


def test_target_rate_max_keep() -> None:
    cfg = DropConfig(mode="random", max_keep=49)
    rng = np.random.default_rng(0)
    assert target_rate(cfg, 196, rng) == pytest.approx(0.75)
    assert target_rate(cfg, 98, rng) == pytest.approx(0.5)
    assert target_rate(cfg, 49, rng) == 0.0
    assert target_rate(cfg, 10, rng) == 0.0  # fewer tokens than max_keep: nothing dropped
    # through decide_drop, exactly max_keep tokens stay
    assert decide("random", (14, 14), max_keep=49).kept == 49
    assert decide("random", (5, 6), max_keep=49).kept == 30


def test_target_rate_curve_interpolates_and_is_flat_beyond_the_ends() -> None:
    cfg = DropConfig(mode="random", rate_curve=[[64, 0.0], [256, 0.5], [1024, 0.75]])
    rng = np.random.default_rng(0)
    expected = {1: 0.0, 16: 0.0, 64: 0.0, 160: 0.25, 256: 0.5, 640: 0.625, 1024: 0.75, 5000: 0.75}
    for n, rate in expected.items():
        assert target_rate(cfg, n, rng) == pytest.approx(rate), n
    one = DropConfig(mode="random", rate_curve=[[100, 0.4]])
    assert [target_rate(one, n, rng) for n in (1, 100, 10_000)] == pytest.approx([0.4, 0.4, 0.4])


def test_target_rate_beta_draws_per_image_and_grid_stride_is_nominal() -> None:
    cfg = DropConfig(mode="random", beta=(2.0, 5.0))
    rates = [target_rate(cfg, 196, np.random.default_rng(s)) for s in range(20)]
    assert all(0.0 < r < 1.0 for r in rates) and len(set(rates)) == 20
    assert target_rate(DropConfig(mode="grid", grid={"stride": 2}), 196, np.random.default_rng(0)) == 0.75


# --- random ---------------------------------------------------------------------------------


@pytest.mark.parametrize("grid", GRIDS)
@pytest.mark.parametrize("rate", RATES)
@pytest.mark.parametrize("min_keep", [0, 1, 7])
def test_random_drops_exactly_the_target_count(grid, rate, min_keep) -> None:
    n = grid[0] * grid[1]
    want = min(expected_drops(rate, n), n - min(min_keep, n))
    for seed in range(3):
        keep = drop_random(n, rate, np.random.default_rng(seed), min_keep=min_keep)
        assert keep.shape == (n,) and keep.dtype == bool
        assert n - int(keep.sum()) == want


def test_random_rounds_half_up_and_refuses_bad_rates() -> None:
    assert int((~drop_random(14, 0.75, np.random.default_rng(0))).sum()) == 11  # 10.5 -> 11
    assert int((~drop_random(3, 0.5, np.random.default_rng(0))).sum()) == 2  # 1.5 -> 2
    for bad in (-0.1, 1.5, float("nan")):
        with pytest.raises(ValueError, match="0..1"):
            drop_random(10, bad, np.random.default_rng(0))


#: Each mode's function with its other arguments fixed; keyword arguments go through.
MODE_CALLS = {
    "random": lambda rng, **kw: drop_random(16, 1.0, rng, **kw),
    "block": lambda rng, **kw: drop_block((4, 4), 1.0, rng, min_area=2, **kw)[0],
    "grid": lambda rng, **kw: drop_grid((4, 4), 1.0, rng, **kw),
    "stripes": lambda rng, **kw: drop_stripes((4, 4), 1.0, rng, **kw),
    "content": lambda rng, **kw: drop_content(np.arange(16 * 3).reshape(16, 3), 1.0, rng, **kw),
}


@pytest.mark.parametrize("mode", sorted(MODE_CALLS))
def test_every_mode_refuses_a_negative_min_keep_and_defaults_to_zero(mode) -> None:
    """A negative floor is a caller's mistake and is said so; left out, min_keep is 0."""
    call = MODE_CALLS[mode]
    with pytest.raises(ValueError, match="min_keep must be >= 0"):
        call(np.random.default_rng(0), min_keep=-1)
    default = call(np.random.default_rng(3))
    assert np.array_equal(default, call(np.random.default_rng(3), min_keep=0))
    if mode in ("random", "content"):  # exact counts: rate 1 with no floor drops every token
        assert not default.any() and call(np.random.default_rng(3), min_keep=1).sum() == 1


# --- grid -----------------------------------------------------------------------------------


def brute_stride(grid: tuple[int, int], rate: float) -> int:
    share = 1 - rate
    best = None
    for k in range(1, max(grid) + 1):
        if best is None or abs(1 / k**2 - share) < abs(1 / best**2 - share):
            best = k
    return best


def lattice(keep: np.ndarray, grid: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """(kept rows, kept cols), after checking the kept set is exactly their product."""
    k2 = keep.reshape(grid)
    rows, cols = k2.any(axis=1), k2.any(axis=0)
    np.testing.assert_array_equal(k2, np.outer(rows, cols))
    return np.flatnonzero(rows), np.flatnonzero(cols)


def assert_strided(idx: np.ndarray, size: int, k: int) -> None:
    assert idx.size >= 1
    assert idx[0] < min(k, size)
    np.testing.assert_array_equal(idx, np.arange(idx[0], size, k))


@pytest.mark.parametrize("grid", GRIDS)
@pytest.mark.parametrize("rate", RATES)
def test_grid_keeps_a_strided_lattice(grid, rate) -> None:
    k = brute_stride(grid, rate)
    for seed in range(4):
        keep = drop_grid(grid, rate, np.random.default_rng(seed))
        rows, cols = lattice(keep, grid)
        assert_strided(rows, grid[0], k)
        assert_strided(cols, grid[1], k)


def test_grid_stride_setting_and_random_offsets() -> None:
    offsets = set()
    for seed in range(30):
        rows, cols = lattice(drop_grid((14, 14), None, np.random.default_rng(seed), stride=3), (14, 14))
        assert_strided(rows, 14, 3)
        assert_strided(cols, 14, 3)
        offsets.add((int(rows[0]), int(cols[0])))
    assert len(offsets) == 9  # every (row, col) offset pair in 0..2 turns up
    # rate 0.75 -> stride 2 on a 14x14 grid: a quarter kept
    assert int(drop_grid((14, 14), 0.75, np.random.default_rng(0)).sum()) == 49


def test_grid_lowers_stride_for_min_keep() -> None:
    keep = drop_grid((14, 14), 1.0, np.random.default_rng(0))
    assert int(keep.sum()) == 1  # the lattice always keeps one token
    keep = drop_grid((14, 14), 1.0, np.random.default_rng(0), min_keep=10)
    rows, cols = lattice(keep, (14, 14))
    assert rows.size * cols.size >= 10
    k = int(rows[1] - rows[0])
    assert_strided(rows, 14, k)
    assert_strided(cols, 14, k)


# --- stripes --------------------------------------------------------------------------------


@pytest.mark.parametrize("grid", GRIDS)
@pytest.mark.parametrize("rate", RATES)
@pytest.mark.parametrize("min_keep", [0, 1])
def test_stripes_drop_whole_rows_or_columns(grid, rate, min_keep) -> None:
    n = grid[0] * grid[1]
    target = expected_drops(rate, n)
    for seed in range(4):
        keep = drop_stripes(grid, rate, np.random.default_rng(seed), min_keep=min_keep)
        rows, cols = lattice(keep, grid)  # kept = product of kept rows and cols: whole stripes only
        kept_r, kept_c = rows.size, cols.size
        dropped = n - int(keep.sum())
        assert int(keep.sum()) >= min(min_keep, n)
        if dropped >= target:
            assert dropped - target < max(grid)  # overshoot: less than one stripe
        else:  # stopped short: any further stripe would leave fewer than min_keep tokens
            assert (kept_r - 1) * kept_c < min_keep and kept_r * (kept_c - 1) < min_keep


def test_stripes_use_both_orientations_and_reach_the_target() -> None:
    row_cuts = col_cuts = 0
    for seed in range(40):
        keep = drop_stripes((14, 14), 0.3, np.random.default_rng(seed))
        rows, cols = lattice(keep, (14, 14))
        row_cuts += 14 - rows.size
        col_cuts += 14 - cols.size
        dropped = 196 - int(keep.sum())
        assert 59 <= dropped < 59 + 14
    assert row_cuts > 40 and col_cuts > 40
    assert int(drop_stripes((14, 14), 1.0, np.random.default_rng(0), min_keep=1).sum()) == 1


# --- block ----------------------------------------------------------------------------------


def check_blocks(grid, rate, keep, rects, *, min_area=16, aspect=ASPECT, min_keep=0) -> None:
    gh, gw = grid
    n = gh * gw
    a_min = min(min_area, largest_allowed_block(grid, aspect))
    union = np.zeros(grid, dtype=bool)
    for top, left, h, w in rects:
        assert 0 <= top and 0 <= left and top + h <= gh and left + w <= gw, (top, left, h, w)
        assert h * w >= a_min, (h, w, a_min)
        assert aspect[0] <= h / w <= aspect[1], (h, w)
        union[top : top + h, left : left + w] = True
    np.testing.assert_array_equal(union.reshape(-1), ~keep)
    target = min(expected_drops(rate, n), n - min(min_keep, n))
    dropped = n - int(keep.sum())
    assert abs(dropped - target) < max([a_min] + [h * w for *_, h, w in rects]), (dropped, target)
    if dropped > target:  # stated overshoot rule: under half of the last block
        assert 2 * (dropped - target) < rects[-1][2] * rects[-1][3], (dropped, target, rects[-1])
    assert int(keep.sum()) >= min(min_keep, n)


@pytest.mark.parametrize("grid", GRIDS)
@pytest.mark.parametrize("rate", RATES)
@pytest.mark.parametrize("min_keep", [0, 1])
def test_block_rectangles_are_valid_and_cover_the_dropped_set(grid, rate, min_keep) -> None:
    for seed in range(6):
        keep, rects = drop_block(grid, rate, np.random.default_rng(seed), min_keep=min_keep)
        check_blocks(grid, rate, keep, rects, min_keep=min_keep)


def test_block_tiny_grids_clamp_min_area() -> None:
    # one row, aspect >= 0.3: the biggest allowed block is 1x3, so min_area 16 becomes 3
    keep, rects = drop_block((1, 50), 0.5, np.random.default_rng(0))
    assert rects and all((h, w) == (1, 3) for *_, h, w in rects)
    check_blocks((1, 50), 0.5, keep, rects)
    # 3x3: only the whole grid is a block of the clamped area 9
    keep, rects = drop_block((3, 3), 1.0, np.random.default_rng(0))
    assert rects == [(0, 0, 3, 3)] and not keep.any()
    # no allowed block fits at all: nothing dropped
    keep, rects = drop_block((1, 50), 0.5, np.random.default_rng(0), aspect=(2.0, 3.0))
    assert rects == [] and keep.all()


def test_block_options_shape_the_blocks() -> None:
    for seed in range(5):
        keep, rects = drop_block((14, 14), 0.5, np.random.default_rng(seed), min_area=4, aspect=(1.0, 1.0))
        assert rects and all(h == w for *_, h, w in rects)
        check_blocks((14, 14), 0.5, keep, rects, min_area=4, aspect=(1.0, 1.0))
    for seed in range(5):
        keep, rects = drop_block((14, 14), 0.5, np.random.default_rng(seed), min_area=30)
        assert all(h * w >= 30 for *_, h, w in rects)


@settings(max_examples=120, deadline=None, derandomize=True)
@given(gh=st.integers(1, 24), gw=st.integers(1, 24), rate=st.floats(0, 1), min_area=st.integers(1, 40),
       min_keep=st.integers(0, 30), seed=st.integers(0, 2**32 - 1))
def test_block_property(gh, gw, rate, min_area, min_keep, seed) -> None:
    keep, rects = drop_block((gh, gw), rate, np.random.default_rng(seed), min_area=min_area, min_keep=min_keep)
    check_blocks((gh, gw), rate, keep, rects, min_area=min_area, min_keep=min_keep)



def anchored_position_law(grid: tuple[int, int], h: int, w: int, *, off_by_one: bool = False) -> dict:
    """P(top, left) of the first block when placement is anchored: a token drawn uniformly from the
    (all kept) grid, then top and left each uniform over the positions whose block covers it,
    enumerated by brute force. off_by_one leaves out the last such position (for the power check)."""
    gh, gw = grid
    law: dict[tuple[int, int], float] = {}
    for r in range(gh):
        for c in range(gw):
            tops = [t for t in range(gh - h + 1) if t <= r < t + h]
            lefts = [q for q in range(gw - w + 1) if q <= c < q + w]
            if off_by_one:
                tops, lefts = tops[:-1] or tops, lefts[:-1] or lefts
            for t in tops:
                for q in lefts:
                    law[t, q] = law.get((t, q), 0.0) + 1 / (gh * gw * len(tops) * len(lefts))
    return law


@pytest.mark.parametrize("grid, side", [((4, 4), 2), ((5, 7), 2), ((6, 5), 3)])
def test_anchored_block_position_is_uniform_over_blocks_covering_a_kept_token(monkeypatch, grid, side) -> None:
    """With anchoring from the first attempt, one square block of the target's size is placed over a
    uniformly drawn kept token; its (top, left) must follow the brute-force law (chi-square, p > 0.001),
    and the same test must reject the law that never starts the block at the token's own row/column."""
    from scipy import stats

    monkeypatch.setattr(dropping, "BLOCK_ANCHOR_AFTER", 0)
    area, n = side * side, grid[0] * grid[1]
    images = 3_000
    seen: dict[tuple[int, int], int] = {}
    for i in range(images):
        keep, rects = drop_block(grid, area / n, np.random.default_rng([7, i]), min_area=area, aspect=(1.0, 1.0))
        assert len(rects) == 1 and rects[0][2:] == (side, side) and np.count_nonzero(~keep) == area
        seen[rects[0][:2]] = seen.get(rects[0][:2], 0) + 1
    law = anchored_position_law(grid, side, side)
    assert set(seen) <= set(law)
    cells = sorted(law)
    observed = np.array([seen.get(k, 0) for k in cells])
    assert stats.chisquare(observed, [law[k] * images for k in cells]).pvalue > 0.001
    wrong = anchored_position_law(grid, side, side, off_by_one=True)
    assert stats.chisquare(observed, [wrong.get(k, 1e-9) * images for k in cells]).pvalue < 1e-6

# --- content --------------------------------------------------------------------------------


def half_flat_image(grid: tuple[int, int], patch: int, *, split: str, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Image with one half flat white and the other uniform noise; returns (patches, flat flags)."""
    gh, gw = grid
    img = np.random.default_rng(seed).integers(0, 256, (gh * patch, gw * patch, 3), dtype=np.uint8)
    flat = np.zeros(grid, dtype=bool)
    if split == "left":
        flat[:, : gw // 2] = True
    else:
        flat[: gh // 2, :] = True
    img[np.repeat(np.repeat(flat, patch, axis=0), patch, axis=1)] = 255
    return patchify(img, patch), flat.reshape(-1)


@pytest.mark.parametrize("split", ["left", "top"])
def test_content_drops_the_flat_half_first(split) -> None:
    patches, flat = half_flat_image((14, 14), 8, split=split)
    for seed in range(5):
        keep = drop_content(patches, 0.5, np.random.default_rng(seed))
        dropped = ~keep
        assert int(dropped.sum()) == 98
        assert flat[dropped].mean() >= 0.95
        keep = drop_content(patches, 0.25, np.random.default_rng(seed))
        assert flat[~keep].all()  # fewer than the flat half: only flat ones go


def test_content_float_patches_and_min_keep() -> None:
    patches, flat = half_flat_image((6, 10), 4, split="left")
    as_float = (patches.astype(np.float32) / 255 - 0.5) / 0.5
    keep = drop_content(as_float, 0.5, np.random.default_rng(0))
    assert flat[~keep].mean() >= 0.95
    keep = drop_content(as_float, 1.0, np.random.default_rng(0), min_keep=4)
    assert int(keep.sum()) == 4


def test_content_noise_makes_it_random_and_zero_noise_is_the_exact_order() -> None:
    rng = np.random.default_rng(3)
    spread = np.linspace(1, 60, 100)  # patch i has standard deviation spread[i] (all different)
    patches = rng.standard_normal((100, 48)) * spread[:, None]
    by_variance = np.argsort(patches.var(axis=1))
    for seed in range(4):
        keep = drop_content(patches, 0.3, np.random.default_rng(seed), noise=0.0)
        assert set(np.flatnonzero(~keep)) == set(by_variance[:30])
    noisy = {tuple(drop_content(patches, 0.3, np.random.default_rng(s), noise=0.5)) for s in range(6)}
    assert len(noisy) > 1
    # a flat image (all scores tie): the dropped tokens are random, not the first ones
    flat = np.full((50, 12), 7, dtype=np.uint8)
    picks = {tuple(np.flatnonzero(~drop_content(flat, 0.2, np.random.default_rng(s)))) for s in range(6)}
    assert len(picks) > 1


# --- all modes through decide_drop ----------------------------------------------------------


@pytest.mark.parametrize("mode", MODES)
@pytest.mark.parametrize("grid", GRIDS)
def test_rate_zero_keeps_everything(mode, grid) -> None:
    d = decide(mode, grid, rate=0.0)
    assert d.keep.shape == (grid[0] * grid[1],) and d.keep.all() and d.blocks == ()
    assert d.rate == 0.0 and d.mode == mode


@pytest.mark.parametrize("mode", MODES)
@pytest.mark.parametrize("grid", GRIDS)
@pytest.mark.parametrize("min_keep", [0, 1, 5, 10_000])
def test_min_keep_is_honoured_at_rate_one(mode, grid, min_keep) -> None:
    n = grid[0] * grid[1]
    d = decide(mode, grid, rate=1.0, min_keep=min_keep)
    floor = min(min_keep, n)
    assert d.kept >= floor
    if mode in ("random", "content"):
        assert d.kept == floor
    if mode == "grid":
        assert d.kept >= 1  # a lattice keeps at least one token
    elif min_keep == 0 and mode in ("random", "content", "stripes"):
        assert d.kept == 0


@pytest.mark.parametrize("mode", MODES)
def test_same_seed_same_decision_other_seed_other_decision(mode) -> None:
    grid = (14, 14)
    a, b = decide(mode, grid, seed=11, rate=0.75), decide(mode, grid, seed=11, rate=0.75)
    np.testing.assert_array_equal(a.keep, b.keep)
    assert (a.rate, a.blocks, a.mode) == (b.rate, b.blocks, b.mode)
    others = {decide(mode, grid, seed=s, rate=0.75).keep.tobytes() for s in range(12, 18)}
    assert len(others | {a.keep.tobytes()}) > 1
    rates = {decide(mode, grid, seed=s, beta=(2.0, 2.0)).rate for s in range(5)}
    assert len(rates) == 5


def test_decide_drop_mode_none_and_blocks_recorded() -> None:
    d = decide_drop(DropConfig(), (3, 4), None, np.random.default_rng(0))
    assert d.keep.all() and d.keep.shape == (12,) and d.rate == 0.0 and d.mode == "none"
    d = decide("block", (14, 14), rate=0.5)
    assert d.blocks and isinstance(d.blocks, tuple)
    union = np.zeros((14, 14), dtype=bool)
    for top, left, h, w in d.blocks:
        union[top : top + h, left : left + w] = True
    np.testing.assert_array_equal(union.reshape(-1), ~d.keep)


def test_decide_drop_content_follows_coords_of_reordered_tokens() -> None:
    patches, _ = half_flat_image((6, 8), 4, split="left")
    cfg = DropConfig(mode="content", rate=0.4)
    raster = decide_drop(cfg, (6, 8), patches, np.random.default_rng(5))
    order = np.random.default_rng(9).permutation(48)
    shuffled = decide_drop(cfg, (6, 8), patches[order], np.random.default_rng(5), coords=grid_coords(6, 8)[order])
    np.testing.assert_array_equal(raster.keep, shuffled.keep)
    with pytest.raises(ValueError, match="content mode needs all"):
        decide_drop(cfg, (6, 8), patches[:40], np.random.default_rng(5))
    with pytest.raises(ValueError, match="once"):
        decide_drop(cfg, (6, 8), patches, np.random.default_rng(5), coords=np.zeros((48, 2), dtype=np.int32))


def test_content_coords_are_checked_against_each_side_of_the_grid() -> None:
    """Each coord is a place of the 6 x 8 grid: row < 6 and col < 8 (a row of 6 or 7 fits the columns
    but not the rows), none negative, and every place named exactly once (twice is already wrong)."""
    patches, _ = half_flat_image((6, 8), 4, split="left")
    cfg = DropConfig(mode="content", rate=0.4)
    good = grid_coords(6, 8)
    for bad_place in ([6, 0], [0, 8], [-1, 0], [0, -1]):
        coords = good.copy()
        coords[5] = bad_place
        with pytest.raises(ValueError, match="places in the 6x8 grid"):
            decide_drop(cfg, (6, 8), patches, np.random.default_rng(5), coords=coords)
    twice = good.copy()
    twice[1] = twice[0]  # place (0, 0) twice, (0, 1) never
    with pytest.raises(ValueError, match="every grid place once"):
        decide_drop(cfg, (6, 8), patches, np.random.default_rng(5), coords=twice)
    assert decide_drop(cfg, (6, 8), patches, np.random.default_rng(5), coords=good).total == 48


# --- apply_drop -----------------------------------------------------------------------------


def image_patchset(grid=(5, 7), patch=4, key="img-1") -> PatchSet:
    img = np.random.default_rng(1).integers(0, 256, (grid[0] * patch, grid[1] * patch, 3), dtype=np.uint8)
    return PatchSet(patchify(img, patch), grid_coords(*grid), grid, key, 3, {"shard": "s.tar"})


def test_apply_drop_keeps_raster_coords_and_matching_patches() -> None:
    ps = image_patchset()
    before = ps.patches.copy()
    d = decide_drop(DropConfig(mode="random", rate=0.4), ps.grid, ps.patches, np.random.default_rng(2))
    out = apply_drop(ps, d, "remove")
    kept = np.flatnonzero(d.keep)
    np.testing.assert_array_equal(out.coords, np.stack(np.divmod(kept, 7), axis=1))  # raster order
    np.testing.assert_array_equal(out.patches, before[kept])
    assert out.num_tokens == 35 - 14 and out.grid == (5, 7) and out.key == "img-1" and out.label == 3
    assert out.meta["drop"] == {"mode": "random", "rate": 0.4, "kept": 21, "total": 35}
    assert out.meta["shard"] == "s.tar" and out.masked is None
    assert ps.num_tokens == 35 and "drop" not in ps.meta  # the input is untouched


def test_apply_drop_mask_keeps_every_token() -> None:
    ps = image_patchset()
    d = decide_drop(DropConfig(mode="block", rate=0.5, block={"min_area": 4}), ps.grid, None, np.random.default_rng(0))
    out = apply_drop(ps, d, "mask")
    np.testing.assert_array_equal(out.patches, ps.patches)
    np.testing.assert_array_equal(out.coords, ps.coords)
    np.testing.assert_array_equal(out.masked, ~d.keep)
    assert out.masked.dtype == bool and out.masked.any()
    assert out.meta["drop"]["kept"] == int(d.keep.sum()) and out.meta["drop"]["total"] == 35


def test_apply_drop_matches_tokens_by_coords_when_reordered() -> None:
    ps = image_patchset()
    order = np.random.default_rng(4).permutation(35)
    shuffled = PatchSet(ps.patches[order], ps.coords[order], ps.grid, ps.key)
    d = decide_drop(DropConfig(mode="stripes", rate=0.3), ps.grid, None, np.random.default_rng(1))
    out = apply_drop(shuffled, d, "remove")
    flat = out.coords[:, 0] * 7 + out.coords[:, 1]
    assert d.keep[flat].all() and out.num_tokens == d.kept
    np.testing.assert_array_equal(out.patches, ps.patches[flat])  # each patch still beside its coords
    np.testing.assert_array_equal(flat, [i for i in order if d.keep[i]])  # token order kept


def test_apply_drop_refuses_mismatches() -> None:
    ps = image_patchset()
    d = decide_drop(DropConfig(mode="random", rate=0.5), (5, 6), None, np.random.default_rng(0))
    with pytest.raises(ValueError, match="img-1"):
        apply_drop(ps, d, "remove")
    with pytest.raises(ValueError, match="how"):
        apply_drop(ps, DropDecision(np.ones(35, dtype=bool), 0.0), "hide")



@pytest.mark.parametrize("how", ["remove", "mask"])
def test_recipe_drop_section_through_image_to_patches(how) -> None:
    from patchloom import Recipe, image_to_patches

    img = np.random.default_rng(0).integers(0, 256, (224, 224, 3), dtype=np.uint8)
    recipe = Recipe.from_dict({"sizing": {"max_tokens": 196}, "drop": {"mode": "random", "rate": 0.5, "output": how}})
    ps = image_to_patches(img, recipe, key="a")
    again = image_to_patches(img, recipe, key="a")
    np.testing.assert_array_equal(ps.coords, again.coords)
    assert ps.meta["drop"] == {"mode": "random", "rate": 0.5, "kept": 98, "total": 196}
    if how == "remove":
        assert ps.num_tokens == 98 and ps.masked is None
    else:
        assert ps.num_tokens == 196 and int(ps.masked.sum()) == 98


# --- the DROP_MODES table --------------------------------------------------------------------


def test_every_drop_mode_in_the_table_is_reached_through_decide_drop() -> None:
    from patchloom.image.dropping import DROP_MODES

    assert set(MODES) | {"none"} == set(DROP_MODES)
    grid = (8, 8)
    for name, mode in DROP_MODES.items():
        cfg = DropConfig(mode=name) if name == "none" else DropConfig(mode=name, rate=0.5)
        d = decide_drop(cfg, grid, noise_patches(grid), np.random.default_rng(3))
        rng = np.random.default_rng(3)
        rate = target_rate(cfg, 64, rng)
        keep, blocks = mode(grid, rate, cfg, rng, lambda: noise_patches(grid))
        np.testing.assert_array_equal(d.keep, keep)
        assert (d.mode, d.rate, d.blocks) == (name, rate, tuple(blocks))
        assert (d.kept == 64) if name == "none" else (d.kept < 64), name


def test_a_mode_added_to_the_table_is_dispatched(monkeypatch) -> None:
    from patchloom.image.dropping import DROP_MODES

    def every_other(grid, rate, cfg, rng, patches):
        return np.arange(grid[0] * grid[1]) % 2 == 0, ()

    monkeypatch.setitem(DROP_MODES, "every_other", every_other)
    cfg = DropConfig(mode="random", rate=0.5).model_copy(update={"mode": "every_other"})
    d = decide_drop(cfg, (2, 3), None, np.random.default_rng(0))
    assert d.keep.tolist() == [True, False, True, False, True, False] and d.mode == "every_other"


def test_unknown_drop_mode_names_the_recipe_key_and_the_known_modes() -> None:
    cfg = DropConfig(mode="random", rate=0.5).model_copy(update={"mode": "checkers"})
    with pytest.raises(ValueError, match=r"unknown drop mode 'checkers'.*drop\.mode.*none, random, block"):
        decide_drop(cfg, (4, 4), None, np.random.default_rng(0))


def test_default_min_keep_is_zero_so_rate_one_can_drop_everything() -> None:
    """Called directly, stripes and content keep nothing at rate 1 (min_keep defaults to 0); grid
    always keeps its lattice (at least one token)."""
    from patchloom.image.dropping import drop_content, drop_grid, drop_stripes

    rng = np.random.default_rng(0)
    assert not drop_stripes((3, 4), 1.0, rng).any()
    assert not drop_content(noise_patches((3, 4)), 1.0, rng).any()
    assert drop_grid((3, 4), 1.0, rng).sum() == 1  # stride 4 on a 3 x 4 grid: one row x one column
    with pytest.raises(ValueError, match="stride must be >= 1"):
        drop_grid((3, 4), None, rng, stride=0)
    assert drop_grid((3, 4), None, rng, stride=1).all()


def test_content_noise_also_reaches_a_two_patch_image() -> None:
    """Two patches, variances 0 and a little more, rate 0.5, strong noise: the jitter sometimes keeps
    the flat one (the choice near the cut is not deterministic), but mostly drops it."""
    from patchloom.image.dropping import drop_content

    patches = np.zeros((2, 12), np.uint8)
    patches[1, ::2] = 2  # variance 1
    kept_flat = sum(bool(drop_content(patches, 0.5, np.random.default_rng(i), noise=1.0)[0]) for i in range(200))
    assert 0 < kept_flat < 100
    assert not any(drop_content(patches, 0.5, np.random.default_rng(i), noise=0.0)[0] for i in range(20))


def test_content_scores_are_the_variance_even_for_large_patches() -> None:
    """content_scores is each patch's variance over its D values: checked against numpy's float64
    variance on 16 x 16 x 3 = 768 values of full-range noise, where integer sums of squares times D
    pass 2^31."""
    from patchloom.image.dropping import content_scores

    x = np.random.default_rng(3).integers(0, 256, (6, 768), dtype=np.uint8)
    got = content_scores(x)
    assert got.dtype == np.float64
    np.testing.assert_allclose(got, x.astype(np.float64).var(axis=1), rtol=1e-12)
    np.testing.assert_allclose(content_scores(x.astype(np.float32)), x.astype(np.float64).var(axis=1), rtol=1e-6)


def test_negative_content_noise_is_refused() -> None:
    from patchloom.image.dropping import drop_content

    for noise in (-0.5, -1.5):
        with pytest.raises(ValueError, match="noise must be >= 0"):
            drop_content(noise_patches((2, 2)), 0.5, np.random.default_rng(0), noise=noise)


def test_content_on_a_clip_decides_each_slice_from_its_own_pixels() -> None:
    """A clip of two slices: slice 0 is flat on the left, slice 1 flat on the right; content mode
    (noise 0) drops the flat half of each slice, in slice order, from the tokens' times and coords."""
    left, _ = half_flat_image((4, 4), 4, split="left")
    right = left.reshape(4, 4, -1)[:, ::-1].reshape(16, -1)  # the mirror image: flat on the right
    patches = np.concatenate([left, right])
    times = np.repeat(np.arange(2), 16)
    coords = np.concatenate([grid_coords(4, 4)] * 2)
    cfg = DropConfig(mode="content", rate=0.5, content={"noise": 0.0})
    d = decide_drop(cfg, (4, 4), patches, np.random.default_rng(1), coords=coords, times=times, slices=2)
    keep = d.keep.reshape(2, 4, 4)
    assert not keep[0, :, :2].any() and keep[0, :, 2:].all()
    assert keep[1, :, :2].all() and not keep[1, :, 2:].any()
    order = np.random.default_rng(2).permutation(32)  # tokens in any order: coords and times place them
    again = decide_drop(cfg, (4, 4), patches[order], np.random.default_rng(1), coords=coords[order],
                        times=times[order], slices=2)
    np.testing.assert_array_equal(again.keep, d.keep)
    with pytest.raises(ValueError, match="needs the patches and their times"):
        decide_drop(cfg, (4, 4), patches, np.random.default_rng(1), coords=coords, times=None, slices=2)


# --- exact counts and clips the statistics cannot see -------------------------------------------


class ScriptedRng:
    """Stands in for a Generator in drop_block: `random((k, 5))` hands out the given attempts' five
    uniforms (u_area, u_aspect, u_top, u_left, u_anchor) in order, then zeros."""

    def __init__(self, attempts: list[tuple[float, float, float, float, float]]) -> None:
        self.rows = [list(a) for a in attempts]

    def random(self, shape: tuple[int, int]) -> np.ndarray:
        out = np.zeros(shape)
        take, self.rows = self.rows[: shape[0]], self.rows[shape[0]:]
        if take:
            out[: len(take)] = take
        return out


def test_block_placement_is_anchored_from_the_ninth_rejection_in_a_row_exactly() -> None:
    """On a 4x4 grid with 2x2 blocks and a target of 8: attempt 1 drops the top-left block; the next
    eight attempts put the block there again and are rejected (nothing new); attempt 10, the first
    after 8 rejections, is anchored on the first still-kept token (0, 2); attempt 9, still unanchored,
    must not be (it would anchor on the last kept token, (3, 3))."""
    first = (0.0, 0.5, 0.0, 0.0, 0.0)
    again = [(0.0, 0.5, 0.0, 0.0, 0.0)] * 7
    ninth = (0.0, 0.5, 0.0, 0.0, 0.999)  # anchored, this would cover (3, 3)
    tenth = (0.0, 0.5, 0.0, 0.0, 0.0)  # anchored: token (0, 2); top 0, left 1 (the first covering place)
    keep, rects = drop_block((4, 4), 0.5, ScriptedRng([first, *again, ninth, tenth]), min_area=4, aspect=(1.0, 1.0))
    assert rects[:2] == [(0, 0, 2, 2), (0, 1, 2, 2)], rects
    assert dropping.BLOCK_ANCHOR_AFTER == 8  # README and the statistics test name this count


def test_grid_stride_keeps_everything_at_low_rates() -> None:
    for grid in [(4, 4), (1, 9), (14, 14)]:
        assert grid_stride(grid, 0.0) == 1 and grid_stride(grid, 0.2) == 1
        assert grid_stride(grid, 0.75) == 2  # keeps 1/4
        assert grid_stride(grid, 1.0) == max(grid)  # the largest stride that still means something


def test_content_scores_are_the_exact_variance() -> None:
    """uint8 patches: the integer sums give numpy's float64 variance to the last bit on these values;
    float patches: numpy's float64 variance itself (not a float32 one)."""
    rng = np.random.default_rng(5)
    ints = rng.integers(0, 256, size=(50, 768), dtype=np.uint8)
    np.testing.assert_allclose(content_scores(ints), ints.astype(np.float64).var(axis=1), rtol=1e-12)
    floats = rng.random((50, 768)).astype(np.float32) * 1000
    got = content_scores(floats)
    assert got.dtype == np.float64
    np.testing.assert_array_equal(got, floats.var(axis=1, dtype=np.float64))


def test_a_tube_decision_repeats_one_spatial_choice_in_every_slice() -> None:
    cfg = DropConfig(mode="tube", rate=0.5)
    d = decide_drop(cfg, (4, 6), None, np.random.default_rng(3), slices=3)
    keep = d.keep.reshape(3, 24)
    assert d.slices == 3 and (keep == keep[0]).all() and keep[0].sum() == 12


def test_apply_drop_reads_each_token_s_slice_of_the_decision() -> None:
    """Three slices, the decision keeps slices 0 and 1 and drops slice 2: exactly the tokens of times 0
    and 1 stay, in their order."""
    gh, gw = 2, 3
    coords = np.concatenate([grid_coords(gh, gw)] * 3)
    times = np.repeat(np.arange(3, dtype=np.int32), gh * gw)
    patches = np.arange(18 * 4, dtype=np.uint8).reshape(18, 4)
    ps = PatchSet(patches=patches, coords=coords, grid=(gh, gw), key="clip", times=times, frames=3)
    keep = np.repeat([True, True, False], gh * gw)
    out = apply_drop(ps, DropDecision(keep, 1 / 3, (), "random", 3), "remove")
    assert out.times.tolist() == [0] * 6 + [1] * 6
    np.testing.assert_array_equal(out.patches, patches[:12])


def test_every_mode_refuses_a_grid_with_an_empty_side() -> None:
    for grid in [(0, 4), (4, 0)]:
        for mode in MODES:
            with pytest.raises(ValueError, match="both >= 1"):
                decide_drop(DropConfig(mode=mode, rate=0.5), grid, np.zeros((0, 3)), np.random.default_rng(0))
    with pytest.raises(ValueError, match="slices and window must be >= 1"):
        decide_drop(DropConfig(mode="random", rate=0.5), (4, 4), None, np.random.default_rng(0), slices=0)


def stripe_law(grid: tuple[int, int], target: int, floor: int) -> dict[tuple[int, int], float]:
    """P(rows left, columns left) at the end of drop_stripes' documented procedure, by exact
    recursion over fair coins: stop once target tokens are dropped; a stripe of the coin's
    orientation unless that one would leave under `floor` tokens (then the other; neither: stop)."""
    gh, gw = grid
    n = gh * gw
    law: dict[tuple[int, int], float] = {}

    def walk(r: int, c: int, p: float, left: int) -> None:
        can_row, can_col = r > 0 and (r - 1) * c >= floor, c > 0 and r * (c - 1) >= floor
        if n - r * c >= target or left == 0 or not (can_row or can_col):
            law[r, c] = law.get((r, c), 0.0) + p
            return
        for coin_row in (True, False):
            row = can_row if coin_row else not can_col
            walk(r - row, c - (not row), p / 2, left - 1)

    walk(gh, gw, 1.0, gh + gw)
    return law


@pytest.mark.parametrize("grid, rate, floor", [((2, 4), 0.75, 0), ((3, 5), 0.9, 2), ((4, 4), 1.0, 0), ((1, 6), 0.5, 1),
                                               ((3, 2), 0.8, 0)])
def test_stripes_follow_the_law_of_their_coins(grid, rate, floor) -> None:
    """The (rows, columns) left over 3,000 draws against the exact law (chi-square, p > 0.001)."""
    from scipy import stats

    gh, gw = grid
    seen: dict[tuple[int, int], int] = {}
    for i in range(3_000):
        keep = drop_stripes(grid, rate, np.random.default_rng([9, i]), min_keep=floor).reshape(gh, gw)
        rc = (int(keep.any(axis=1).sum()), int(keep.any(axis=0).sum())) if keep.any() else None
        if rc is None:  # nothing kept: the rows or the columns ran out; the law says which
            rc = ("empty",)
        seen[rc] = seen.get(rc, 0) + 1
    law: dict = {}
    for (r, c), p in stripe_law(grid, math.floor(rate * gh * gw + 0.5), floor).items():
        k = (r, c) if r and c else ("empty",)
        law[k] = law.get(k, 0.0) + p
    assert set(seen) <= set(law), (seen, law)
    cells = sorted(law, key=str)
    observed = [seen.get(k, 0) for k in cells]
    if len(cells) > 1:
        assert stats.chisquare(observed, [law[k] * 3_000 for k in cells]).pvalue > 0.001, (seen, law)


def test_a_clip_with_merge_windows_drops_whole_windows_in_every_slice() -> None:
    cfg = DropConfig(mode="random", rate=0.5)
    gh, gw, m = 4, 6, 2
    coords = np.concatenate([grid_coords(gh, gw)] * 3)
    times = np.repeat(np.arange(3), gh * gw)
    d = decide_drop(cfg, (gh, gw), None, np.random.default_rng(4), coords=coords, window=m, times=times, slices=3)
    for keep in d.keep.reshape(3, gh, gw):
        windows = keep.reshape(gh // m, m, gw // m, m).transpose(0, 2, 1, 3).reshape(-1, m * m)
        assert (windows.all(axis=1) | ~windows.any(axis=1)).all()  # each window whole or gone
        assert windows.all(axis=1).sum() == 3  # half of the 6 windows


def test_the_aspect_draw_is_narrowed_to_blocks_that_fit_the_grid() -> None:
    """A 4 x 50 grid, area 16: the top of the narrowed log-aspect range is the tallest block that fits,
    4 x 4, so a draw at the top of the range (u = 0.999) is accepted at once; drawn from the whole
    aspect range it would be 7 x 2, taller than the grid, and rejected."""
    top = (0.0, 0.999, 0.0, 0.0, 0.0)
    keep, rects = drop_block((4, 50), 16 / 200, ScriptedRng([top]), min_area=16)
    assert rects == [(0, 0, 4, 4)] and np.count_nonzero(~keep) == 16
    bottom = (0.0, 0.001, 0.0, 0.0, 0.0)  # on the 50 x 4 grid the bottom of the range is the widest: 4 x 4
    assert drop_block((50, 4), 16 / 200, ScriptedRng([bottom]), min_area=16)[1] == [(0, 0, 4, 4)]


def test_the_default_min_area_is_sixteen_tokens() -> None:
    """BEiT's setting: with the default, a 16-token target on 14 x 14 is one 4 x 4 block (aspect 1 drawn
    in the middle of the log range); a larger minimum could not make it."""
    keep, rects = drop_block((14, 14), 16 / 196, ScriptedRng([(0.0, 0.5, 0.0, 0.0, 0.0)]))
    assert rects == [(0, 0, 4, 4)] and np.count_nonzero(~keep) == 16


def test_grid_stride_is_the_brute_force_nearest_at_every_rate() -> None:
    for grid in [(14, 14), (3, 9)]:
        for rate in np.linspace(0.0, 1.0, 81):
            assert grid_stride(grid, float(rate)) == brute_stride(grid, float(rate)), (grid, rate)


def test_apply_drop_with_nothing_dropped_keeps_every_token_and_says_so() -> None:
    ps = PatchSet(patchify(np.zeros((8, 12, 3), np.uint8), 4), grid_coords(2, 3), (2, 3), "flat")
    for how in ("remove", "mask"):
        out = apply_drop(ps, DropDecision(np.ones(6, bool), 0.0, (), "random"), how)
        assert out.num_tokens == 6 and out.meta["drop"]["kept"] == 6 and out.meta["drop"]["total"] == 6
        np.testing.assert_array_equal(out.patches, ps.patches)
