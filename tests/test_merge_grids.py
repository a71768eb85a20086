"""Grids ready for patch merging: sizing.grid_multiple m in every sizing mode, output.token_order
windows, and token dropping in whole m x m windows in every drop mode.

Expected values are worked out here independently: best window grids by brute force, window
membership from each token's own (row, col), window order by plain loops.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from patchloom import Recipe, image_to_patches
from patchloom.image.chain import sample_cap
from patchloom.image.dropping import DROP_MODES, decide_drop, drop_count
from patchloom.image.patches import window_order
from patchloom.image.sizing import plan_size
from patchloom.recipe import RecipeError
from patchloom.recipe.schema import fingerprint_form

PROPERTY = settings(max_examples=150, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
MODES = ["budget", "native", "fixed", "sampled"]


def brute_best_error(h: float, w: float, lo: int, hi: int) -> float:
    """Smallest |log((a/b)/(h/w))| over every integer a x b with lo <= a*b <= hi."""
    g = np.arange(1, hi + 1, dtype=np.int64)
    n = g[:, None] * g[None, :]
    a, b = np.nonzero((n >= lo) & (n <= hi))
    return float(np.abs(np.log((a + 1) / (b + 1)) - math.log(h / w)).min())


@st.composite
def case(draw):
    m = draw(st.sampled_from([2, 3]))
    mode = draw(st.sampled_from(MODES))
    t = draw(st.integers(m * m, 900))
    windows = t // (m * m)
    largest = (m * math.isqrt(windows)) ** 2 if mode == "fixed" else windows * m * m
    min_tokens = draw(st.one_of(st.just(1), st.integers(1, largest)))
    p = draw(st.sampled_from([1, 4, 8, 14, 16]))
    h, w = draw(st.integers(1, 3000)), draw(st.integers(1, 3000))
    sizing = {"mode": mode, "patch_size": p, "max_tokens": t, "min_tokens": min_tokens, "grid_multiple": m}
    if mode == "sampled":
        lo = draw(st.integers(m * m, t))
        sizing["sampled"] = {"range": [lo, draw(st.integers(lo, t))]}
    return h, w, m, sizing


@PROPERTY
@given(case())
def test_grids_are_multiples_and_the_budget_rules_hold_in_windows(c):
    h, w, m, sizing = c
    cfg = Recipe.from_dict({"sizing": sizing, "packing": {"seq_len": 1024}}).sizing
    plan = plan_size(h, w, cfg, np.random.default_rng(h * 7919 + w))
    gh, gw = plan.grid_h, plan.grid_w
    assert gh % m == 0 and gw % m == 0 and gh >= m and gw >= m
    tokens, budget = gh * gw, plan.budget
    assert tokens <= budget
    B = budget // (m * m)  # the budget in windows
    min_w = -(-cfg.min_tokens // (m * m))
    wh, ww = gh // m, gw // m
    if cfg.mode == "fixed":
        assert (wh, ww) == (math.isqrt(B), math.isqrt(B))
        return
    assert tokens >= min(cfg.min_tokens, B * m * m)
    lo = min(max(min_w, -(-85 * B // 100)), B)
    if cfg.mode in ("budget", "sampled"):
        assert lo <= wh * ww <= B
        if min_w <= -(-85 * B // 100):
            assert 100 * wh * ww >= 85 * B  # >= 85 % of the budget, counted in windows
        assert abs(math.log((wh / ww) / (h / w))) == pytest.approx(brute_best_error(h, w, lo, B), abs=1e-9)
    else:  # native: the native size rounded to whole windows, unless the budget or min_tokens moves it
        side = cfg.patch_size * m
        near_h = {max(1, math.floor(h / side + 0.5)), max(1, math.ceil(h / side - 0.5))}
        near_w = {max(1, math.floor(w / side + 0.5)), max(1, math.ceil(w / side - 0.5))}
        counts = {a * b for a in near_h for b in near_w}
        if all(min_w <= n <= B for n in counts):
            assert wh in near_h and ww in near_w
        elif min(counts) > B:
            assert lo <= wh * ww <= B


@pytest.mark.parametrize("m", [2, 3])
@pytest.mark.parametrize("mode", MODES)
def test_every_mode_gives_multiples_for_extreme_shapes(m, mode):
    sizing = {"mode": mode, "patch_size": 8, "max_tokens": 256, "grid_multiple": m, "max_aspect": None}
    if mode == "sampled":
        sizing["sampled"] = {"choices": [m * m, 100, 256]}
    cfg = Recipe.from_dict({"sizing": sizing}).sizing
    rng = np.random.default_rng(0)
    for h, w in [(1, 1), (3, 2), (5000, 40), (40, 5000), (224, 224), (17, 999), (480, 640)]:
        for _ in range(3):
            plan = plan_size(h, w, cfg, rng)
            assert plan.grid_h % m == 0 and plan.grid_w % m == 0 and plan.tokens <= plan.budget, (h, w, plan)


@pytest.mark.parametrize("m", [2, 3])
@pytest.mark.parametrize("budget", [64, 100, 256, 576])
def test_the_85_percent_rule_in_windows_on_real_photos(m, budget):
    """scikit-image's bundled photos and crops of them from 1:4 to 4:1, through image_to_patches."""
    skdata = pytest.importorskip("skimage.data")
    recipe = Recipe.from_dict({"sizing": {"patch_size": 16, "max_tokens": budget, "grid_multiple": m}})
    windows = budget // (m * m)
    for name in ("astronaut", "coffee", "chelsea", "rocket", "hubble_deep_field", "coins"):
        photo = getattr(skdata, name)()
        photo = np.repeat(photo[:, :, None], 3, axis=2) if photo.ndim == 2 else photo[:, :, :3]
        h, w = photo.shape[:2]
        crops = [photo, photo[: max(1, w // 4)], photo[:, : max(1, h // 4)], photo[: h // 2], photo[:, : w // 3]]
        for img in crops:
            ps = image_to_patches(np.ascontiguousarray(img), recipe, key=name)
            gh, gw = ps.grid
            assert gh % m == 0 and gw % m == 0 and gh * gw <= budget
            aspect = img.shape[0] / img.shape[1]
            if 1 / 4 <= aspect <= 4:
                assert 100 * (gh // m) * (gw // m) >= 85 * windows, (name, img.shape, ps.grid)


def test_the_multi_image_cap_counts_whole_windows():
    r = Recipe.from_dict({"sizing": {"max_tokens": 64, "min_tokens": 8, "grid_multiple": 3},
                          "packing": {"seq_len": 64, "max_images_per_row": 8}})
    assert sample_cap(r, 1) is None and sample_cap(r, 4) == 16  # 16 tokens hold one 3x3 window
    with pytest.raises(ValueError, match=r"seq_len // 8\) = 8 tokens, under the 9 it needs in whole 3x3 windows"):
        sample_cap(r, 8)  # 8 tokens each: no 3x3 window fits


# ----------------------------------------------------------------------------- window order


def expected_window_coords(gh: int, gw: int, m: int) -> list[tuple[int, int]]:
    out = []
    for wr in range(gh // m):
        for wc in range(gw // m):
            for i in range(m):
                for j in range(m):
                    out.append((wr * m + i, wc * m + j))
    return out


@pytest.mark.parametrize("m", [2, 3])
def test_windows_order_puts_each_window_together_and_coords_name_each_token(m):
    rng = np.random.default_rng(m)
    img = rng.integers(0, 256, (90, 130, 3), dtype=np.uint8)
    base = {"sizing": {"patch_size": 5, "max_tokens": 300, "grid_multiple": m}, "packing": {"seq_len": 36 * 32}}
    raster = image_to_patches(img, Recipe.from_dict(base), key="x")
    windows = image_to_patches(img, Recipe.from_dict({**base, "output": {"token_order": "windows"}}), key="x")
    gh, gw = windows.grid
    assert windows.grid == raster.grid
    assert [tuple(c) for c in windows.coords.tolist()] == expected_window_coords(gh, gw, m)
    # every token is the raster token at its own coords
    flat = windows.coords[:, 0] * gw + windows.coords[:, 1]
    assert np.array_equal(windows.patches, raster.patches[flat])
    assert window_order(4, 6, 2).tolist() == [0, 1, 6, 7, 2, 3, 8, 9, 4, 5, 10, 11, 12, 13, 18, 19, 14, 15, 20, 21,
                                              16, 17, 22, 23]


@pytest.mark.parametrize("m", [2, 3])
def test_packed_rows_split_into_whole_windows(m, tmp_path):
    from conftest import make_shards

    from patchloom import Pipeline

    shards = make_shards(tmp_path, 2, 10, sizes=(8, 120))
    recipe = Recipe.from_dict({
        "source": {"shards": shards, "shuffle_buffer": 4},
        "sizing": {"patch_size": 8, "max_tokens": 9 * m * m, "grid_multiple": m, "mode": "native"},
        "drop": {"mode": "block", "rate": 0.3, "block": {"min_area": 4}},
        "packing": {"seq_len": 40 * m * m, "rows": 2, "max_images_per_row": 8},
        "output": {"token_order": "windows"}})
    for batch in Pipeline(recipe):
        per = m * m
        seg = batch.segment_ids.reshape(batch.rows, -1, per)
        assert (seg == seg[:, :, :1]).all()  # no window straddles two images or padding
        win = (batch.coords // m).reshape(batch.rows, -1, per, 2)
        assert (win == win[:, :, :1]).all()  # each group of m*m tokens is one window of its image
        inside = (batch.coords % m).reshape(batch.rows, -1, per, 2)[seg[:, :, 0] > 0]
        assert (inside == np.array([(i, j) for i in range(m) for j in range(m)])).all()  # raster inside


# ----------------------------------------------------------------------------- dropping in windows


def window_counts(coords: np.ndarray, grid: tuple[int, int], m: int) -> np.ndarray:
    """Tokens present in each m x m window, from each token's own (row, col)."""
    gh, gw = grid
    ids = (coords[:, 0] // m) * (gw // m) + coords[:, 1] // m
    return np.bincount(ids, minlength=(gh // m) * (gw // m))


DROPS = {
    "random": {"rate": 0.5},
    "block": {"rate": 0.4, "block": {"min_area": 16}},
    "grid": {"rate": 0.7},
    "stripes": {"rate": 0.35},
    "content": {"rate": 0.5},
    "tube": {"rate": 0.5},
}


def test_every_drop_mode_is_tested_here():
    assert set(DROPS) == set(DROP_MODES) - {"none"}


@pytest.mark.parametrize("order", ["raster", "windows"])
@pytest.mark.parametrize("m", [2, 3])
@pytest.mark.parametrize("mode", sorted(DROPS))
def test_every_drop_mode_drops_whole_windows(mode, m, order):
    rng = np.random.default_rng(11)
    img = rng.integers(0, 256, (120, 150, 3), dtype=np.uint8)
    img[:40] = 128  # a flat band, so content mode has something to prefer
    drop = {"mode": mode, **DROPS[mode]}
    sizing = {"patch_size": 5, "max_tokens": 400, "grid_multiple": m}
    remove = Recipe.from_dict({"sizing": sizing, "drop": drop, "output": {"token_order": order},
                               "packing": {"seq_len": 36 * 32}})
    mask = remove.replace(drop={"output": "mask"})
    dropped_some = False
    for seed in range(6):
        ps = image_to_patches(img, remove, seed=seed, key="k")
        counts = window_counts(ps.coords, ps.grid, m)
        assert set(np.unique(counts).tolist()) <= {0, m * m}, "a window was cut"
        dropped_some |= bool((counts == 0).any())
        if order == "windows":  # kept tokens still come in whole windows, in window order
            groups = ps.coords.reshape(-1, m * m, 2)
            assert all(len({(r // m, c // m) for r, c in g.tolist()}) == 1 for g in groups)
        masked = image_to_patches(img, mask, seed=seed, key="k")
        assert masked.num_tokens == ps.grid[0] * ps.grid[1]
        hidden = window_counts(masked.coords[masked.masked], ps.grid, m)
        assert set(np.unique(hidden).tolist()) <= {0, m * m}, "a window was partly masked"
        assert np.array_equal(hidden == 0, counts == m * m)  # mask hides exactly what remove drops
    assert dropped_some


@pytest.mark.parametrize("m", [2, 3])
def test_the_realised_rate_is_counted_in_windows(m):
    cfg = Recipe.from_dict({"drop": {"mode": "random", "rate": 0.3, "min_keep": 1}}).drop
    grid = (6 * m, 5 * m)  # 30 windows
    for seed in range(5):
        d = decide_drop(cfg, grid, None, np.random.default_rng(seed), window=m)
        counts = d.keep.reshape(6, m, 5, m).sum(axis=(1, 3))
        assert set(np.unique(counts).tolist()) <= {0, m * m}
        assert int((counts == 0).sum()) == drop_count(0.3, 30)  # 9 windows, not round(0.3 * tokens)
    block = Recipe.from_dict({"drop": {"mode": "block", "rate": 0.5, "block": {"min_area": 4 * m * m}}}).drop
    d = decide_drop(block, grid, None, np.random.default_rng(1), window=m)
    union = np.ones(grid, bool)
    for top, left, h, w in d.blocks:
        assert top % m == 0 and left % m == 0 and h % m == 0 and w % m == 0 and h * w >= 4 * m * m
        union[top : top + h, left : left + w] = False
    assert d.blocks and np.array_equal(union.reshape(-1), d.keep)
    with pytest.raises(ValueError, match="grid_multiple"):
        decide_drop(cfg, (5, 6), None, np.random.default_rng(0), window=2)


# ----------------------------------------------------------------------------- the recipe keys


@pytest.mark.parametrize(("data", "text"), [
    ({"sizing": {"grid_multiple": 3, "max_tokens": 8}}, "grid_multiple 3 needs max_tokens >= 9"),
    ({"sizing": {"grid_multiple": 2, "max_tokens": 10, "min_tokens": 9}}, "below min_tokens=9"),
    ({"sizing": {"grid_multiple": 2, "mode": "sampled", "max_tokens": 64, "sampled": {"range": [3, 64]}}},
     "smallest sampled budget to at least 4"),
    ({"output": {"token_order": "windows"}}, "output.token_order: token_order windows"),
    ({"sizing": {"grid_multiple": 2}, "output": {"token_order": "windows"}, "patch_ops": [{"name": "shuffle"}]},
     "patch op shuffle reorders them"),
    ({"sizing": {"grid_multiple": 3}, "output": {"token_order": "windows"}, "packing": {"seq_len": 1000}},
     "packing.seq_len: with output.token_order windows a row must split into whole 3x3 windows: make seq_len a "
     "multiple of 9 (got 1000)"),
    ({"sizing": {"grid_multiple": 0}}, "grid_multiple"),
    ({"source": {"images_per_sample": "some"}}, "images_per_sample"),
    ({"output": {"token_order": "zigzag"}}, "token_order"),
])
def test_bad_settings_are_one_clear_line(data, text):
    with pytest.raises(RecipeError) as info:
        Recipe.from_dict(data)
    lines = str(info.value).splitlines()[1:]
    assert len(lines) == 1 and text in lines[0], str(info.value)


def test_the_new_keys_at_their_defaults_leave_the_fingerprint_as_it_was():
    plain = Recipe.from_dict({})
    form = fingerprint_form(plain.to_dict())
    assert "images_per_sample" not in form["source"] and "grid_multiple" not in form["sizing"]
    assert "token_order" not in form["output"]
    assert plain.to_dict()["sizing"]["grid_multiple"] == 1  # still in the settings themselves
    changed = {Recipe.from_dict(d).fingerprint() for d in (
        {"source": {"images_per_sample": "all"}}, {"sizing": {"grid_multiple": 2}},
        {"sizing": {"grid_multiple": 2}, "output": {"token_order": "windows"}})}
    assert len(changed) == 3 and plain.fingerprint() not in changed
