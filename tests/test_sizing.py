"""Tests for patchloom.image.sizing: budget windows, exact aspect search, native/fixed/sampled modes,
max_aspect crop and pad, and resize_to_plan.

The expected values are computed here independently of the module: the best grid by brute force
over every integer grid, the 85 % floor in exact integer arithmetic, isqrt by counting.
"""

from __future__ import annotations

import math
from collections import Counter

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from patchloom import Recipe
from patchloom.image.sizing import plan_size, resize_to_plan

PROPERTY = settings(
    max_examples=200, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow]
)


def sizing(**kw):
    """A SizingConfig through the public recipe loader (seq_len raised to fit max_tokens)."""
    seq_len = max(1024, kw.get("max_tokens", 256))
    return Recipe.from_dict({"sizing": kw, "packing": {"seq_len": seq_len}}).sizing


def exact_fill_floor(budget: int) -> int:
    """ceil(0.85 * budget) in integer arithmetic (no float rounding)."""
    return -(-85 * budget // 100)


def brute_best_error(h: float, w: float, lo: int, hi: int) -> float:
    """Smallest |log((gh/gw)/(h/w))| over every integer grid with lo <= gh*gw <= hi."""
    g = np.arange(1, hi + 1, dtype=np.int64)
    tokens = g[:, None] * g[None, :]
    gh, gw = np.nonzero((tokens >= lo) & (tokens <= hi))
    gh, gw = gh + 1, gw + 1
    err = np.abs(np.log(gh / gw) - math.log(h / w))
    return float(err.min())


def grid_error(gh: int, gw: int, h: float, w: float) -> float:
    return abs(math.log((gh / gw) / (h / w)))


def plan_is_valid(plan, h: int, w: int) -> None:
    """Shape invariants any plan must satisfy for an h x w source."""
    left, top, right, bottom = plan.crop
    assert 0 <= left < right <= w and 0 <= top < bottom <= h, plan.crop
    assert plan.grid_h >= 1 and plan.grid_w >= 1
    assert 1 <= plan.content_h and plan.pad_top >= 0 and plan.pad_top + plan.content_h <= plan.grid_h * plan.patch_size
    assert 1 <= plan.content_w and plan.pad_left >= 0 and plan.pad_left + plan.content_w <= plan.grid_w * plan.patch_size


# ----------------------------------------------------------------------------- budget mode


@st.composite
def budget_case(draw):
    t = draw(st.integers(1, 1024))
    min_tokens = draw(st.one_of(st.just(1), st.integers(1, t)))
    h = draw(st.integers(1, 5000))
    w = draw(st.integers(1, 5000))
    p = draw(st.integers(1, 64))
    return h, w, p, t, min_tokens


@PROPERTY
@given(budget_case())
def test_budget_plan_is_in_window_and_has_the_best_aspect(case):
    h, w, p, t, min_tokens = case
    plan = plan_size(h, w, sizing(mode="budget", patch_size=p, max_tokens=t, min_tokens=min_tokens))
    floor = exact_fill_floor(t)
    lo = max(min_tokens, floor)
    assert plan.grid_h * plan.grid_w <= t
    assert plan.grid_h * plan.grid_w >= min_tokens
    if min_tokens <= floor:
        assert 100 * plan.grid_h * plan.grid_w >= 85 * t
    plan_is_valid(plan, h, w)
    assert plan.crop == (0, 0, w, h)
    assert (plan.content_h, plan.content_w) == (plan.grid_h * p, plan.grid_w * p)
    best = brute_best_error(h, w, lo, t)
    mine = grid_error(plan.grid_h, plan.grid_w, h, w)
    assert mine == pytest.approx(best, abs=1e-9)
    assert plan.aspect_error == pytest.approx(mine, abs=1e-12)


@pytest.mark.parametrize("budget", [1, 2, 7, 16, 64, 100, 196, 256, 576, 729, 1024, 4096])
def test_budget_contract_fill_within_one_to_four(budget):
    """DESIGN contract: >= 85 % of max_tokens whenever the aspect is within 1:4..4:1."""
    cfg = sizing(mode="budget", patch_size=16, max_tokens=budget)
    # Sweep aspects from 1:4 to 4:1 (as integer pixel sizes) on a log scale, ends included.
    for a in np.exp(np.linspace(math.log(1 / 4), math.log(4), 161)):
        h = max(1, round(1000 * a)) if a >= 1 else 1000
        w = 1000 if a >= 1 else max(1, round(1000 / a))
        plan = plan_size(h, w, cfg)
        tokens = plan.grid_h * plan.grid_w
        assert 100 * tokens >= 85 * budget, (h, w, plan.grid_h, plan.grid_w)
        assert tokens <= budget


@pytest.mark.parametrize(
    ("h", "w", "budget", "grid"),
    [
        (512, 512, 256, (16, 16)),  # square, exact
        (300, 600, 128, (8, 16)),  # 1:2, exact
        (600, 300, 128, (16, 8)),  # 2:1, exact
        (100, 400, 100, (5, 20)),  # 1:4 at the contract's edge, exact
        (480, 640, 192, (12, 16)),  # 3:4, exact
    ],
)
def test_budget_exact_grids(h, w, budget, grid):
    """Grids worked out by hand: the aspect is hit exactly with the whole budget."""
    plan = plan_size(h, w, sizing(mode="budget", max_tokens=budget))
    assert (plan.grid_h, plan.grid_w) == grid


def test_budget_ignores_patch_size_for_the_grid():
    for p in (1, 8, 14, 16, 32):
        plan = plan_size(375, 500, sizing(mode="budget", patch_size=p, max_tokens=300))
        assert (plan.grid_h, plan.grid_w) == (15, 20)
        assert (plan.height, plan.width) == (15 * p, 20 * p)


# ----------------------------------------------------------------------------- native mode


@st.composite
def native_case(draw):
    t = draw(st.integers(1, 1024))
    min_tokens = draw(st.one_of(st.just(1), st.integers(1, t)))
    p = draw(st.sampled_from([1, 4, 8, 14, 16, 32]))
    h = draw(st.integers(1, 60 * p))
    w = draw(st.integers(1, 60 * p))
    return h, w, p, t, min_tokens


@PROPERTY
@given(native_case())
def test_native_keeps_the_native_grid_unless_the_budget_forces_it(case):
    h, w, p, t, min_tokens = case
    plan = plan_size(h, w, sizing(mode="native", patch_size=p, max_tokens=t, min_tokens=min_tokens))
    plan_is_valid(plan, h, w)
    # Nearest whole number of patches per side, at least one (ties at .5 may go either way).
    def nearest(n: int) -> set[int]:
        x = n / p
        return {max(1, math.floor(x + 0.5)), max(1, math.ceil(x - 0.5))}

    native_h, native_w = nearest(h), nearest(w)
    native_tokens = {a * b for a in native_h for b in native_w}
    tokens = plan.grid_h * plan.grid_w
    assert min_tokens <= tokens <= t
    if all(min_tokens <= n <= t for n in native_tokens):
        # Within budget and above the floor: the native size, rounded to patches, unchanged.
        assert plan.grid_h in native_h and plan.grid_w in native_w
        assert abs(plan.grid_h * p - h) <= p / 2 or plan.grid_h == 1
        assert abs(plan.grid_w * p - w) <= p / 2 or plan.grid_w == 1
    elif min(native_tokens) > t:
        # Over budget: shrunk, into the budget window.
        assert tokens < min(native_tokens)
        assert tokens >= max(min_tokens, exact_fill_floor(t))
    elif max(native_tokens) < min_tokens:
        # Under min_tokens: grown, but only as far as min_tokens needs (with the same 85 % slack).
        assert tokens > max(native_tokens)
        assert tokens <= max(min_tokens, -(-100 * min_tokens // 85))


def test_native_examples():
    cfg = sizing(mode="native", patch_size=16, max_tokens=1024)
    plan = plan_size(224, 224, cfg)
    assert (plan.grid_h, plan.grid_w) == (14, 14)
    plan = plan_size(100, 300, cfg)  # 6.25 x 18.75 patches
    assert (plan.grid_h, plan.grid_w) == (6, 19)
    small = plan_size(20, 40, cfg)  # 1.25 x 2.5 patches: no upscale to the budget
    assert small.grid_h * small.grid_w <= 3
    big = plan_size(3000, 4000, cfg)  # 187.5 x 250 patches: over budget, shrunk to ~3:4
    assert big.grid_h * big.grid_w <= 1024 and 100 * big.grid_h * big.grid_w >= 85 * 1024
    assert grid_error(big.grid_h, big.grid_w, 3000, 4000) < 0.02


def test_native_grows_tiny_images_to_min_tokens():
    cfg = sizing(mode="native", patch_size=16, max_tokens=256, min_tokens=64)
    plan = plan_size(16, 16, cfg)  # one native patch
    assert (plan.grid_h, plan.grid_w) == (8, 8)  # the smallest square with >= 64 tokens


def test_native_at_exactly_the_budget_keeps_the_native_grid():
    """"Only shrunk when over budget": a native grid of exactly max_tokens stays as it is; one token
    less of budget and it is shrunk. 100x300 at patch 16 is 6.25 x 18.75 -> 6 x 19 = 114 tokens."""
    plan = plan_size(100, 300, sizing(mode="native", patch_size=16, max_tokens=114))
    assert (plan.grid_h, plan.grid_w) == (6, 19)
    shrunk = plan_size(100, 300, sizing(mode="native", patch_size=16, max_tokens=113))
    assert shrunk.grid_h * shrunk.grid_w <= 113


def test_native_at_exactly_min_tokens_keeps_the_native_grid():
    """"Only grown when under min_tokens": 24x56 at patch 16 is 1.5 x 3.5 -> 2 x 4 = 8 tokens
    (Python rounds halves to even). At min_tokens 8 it stays 2 x 4 (re-planning would give the
    closer aspect 2 x 5); at min_tokens 9 it is grown."""
    plan = plan_size(24, 56, sizing(mode="native", patch_size=16, max_tokens=64, min_tokens=8))
    assert (plan.grid_h, plan.grid_w) == (2, 4)
    grown = plan_size(24, 56, sizing(mode="native", patch_size=16, max_tokens=64, min_tokens=9))
    assert grown.grid_h * grown.grid_w >= 9


@pytest.mark.parametrize(("h", "w"), [(100, 300), (24, 56), (70, 90), (333, 130), (16, 400), (250, 250)])
def test_native_thresholds_are_inclusive(h, w):
    """At max_tokens == native tokens and at min_tokens == native tokens the native grid is kept;
    one past either threshold and it changes. Native grid: each side / 16 rounded, at least 1."""
    gh, gw = max(1, round(h / 16)), max(1, round(w / 16))
    n = gh * gw
    for cfg in (sizing(mode="native", patch_size=16, max_tokens=n),
                sizing(mode="native", patch_size=16, max_tokens=4 * n, min_tokens=n)):
        plan = plan_size(h, w, cfg)
        assert (plan.grid_h, plan.grid_w) == (gh, gw), cfg
    if n > 1:
        over = plan_size(h, w, sizing(mode="native", patch_size=16, max_tokens=n - 1))
        assert over.grid_h * over.grid_w <= n - 1
    under = plan_size(h, w, sizing(mode="native", patch_size=16, max_tokens=4 * n, min_tokens=n + 1))
    assert under.grid_h * under.grid_w >= n + 1


# ----------------------------------------------------------------------------- fixed mode


def _isqrt_by_counting(n: int) -> int:
    s = 0
    while (s + 1) * (s + 1) <= n:
        s += 1
    return s


@pytest.mark.parametrize("budget", [1, 3, 4, 50, 196, 255, 256, 577])
@pytest.mark.parametrize(("h", "w"), [(224, 224), (100, 900), (900, 100), (1, 1), (3000, 2000)])
def test_fixed_is_a_square_grid(budget, h, w):
    plan = plan_size(h, w, sizing(mode="fixed", patch_size=16, max_tokens=budget))
    side = _isqrt_by_counting(budget)
    assert (plan.grid_h, plan.grid_w) == (side, side)
    assert (plan.content_h, plan.content_w) == (side * 16, side * 16)
    plan_is_valid(plan, h, w)


# ----------------------------------------------------------------------------- sampled mode


def _budgets(cfg, seed: int, n: int, h: int = 300, w: int = 400) -> list[int]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        plan = plan_size(h, w, cfg, rng)
        tokens = plan.grid_h * plan.grid_w
        assert tokens <= plan.budget and 100 * tokens >= 85 * plan.budget
        out.append(plan.budget)
    return out


def test_sampled_range_covers_both_ends():
    cfg = sizing(mode="sampled", max_tokens=256, sampled={"range": [100, 108]})
    got = _budgets(cfg, seed=7, n=1000)
    assert set(got) == set(range(100, 109))  # every value, both ends included
    counts = Counter(got)
    assert max(counts.values()) - min(counts.values()) < 0.08 * len(got)  # roughly uniform


def test_sampled_choices_follow_weights():
    cfg = sizing(mode="sampled", max_tokens=256, sampled={"choices": [64, 144, 256], "weights": [1, 2, 1]})
    got = _budgets(cfg, seed=11, n=2000)
    assert set(got) <= {64, 144, 256}
    share = {c: got.count(c) / len(got) for c in (64, 144, 256)}
    assert share[64] == pytest.approx(0.25, abs=0.04)
    assert share[144] == pytest.approx(0.50, abs=0.04)
    assert share[256] == pytest.approx(0.25, abs=0.04)


def test_sampled_zero_weight_never_drawn_and_unweighted_is_uniform():
    cfg = sizing(mode="sampled", max_tokens=256, sampled={"choices": [64, 256], "weights": [0, 1]})
    assert set(_budgets(cfg, seed=3, n=300)) == {256}
    cfg = sizing(mode="sampled", max_tokens=256, sampled={"choices": [64, 100, 256]})
    got = _budgets(cfg, seed=5, n=1500)
    for c in (64, 100, 256):
        assert got.count(c) / len(got) == pytest.approx(1 / 3, abs=0.05)


def test_sampled_is_deterministic_per_seed():
    cfg = sizing(mode="sampled", max_tokens=512, sampled={"range": [32, 512]})
    assert _budgets(cfg, seed=42, n=50) == _budgets(cfg, seed=42, n=50)
    assert _budgets(cfg, seed=42, n=50) != _budgets(cfg, seed=43, n=50)


def test_sampled_without_generator_raises():
    cfg = sizing(mode="sampled", max_tokens=256, sampled={"range": [64, 256]})
    with pytest.raises(ValueError, match="generator"):
        plan_size(100, 100, cfg)


# ----------------------------------------------------------------------------- max_aspect


EXTREMES = [(6, 4000), (4000, 6), (2, 3), (3, 2)]  # (height, width): strips and thumbnails


def _solid(h: int, w: int, colour=(200, 30, 60)) -> Image.Image:
    return Image.new("RGB", (w, h), colour)


@pytest.mark.parametrize("rule", ["crop", "pad"])
@pytest.mark.parametrize("limit", [1.0, 1.2, 2.0, 4.0])
@pytest.mark.parametrize(("h", "w"), EXTREMES)
def test_max_aspect_extremes_come_out_valid(h, w, limit, rule):
    p, budget = 16, 256
    cfg = sizing(mode="budget", patch_size=p, max_tokens=budget, max_aspect=limit, aspect_rule=rule)
    plan = plan_size(h, w, cfg)
    plan_is_valid(plan, h, w)
    tokens = plan.grid_h * plan.grid_w
    assert tokens <= budget and 100 * tokens >= 85 * budget
    out = resize_to_plan(_solid(h, w), plan, resample="bicubic", background=(255, 255, 255))
    assert out.size == (plan.grid_w * p, plan.grid_h * p)
    assert out.mode == "RGB"
    left, top, right, bottom = plan.crop
    ch, cw = bottom - top, right - left
    if max(h / w, w / h) <= limit:
        # Already within the limit: neither rule changes anything.
        assert plan.crop == (0, 0, w, h)
        assert (plan.content_h, plan.content_w) == (plan.grid_h * p, plan.grid_w * p)
    elif rule == "crop":
        # Cropped to at most the limit.
        assert max(ch / cw, cw / ch) <= limit + 1e-9
        assert (plan.content_h, plan.content_w) == (plan.grid_h * p, plan.grid_w * p)
        assert (np.asarray(out) == [200, 30, 60]).all()
    else:
        # The whole image is kept, fitted inside the canvas; the rest is background.
        assert plan.crop == (0, 0, w, h)
        arr = np.asarray(out)
        inside = np.zeros(arr.shape[:2], bool)
        inside[plan.pad_top : plan.pad_top + plan.content_h, plan.pad_left : plan.pad_left + plan.content_w] = True
        assert (arr[inside] == [200, 30, 60]).all()
        assert (arr[~inside] == [255, 255, 255]).all()
        # The content is the source scaled by one factor (the largest that fits), to within a pixel.
        s = min(plan.grid_h * p / h, plan.grid_w * p / w)
        assert abs(plan.content_h - h * s) <= 1 and abs(plan.content_w - w * s) <= 1
        # And it touches the canvas on at least one axis (fitted, not shrunk further).
        assert plan.content_h == plan.grid_h * p or plan.content_w == plan.grid_w * p


@pytest.mark.parametrize(("h", "w"), [(6, 4000), (4000, 6)])
def test_max_aspect_crop_is_centred_and_exact(h, w):
    cfg = sizing(mode="budget", patch_size=16, max_tokens=256, max_aspect=4.0, aspect_rule="crop")
    plan = plan_size(h, w, cfg)
    if w > h:
        assert plan.crop == (1988, 0, 2012, 6)  # 24 x 6 in the middle of 4000
        assert (plan.grid_h, plan.grid_w) == (8, 32)
    else:
        assert plan.crop == (0, 1988, 6, 2012)
        assert (plan.grid_h, plan.grid_w) == (32, 8)


@pytest.mark.parametrize("limit", [1.1, 1.5, 2.5, 3.3, 3.7])
@pytest.mark.parametrize(("h", "w"), [(6, 4000), (4000, 6), (7, 19), (3, 2)])
def test_max_aspect_crop_never_exceeds_a_fractional_limit(h, w, limit):
    """Rounding the kept length up would overshoot (6 px tall, limit 3.3: 20 px is 3.33:1)."""
    cfg = sizing(mode="budget", patch_size=16, max_tokens=256, max_aspect=limit, aspect_rule="crop")
    plan = plan_size(h, w, cfg)
    left, top, right, bottom = plan.crop
    ch, cw = bottom - top, right - left
    if max(h / w, w / h) > limit:
        assert max(ch / cw, cw / ch) <= limit
        assert max(ch, cw) + 1 > min(ch, cw) * limit  # and keeps as much as the limit allows
    else:
        assert plan.crop == (0, 0, w, h)


@PROPERTY
@given(
    h=st.integers(1, 4000),
    w=st.integers(1, 4000),
    limit=st.one_of(st.sampled_from([1.0, 2.0, 3.0, 4.0, 8.0]), st.floats(1.0, 10.0)),
    rule=st.sampled_from(["crop", "pad"]),
    t=st.integers(1, 1024),
)
def test_max_aspect_property(h, w, limit, rule, t):
    """Crop keeps the region within the limit, pad keeps every pixel."""
    cfg = sizing(mode="budget", patch_size=8, max_tokens=t, max_aspect=limit, aspect_rule=rule)
    plan = plan_size(h, w, cfg)
    plan_is_valid(plan, h, w)
    tokens = plan.grid_h * plan.grid_w
    assert tokens <= t and 100 * tokens >= 85 * t
    left, top, right, bottom = plan.crop
    ch, cw = bottom - top, right - left
    if rule == "pad" or max(h / w, w / h) <= limit:
        assert plan.crop == (0, 0, w, h)
    else:
        assert max(ch / cw, cw / ch) <= limit + 1e-9
        assert min(ch, cw) == min(h, w)  # only the long side is cut


# ----------------------------------------------------------------------------- resize_to_plan


def _gradient(h: int, w: int) -> Image.Image:
    """Smooth, position-coding picture: red follows x, green follows y, blue is their mix."""
    y, x = np.mgrid[0:h, 0:w]
    arr = np.stack([255 * x / (w - 1), 255 * y / (h - 1), 127 * (x / (w - 1) + y / (h - 1))], axis=-1)
    return Image.fromarray(arr.round().astype(np.uint8))


@pytest.mark.parametrize("reduce", [2, 4, 8])
@pytest.mark.parametrize(
    ("h", "w", "extra"),
    [
        (900, 1200, {}),
        (300, 2400, {"max_aspect": 2.0, "aspect_rule": "crop"}),
        (2400, 300, {"max_aspect": 2.0, "aspect_rule": "pad"}),
    ],
)
def test_resize_to_plan_from_a_reduced_decode(h, w, extra, reduce):
    """A smaller image of the same picture (as a JPEG draft gives) lands on the plan's size and
    nearly the same pixels as the full one, including a crop box scaled to the smaller image."""
    cfg = sizing(mode="budget", patch_size=16, max_tokens=256, **extra)
    plan = plan_size(h, w, cfg)
    full = _gradient(h, w)
    small = full.reduce(reduce)
    assert small.size == (-(-w // reduce), -(-h // reduce))
    a = resize_to_plan(full, plan, resample="bilinear")
    b = resize_to_plan(small, plan, resample="bilinear")
    assert a.size == b.size == (plan.grid_w * 16, plan.grid_h * 16)
    diff = np.abs(np.asarray(a, np.int16) - np.asarray(b, np.int16))
    assert diff.mean() < 2.0 and diff.max() < 40


def test_resize_to_plan_refuses_another_picture():
    cfg = sizing(mode="budget", patch_size=16, max_tokens=256)
    plan = plan_size(900, 1200, cfg)
    with pytest.raises(ValueError, match="plan"):
        resize_to_plan(_gradient(1200, 900), plan)


def test_plan_size_rejects_empty_images():
    with pytest.raises(ValueError, match=r"image has no pixels \(10x0\)"):
        plan_size(0, 10, sizing())
    with pytest.raises(ValueError, match=r"image has no pixels \(0x10\)"):
        plan_size(10, 0, sizing())
    plan = plan_size(1, 1, sizing(patch_size=16, max_tokens=4))  # one pixel is an image
    assert plan.crop == (0, 0, 1, 1) and plan.tokens >= 1


def test_plan_size_of_a_region_plans_the_region():
    """region (left, top, right, bottom): the plan's crop is the region and its grid follows the
    region's aspect (here 100 x 50 pixels, 2:1 wide), not the whole image's (3:4 tall)."""
    cfg = sizing(patch_size=16, max_tokens=32, mode="budget")
    plan = plan_size(400, 300, cfg, region=(10, 20, 110, 70))
    assert plan.crop == (10, 20, 110, 70) and plan.source == (400, 300)
    assert (plan.grid_h, plan.grid_w) == (4, 8)  # the 2:1 grid in [28, 32] tokens (brute force: only 4 x 8)
    assert plan.scale == max(64 / 50, 128 / 100) and plan.aspect_error == 0.0  # 4x8 patches of 16 px
    flat = plan_size(400, 300, cfg, region=(10, 20, 110, 65))  # 100 x 45: still 4 x 8, taller than the region
    assert (flat.grid_h, flat.grid_w) == (4, 8) and flat.scale == 64 / 45
    assert abs(flat.aspect_error - abs(math.log((4 / 8) / (45 / 100)))) < 1e-12
    assert flat.to_dict() == {"grid": [4, 8], "tokens": 32, "crop": [10, 20, 110, 65], "content": [64, 128],
                              "pad": [0, 0], "aspect_error": 0.105361, "scale": 1.422222, "budget": 32}
    with pytest.raises(ValueError, match="not inside"):
        plan_size(400, 300, cfg, region=(10, 20, 310, 70))
    with pytest.raises(ValueError, match="not inside"):
        plan_size(400, 300, cfg, region=(10, 20, 10, 70))
    for region in ((-1, 20, 110, 70), (10, -1, 110, 70), (10, 20, 110, 401)):
        with pytest.raises(ValueError, match="not inside"):
            plan_size(400, 300, cfg, region=region)
    assert plan_size(400, 300, cfg, region=(0, 0, 300, 400)).crop == (0, 0, 300, 400)  # the whole image is a region


def test_resize_to_plan_takes_a_plan_made_by_hand():
    """A SizePlan built without `source` is applied to the image it is given (the crop in its pixels)."""
    from patchloom.image.sizing import SizePlan

    rng = np.random.default_rng(0)
    img = Image.fromarray(rng.integers(0, 256, (40, 60, 3), dtype=np.uint8))
    plan = SizePlan(grid_h=1, grid_w=2, patch_size=8, crop=(0, 0, 60, 40), content_h=8, content_w=16)
    assert plan.source == (0, 0)
    out = resize_to_plan(img, plan, resample="bilinear")
    assert out.size == (16, 8) and plan.budget == 0  # made by hand: no budget recorded
    np.testing.assert_array_equal(np.asarray(out), np.asarray(img.resize((16, 8), Image.Resampling.BILINEAR)))
    cropped = SizePlan(grid_h=1, grid_w=2, patch_size=8, crop=(10, 5, 50, 25), content_h=8, content_w=16)
    np.testing.assert_array_equal(np.asarray(resize_to_plan(img, cropped, resample="bilinear")), np.asarray(
        img.resize((16, 8), Image.Resampling.BILINEAR, box=(10, 5, 50, 25))))  # the crop is Pillow's box


def test_draw_crop_keeps_a_share_of_the_area_with_the_image_aspect_jittered():
    """crop.area and crop.aspect_jitter (README): each box lies inside the image, keeps a share of the
    area within `area` and has the image's w/h times a factor within `aspect_jitter` (both up to
    rounding to whole pixels); mode none, or a draw that cannot fit, keeps the whole image."""
    from patchloom.image.sizing import draw_crop
    from patchloom.recipe.schema import CropConfig

    cfg = CropConfig(mode="random", area=(0.3, 0.6), aspect_jitter=(0.8, 1.25))
    rng = np.random.default_rng(1)
    h, w = 300, 400
    lefts, tops = set(), set()
    for _ in range(500):
        left, top, right, bottom = draw_crop(h, w, cfg, rng)
        assert 0 <= left < right <= w and 0 <= top < bottom <= h
        cw, ch = right - left, bottom - top
        share = cw * ch / (h * w)
        assert 0.3 - 0.01 <= share <= 0.6 + 0.01, share
        factor = (cw / ch) / (w / h)
        assert 0.8 - 0.01 <= factor <= 1.25 + 0.01, factor
        lefts.add(left)
        tops.add(top)
    assert min(lefts) == 0 or len(lefts) > 50  # positions spread over the free room
    assert len(tops) > 50
    shares = [(b[2] - b[0]) * (b[3] - b[1]) / (h * w) for b in (draw_crop(h, w, cfg, rng) for _ in range(300))]
    assert min(shares) < 0.35 and max(shares) > 0.55  # the whole area range is drawn, not one end
    factors = [((b[2] - b[0]) / (b[3] - b[1])) / (w / h) for b in (draw_crop(h, w, cfg, rng) for _ in range(300))]
    assert min(factors) < 0.85 and max(factors) > 1.18  # and the whole jitter range
    thin = CropConfig(mode="random", area=(0.5, 0.5), aspect_jitter=(1.0, 1.0))
    left, top, right, bottom = draw_crop(100, 1, thin, rng)  # a 1-pixel-wide box is a box
    assert (left, right, bottom - top) == (0, 1, 71)  # sqrt(0.5 * 100 / 0.01) = 70.7 rows
    left, top, right, bottom = draw_crop(1, 100, thin, rng)  # and a 1-pixel-high one
    assert (top, bottom, right - left) == (0, 1, 71)
    assert draw_crop(h, w, CropConfig(mode="none"), rng) == (0, 0, w, h)
    # A 1-pixel-high image cannot give a box of half its area with a jittered aspect: whole image.
    tall = CropConfig(mode="random", area=(0.5, 0.5), aspect_jitter=(2.0, 2.0))
    assert draw_crop(1, 1, tall, rng) == (0, 0, 1, 1)
    exact = CropConfig(mode="random", area=(1.0, 1.0), aspect_jitter=(1.0, 1.0))
    assert draw_crop(h, w, exact, rng) == (0, 0, w, h)  # a box of the whole image fits exactly
    # Boxes as high (or as wide) as the image fit too: 3/4 of the area at 3/4 (4/3) of its aspect is
    # 300 x 300 (400 x 225) on this 400 x 300 image.
    left, top, right, bottom = draw_crop(h, w, CropConfig(mode="random", area=(0.75, 0.75), aspect_jitter=(0.75, 0.75)), rng)
    assert (top, bottom, right - left) == (0, 300, 300)
    left, top, right, bottom = draw_crop(h, w, CropConfig(mode="random", area=(0.75, 0.75), aspect_jitter=(4 / 3, 4 / 3)), rng)
    assert (left, right, bottom - top) == (0, 400, 225)


# --- the SIZING_MODES and RESAMPLE_FILTERS tables --------------------------------------------


def _mode_config(name: str):
    extra = {"sampled": {"range": [16, 64]}} if name == "sampled" else {}
    return sizing(mode=name, patch_size=8, max_tokens=64, min_tokens=4, **extra)


def test_every_sizing_mode_in_the_table_is_reached_through_plan_size():
    from patchloom.image.sizing import SIZING_MODES

    grids = {}
    for name, grid_of in SIZING_MODES.items():
        cfg = _mode_config(name)
        plan = plan_size(40, 56, cfg, np.random.default_rng(1))  # 5x7 patches natively
        assert (plan.grid_h, plan.grid_w) == grid_of(40.0, 56.0, plan.budget, cfg), name
        grids[name] = (plan.grid_h, plan.grid_w)
    assert grids["native"] == (5, 7) and grids["fixed"] == (8, 8) and grids["budget"][0] * grids["budget"][1] > 35


def test_a_sizing_mode_added_to_the_table_is_dispatched(monkeypatch):
    from patchloom.image.sizing import SIZING_MODES

    monkeypatch.setitem(SIZING_MODES, "one_row", lambda h, w, budget, cfg: (1, budget))
    cfg = _mode_config("budget").model_copy(update={"mode": "one_row"})
    plan = plan_size(40, 56, cfg)
    assert (plan.grid_h, plan.grid_w) == (1, 64)


def test_unknown_sizing_mode_names_the_recipe_key_and_the_known_modes():
    cfg = _mode_config("budget").model_copy(update={"mode": "tiles"})
    with pytest.raises(ValueError, match=r"unknown sizing mode 'tiles'.*sizing\.mode.*budget, native, fixed"):
        plan_size(40, 56, cfg)


def test_every_resample_filter_in_the_table_is_reached_through_resize_to_plan():
    from patchloom.image.sizing import RESAMPLE_FILTERS

    img = Image.fromarray(np.random.default_rng(2).integers(0, 256, (57, 83, 3), dtype=np.uint8))
    plan = plan_size(57, 83, sizing(mode="budget", patch_size=8, max_tokens=30))
    outs = set()
    for name, filt in RESAMPLE_FILTERS.items():
        out = resize_to_plan(img, plan, resample=name)
        size = (plan.width, plan.height)
        want = img.resize(size, filt) if isinstance(filt, Image.Resampling) else filt(np.asarray(img), size,
                                                                                        (0, 0, 83, 57))
        np.testing.assert_array_equal(np.asarray(out), np.asarray(want))
        outs.add(out.tobytes())
    assert len(outs) == len(RESAMPLE_FILTERS)  # each name really picks its own filter
    with pytest.raises(ValueError, match=r"unknown resample filter 'cubic'.*sizing\.resample.*bicubic"):
        resize_to_plan(img, plan, resample="cubic")


def test_best_grid_needs_a_window_of_at_least_one_token():
    from patchloom.image.sizing import best_grid

    for lo, hi in ((0, 5), (6, 5), (-1, 3)):
        with pytest.raises(ValueError, match="1 <= lo <= hi"):
            best_grid(1.0, lo, hi)
    assert best_grid(1.0, 1, 1) == (1, 1) and best_grid(2.0, 2, 2) == (2, 1)


def test_max_aspect_pad_of_a_mildly_tall_image_is_a_centred_tall_canvas():
    """aspect_rule pad: an image 1.8 times taller than wide, over max_aspect 1.5, is planned on a grid
    of the limit aspect (tall, not wide) and placed in its middle on the background."""
    cfg = sizing(patch_size=16, max_tokens=96, mode="budget", max_aspect=1.5, aspect_rule="pad")
    plan = plan_size(180, 100, cfg)
    assert plan.grid_h > plan.grid_w and abs(plan.grid_h / plan.grid_w - 1.5) < 0.25
    canvas_h, canvas_w = plan.grid_h * 16, plan.grid_w * 16
    assert plan.content_h == canvas_h or plan.content_w == canvas_w  # touches two sides
    assert (plan.pad_top, plan.pad_left) == ((canvas_h - plan.content_h) // 2, (canvas_w - plan.content_w) // 2)
    wide = plan_size(100, 180, cfg)
    assert (wide.grid_h, wide.grid_w) == (plan.grid_w, plan.grid_h)  # the same, turned


def test_resize_to_plan_pads_with_white_and_gives_an_array_for_an_array():
    """The default background is white (255, 255, 255); an HxWx3 array in gives the same pixels as
    an array, PIL image in gives a PIL image."""
    cfg = sizing(patch_size=8, max_tokens=16, mode="budget", max_aspect=1.5, aspect_rule="pad")
    rng = np.random.default_rng(3)
    arr = rng.integers(0, 256, (20, 60, 3), dtype=np.uint8)  # 3:1 wide, over the limit: padded
    plan = plan_size(20, 60, cfg)
    assert plan.pad_top > 0 or plan.pad_left > 0
    from patchloom.image.sizing import reset_resize_path_counts, resize_path_counts

    reset_resize_path_counts()
    pil = resize_to_plan(Image.fromarray(arr), plan, resample="bilinear")
    out = resize_to_plan(arr, plan, resample="bilinear")
    assert resize_path_counts() == {"bilinear": 2}
    assert isinstance(out, np.ndarray) and out.dtype == np.uint8 and out.shape == (plan.height, plan.width, 3)
    np.testing.assert_array_equal(out, np.asarray(pil))
    top, left = plan.pad_top, plan.pad_left
    assert (out[:top] == 255).all() and (out[top + plan.content_h:] == 255).all()
    assert (out[:, :left] == 255).all() and (out[:, left + plan.content_w:] == 255).all()
    inside = out[top:top + plan.content_h, left:left + plan.content_w]
    np.testing.assert_array_equal(inside, np.asarray(Image.fromarray(arr).resize(
        (plan.content_w, plan.content_h), Image.Resampling.BILINEAR)))


def test_area_resize_is_the_block_mean_at_whole_factors_and_averages_at_fractional_ones():
    """sizing.resample area: "each output pixel averages the source area it covers". At a whole
    shrink factor that is the plain block mean (numpy, rounded); at 1.5 the result must be closer to
    an exact area average (Pillow's box filter, which weighs partly covered pixels) than a cubic
    interpolation that does not average (OpenCV's INTER_CUBIC straight to the output size), and
    OpenCV runs on one thread."""
    cv2 = pytest.importorskip("cv2")
    from patchloom.image.sizing import resize_area

    rng = np.random.default_rng(7)
    arr = rng.integers(0, 256, (64, 96, 3), dtype=np.uint8)
    got = resize_area(arr, (24, 16), (0, 0, 96, 64))  # 4 x 4 blocks
    means = arr.reshape(16, 4, 24, 4, 3).astype(np.float64).mean(axis=(1, 3))
    assert got.shape == (16, 24, 3) and got.dtype == np.uint8
    assert np.abs(got.astype(np.float64) - means).max() <= 0.5 + 1e-9  # the mean, rounded
    assert cv2.getNumThreads() == 1

    def err(x: np.ndarray, ref: np.ndarray) -> float:
        return float(np.mean((x.astype(np.float64) - ref.astype(np.float64)) ** 2))

    box = np.asarray(Image.fromarray(arr).resize((64, 43), Image.Resampling.BOX))  # 96 / 64 = 1.5
    area = resize_area(arr, (64, 43), (0, 0, 96, 64))
    cubic = cv2.resize(arr, (64, 43), interpolation=cv2.INTER_CUBIC)
    assert err(area, box) < err(cubic, box)
    shifted = resize_area(arr, (64, 43), (0.5, 0.5, 96.0, 64.0))  # a fractional box: the affine path
    box_shifted = np.asarray(Image.fromarray(arr).resize((64, 43), Image.Resampling.BOX, box=(0.5, 0.5, 96.0, 64.0)))
    assert err(shifted, box_shifted) < err(shifted, box) and err(shifted, box_shifted) < err(cubic, box)


def test_a_missing_opencv_is_one_error_naming_the_package_not_a_skip_per_sample(tmp_path, monkeypatch):
    """OpenCV is a dependency of patchloom; if it is gone the area resize cannot run at all, so the
    first sample raises (MissingExtraError, one line naming the distribution) instead of being skipped."""
    import sys

    from conftest import make_shards

    from patchloom import Pipeline, Recipe
    from patchloom.extras import MissingExtraError
    from patchloom.image import sizing

    shards = make_shards(tmp_path, 1, 4)
    monkeypatch.setitem(sys.modules, "cv2", None)
    monkeypatch.setattr(sizing, "_cv2_pid", -1)  # as in a fresh process
    recipe = Recipe.from_dict({"source": {"shards": shards, "max_skip_ratio": None},
                               "sizing": {"patch_size": 8, "max_tokens": 16, "resample": "area"},
                               "packing": {"seq_len": 64, "rows": 1}})
    with pytest.raises(MissingExtraError) as info:
        list(Pipeline(recipe))
    assert "opencv-python-headless" in str(info.value) and "\n" not in str(info.value)
