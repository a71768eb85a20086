"""Token dropping: decide which patch tokens of one image to remove (or mask), then apply it.

Draw first, then apply. `decide_drop` makes every random choice for one image into a small
`DropDecision` (a keep mask in raster order of the patch grid, the drawn rate, and the blocks in
block mode); `apply_drop` applies a decision to a PatchSet with no randomness at all. The mode
functions are plain numpy functions of a grid (or of the patches), a rate and a generator:

- `drop_random`   exactly `count` tokens, uniformly at random;
- `drop_block`    blockwise masking (Bao et al. 2021, BEiT): random rectangles until the count;
- `drop_grid`     keep a strided sub-grid (every k-th row and column, random offsets);
- `drop_stripes`  whole random rows or columns;
- `drop_content`  the least informative patches (lowest pixel variance) first;
- `tube`          for clips: random spatial positions, the same in every temporal slice (tube
                  masking for masked video modelling); on an image it is `random`.

Rules shared by every mode:

- The target number of dropped tokens for a rate on n tokens is `rate * n` rounded half up
  (`drop_count`).
- `min_keep`: every mode function takes it as a keyword and never keeps fewer than
  min(min_keep, n) tokens, enforced in the way that keeps the mode's shape: random and content
  cap the count at n - min_keep before drawing (so the kept set is still uniform / still the most
  informative); block skips any block that would leave too few tokens; stripes never takes a
  stripe that would leave too few; grid lowers the stride until the lattice keeps enough.
  `decide_drop` passes `DropConfig.min_keep` through.
- The generator is always passed in; nothing here reads global random state.
- With `window` m > 1 (sizing.grid_multiple), `decide_drop` runs the mode on the grid of m x m
  windows (`window_drop`), so whole windows are dropped or masked and the rate is counted in windows.
- On a clip of S temporal slices (`slices`), the rate is drawn once for all its S*gh*gw tokens;
  `tube` decides once on the spatial grid and repeats it in every slice, every other mode decides
  each slice on its own (in slice order, from the one generator). min_keep then holds per clip:
  each slice keeps at least ceil(min_keep / S).

`DROP_MODES` (name -> mode function, one uniform signature, see `DropMode`) is the one place a
mode is registered: `decide_drop` dispatches through it and the recipe's `drop.mode` values are
its keys.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np

from .patches import PatchSet

if TYPE_CHECKING:  # the recipe reads DROP_MODES, so no run-time import of it here
    from ..recipe.schema import DropConfig

Rect = tuple[int, int, int, int]  # (top, left, height, width) in patch-grid units

#: drop_block stops after this many draws in a row that give no acceptable block.
BLOCK_MAX_FAILS = 32
#: after this many rejected attempts in a row, drop_block places blocks over a still-kept token.
BLOCK_ANCHOR_AFTER = 8
_BLOCK_DRAWS = 16  # uniforms are drawn in chunks of this many attempts (5 numbers an attempt)


@dataclass(slots=True, frozen=True, eq=False)  # arrays inside: compare fields explicitly
class DropDecision:
    """Which tokens of one image survive, decided before anything is applied.

    `keep` is bool [gh*gw] in raster order of the patch grid (True = kept; in mask mode: visible).
    `rate` is the target drop rate drawn for this image (the realised share can differ: rounding,
    block and stripe granularity, min_keep). `blocks` lists the (top, left, height, width)
    rectangles in block mode, in the order they were drawn; their union is the dropped set.
    `mode` is the DropConfig mode that made the decision.
    """

    keep: np.ndarray
    rate: float
    blocks: tuple[Rect, ...] = ()
    mode: str = "none"
    # Temporal slices the decision covers (a clip): keep is then [slices * gh * gw], slice-major;
    # blocks are the spatial blocks of a tube decision, () for per-slice decisions.
    slices: int = 1

    @property
    def kept(self) -> int:
        return int(np.count_nonzero(self.keep))

    @property
    def total(self) -> int:
        return int(self.keep.size)


# ---------------------------------------------------------------------------------------------
# shared helpers


def _check_rate(rate: float) -> float:
    rate = float(rate)
    if not 0.0 <= rate <= 1.0:  # also refuses NaN
        raise ValueError(f"drop rate must be in 0..1 (got {rate})")
    return rate


def _check_grid(grid: tuple[int, int]) -> tuple[int, int]:
    gh, gw = (int(v) for v in grid)
    if gh < 1 or gw < 1:
        raise ValueError(f"grid must be (grid_h, grid_w) with both >= 1 (got {tuple(grid)})")
    return gh, gw


def drop_count(rate: float, n: int) -> int:
    """Target number of dropped tokens: rate * n rounded half up (so 0.5 of 3 tokens is 2)."""
    return min(int(n), math.floor(_check_rate(rate) * n + 0.5))


def _floor_kept(min_keep: int, n: int) -> int:
    """The tokens that must stay: min(min_keep, n); a negative min_keep is refused, not read as 0."""
    if min_keep < 0:
        raise ValueError(f"min_keep must be >= 0 (got {min_keep})")
    return min(int(min_keep), int(n))


# ---------------------------------------------------------------------------------------------
# the rate


def target_rate(cfg: DropConfig, n_tokens: int, rng: np.random.Generator) -> float:
    """The target drop rate for one image of `n_tokens` tokens, from whichever setting cfg gives.

    rate: that fixed value. beta (a, b): one draw from Beta(a, b) per image (the only setting that
    uses `rng`). max_keep K: max(0, 1 - K/n), so about K tokens stay. rate_curve
    [[tokens, rate], ...]: piecewise-linear in the token count, flat beyond the first and last
    points. Grid mode with a fixed `grid.stride` k and no rate setting: the nominal 1 - 1/k^2.
    Mode none: 0, and nothing is drawn.
    """
    n = int(n_tokens)
    if cfg.mode == "none":
        return 0.0
    if cfg.rate is not None:
        return float(cfg.rate)
    if cfg.beta is not None:
        a, b = cfg.beta
        return float(rng.beta(a, b))
    if cfg.max_keep is not None:
        return max(0.0, 1.0 - cfg.max_keep / n) if n > 0 else 0.0
    if cfg.rate_curve is not None:
        xs = [float(t) for t, _ in cfg.rate_curve]
        ys = [float(r) for _, r in cfg.rate_curve]
        return float(np.interp(float(n), xs, ys))
    if cfg.mode == "grid" and cfg.grid.stride is not None:
        return 1.0 - 1.0 / cfg.grid.stride**2
    return 0.0


# ---------------------------------------------------------------------------------------------
# the modes


def drop_random(n: int, rate: float, rng: np.random.Generator, *, min_keep: int = 0) -> np.ndarray:
    """bool [n] keep mask with exactly min(drop_count(rate, n), n - min_keep) tokens dropped,
    the dropped set uniform over all sets of that size."""
    n = int(n)
    k = min(drop_count(rate, n), n - _floor_kept(min_keep, n))
    keep = np.ones(n, dtype=bool)
    keep[rng.permutation(n)[:k]] = False
    return keep


def largest_block(grid: tuple[int, int], aspect: tuple[float, float]) -> int:
    """Area of the largest h x w rectangle inside the grid with aspect[0] <= h/w <= aspect[1]
    (0 when none fits, e.g. only tall blocks allowed on a one-row grid)."""
    gh, gw = _check_grid(grid)
    lo, hi = aspect
    h = np.arange(1, gh + 1)[:, None]
    w = np.arange(1, gw + 1)[None, :]
    ratio = h / w
    ok = (ratio >= lo) & (ratio <= hi)
    return int(np.max(np.where(ok, h * w, 0)))


def drop_block(grid: tuple[int, int], rate: float, rng: np.random.Generator, *, min_area: int = 16,
               aspect: tuple[float, float] = (0.3, 1 / 0.3), min_keep: int = 0) -> tuple[np.ndarray, list[Rect]]:
    """Blockwise masking (Bao et al. 2021, BEiT): drop random rectangles until the target count.

    Each attempt draws an area s ~ U[min_area, min(remaining, largest)] (remaining = target minus
    dropped so far; when remaining < min_area, s = min_area), an aspect r log-uniform within
    `aspect` - narrowed to the part where a block of area s fits the grid, so elongated grids do
    not waste attempts - then h = round(sqrt(s*r)), w = round(sqrt(s/r)) and a uniform position.
    A block is accepted only when h*w >= min_area, aspect[0] <= h/w <= aspect[1], it lies inside
    the grid, and it drops at least one new token. Overshoot rule: a block is also skipped when it
    would end at least as far from the target as before, i.e. when its new tokens are >= 2 x the
    tokens still missing (BEiT skips any overshoot; allowing a smaller one lets the count land on
    either side of the target, and any overshoot is under half the last block). A block that would
    leave fewer than min(min_keep, n) tokens is skipped too (the target is also capped at
    n - min_keep). It stops at the target or after BLOCK_MAX_FAILS rejected attempts in a row.

    Tiny grids: min_area is clamped to the largest block that fits the grid within `aspect`
    (the grid area when the grid's own shape is within `aspect`; 3 on a 1x50 grid with the
    default aspect, whose blocks are at most 1x3). So on a 3x3 grid with min_area 16 the only
    block is the whole grid, and a rate that it would overshoot too far drops nothing. When no
    rectangle within `aspect` fits the grid at all, nothing is dropped.

    Returns (keep, rects): keep is bool [gh*gw] in raster order, rects the accepted
    (top, left, height, width) blocks in draw order; their union is exactly the dropped set.
    """
    gh, gw = _check_grid(grid)
    lo, hi = (float(v) for v in aspect)
    if not 0 < lo <= hi:
        raise ValueError(f"aspect must be (lo, hi) with 0 < lo <= hi (got {tuple(aspect)})")
    n = gh * gw
    floor = _floor_kept(min_keep, n)
    target = min(drop_count(rate, n), n - floor)
    keep = np.ones((gh, gw), dtype=bool)
    rects: list[Rect] = []
    fit = largest_block((gh, gw), (lo, hi))
    if fit == 0:  # no block fits the grid within `aspect` (a target of 0 never enters the loop)
        return keep.ravel(), rects
    a_min = min(int(min_area), fit)
    log_lo, log_hi = math.log(lo), math.log(hi)
    log_h2, log_w2 = 2 * math.log(gh + 0.5), 2 * math.log(gw + 0.5)  # round() keeps h <= gh here
    dropped = fails = 0
    draws: list[list[float]] = []
    while dropped < target and fails < BLOCK_MAX_FAILS:
        if not draws:
            draws = rng.random((_BLOCK_DRAWS, 5)).tolist()
            draws.reverse()
        u_s, u_r, u_t, u_l, u_a = draws.pop()
        fails += 1
        remaining = target - dropped
        s = a_min + u_s * (max(a_min, min(remaining, fit)) - a_min)
        log_s = math.log(s)
        r_lo, r_hi = max(log_lo, log_s - log_w2), min(log_hi, log_h2 - log_s)
        if r_lo > r_hi:
            continue
        r = math.exp(r_lo + u_r * (r_hi - r_lo))
        h, w = math.floor(math.sqrt(s * r) + 0.5), math.floor(math.sqrt(s / r) + 0.5)
        if not (1 <= h <= gh and 1 <= w <= gw and h * w >= a_min and lo <= h / w <= hi):
            continue
        if fails <= BLOCK_ANCHOR_AFTER:
            top, left = int(u_t * (gh - h + 1)), int(u_l * (gw - w + 1))
        else:  # stuck: place the block over a random still-kept token (uniform among such places)
            r, c = divmod(int(np.flatnonzero(keep)[int(u_a * (n - dropped))]), gw)
            t0, l0 = max(0, r - h + 1), max(0, c - w + 1)
            top = t0 + int(u_t * (min(r, gh - h) - t0 + 1))
            left = l0 + int(u_l * (min(c, gw - w) - l0 + 1))
        new = int(np.count_nonzero(keep[top : top + h, left : left + w]))
        if new == 0 or new >= 2 * remaining or n - dropped - new < floor:
            continue
        keep[top : top + h, left : left + w] = False
        dropped += new
        rects.append((top, left, h, w))
        fails = 0
    return keep.ravel(), rects


def grid_stride(grid: tuple[int, int], rate: float) -> int:
    """The stride k >= 1 whose nominal kept share 1/k^2 is closest to 1 - rate (ties: the smaller
    k). k is at most max(gh, gw): a larger stride keeps the same single token."""
    gh, gw = _check_grid(grid)
    ks = np.arange(1, max(gh, gw) + 1, dtype=np.float64)
    return int(np.argmin(np.abs(1.0 / ks**2 - (1.0 - _check_rate(rate))))) + 1


def drop_grid(grid: tuple[int, int], rate: float | None, rng: np.random.Generator, *,
              stride: int | None = None, min_keep: int = 0) -> np.ndarray:
    """Keep a strided sub-grid: rows r0, r0+k, ... and columns c0, c0+k, ...; drop the rest.

    k is `stride` when given (the rate is then ignored), else `grid_stride(grid, rate)`. The
    offsets are uniform in [0, min(k, gh)) and [0, min(k, gw)), so at least one row and one
    column - at least one token - always stay, even at rate 1. If the lattice keeps fewer than
    min(min_keep, n) tokens, k is lowered one step at a time (same offset draws, rescaled) until
    it keeps enough; k = 1 keeps everything.
    """
    gh, gw = _check_grid(grid)
    if stride is None:
        if rate is None:
            raise ValueError("drop_grid needs a rate or a stride")
        k = grid_stride((gh, gw), rate)
    else:
        k = int(stride)
        if k < 1:
            raise ValueError(f"stride must be >= 1 (got {stride})")
    floor = _floor_kept(min_keep, gh * gw)
    u_r, u_c = rng.random(2)
    while True:
        r0, c0 = int(u_r * min(k, gh)), int(u_c * min(k, gw))
        rows, cols = np.zeros(gh, dtype=bool), np.zeros(gw, dtype=bool)
        rows[r0::k] = True
        cols[c0::k] = True
        if k == 1 or np.count_nonzero(rows) * np.count_nonzero(cols) >= floor:
            return np.outer(rows, cols).ravel()
        k -= 1


def drop_stripes(grid: tuple[int, int], rate: float, rng: np.random.Generator, *, min_keep: int = 0) -> np.ndarray:
    """Drop whole random rows or columns until at least drop_count(rate, n) tokens are dropped.

    Each stripe picks rows or columns with a fair coin, then a random row (column) not yet
    dropped. The last stripe may overshoot the target by less than its own length (one stripe
    at most). A stripe that would leave fewer than min(min_keep, n) tokens is never taken: the
    other orientation is used instead, and when neither can be taken it stops short of the target.
    """
    gh, gw = _check_grid(grid)
    n = gh * gw
    target = drop_count(rate, n)
    floor = _floor_kept(min_keep, n)
    row_order, col_order = rng.permutation(gh), rng.permutation(gw)
    coins = rng.random(gh + gw) < 0.5  # True: this stripe is a row
    rows_left, cols_left = gh, gw  # kept tokens = rows_left * cols_left
    for coin in coins.tolist():
        if n - rows_left * cols_left >= target:
            break
        # both sides are >= 1 here: with no row or column left nothing is kept, so the target (<= n) was met
        can_row = (rows_left - 1) * cols_left >= floor
        can_col = rows_left * (cols_left - 1) >= floor
        if not (can_row or can_col):
            break
        if can_row and (coin or not can_col):
            rows_left -= 1
        else:
            cols_left -= 1
    rows, cols = np.ones(gh, dtype=bool), np.ones(gw, dtype=bool)
    rows[row_order[: gh - rows_left]] = False
    cols[col_order[: gw - cols_left]] = False
    return np.outer(rows, cols).ravel()


def content_scores(patches: np.ndarray) -> np.ndarray:
    """float64 [N]: each patch's variance over its D values (flat patches score exactly 0)."""
    x = np.asarray(patches)
    if x.ndim != 2:
        raise ValueError(f"patches must be [N, D] (got shape {x.shape})")
    d = x.shape[1]
    if x.dtype == np.uint8 and d:  # exact integer sums (int64 holds d * 255^2 * d for any real d), about 2x var's speed
        xi = x.astype(np.int64)
        s1 = xi.sum(axis=1)
        s2 = np.einsum("ij,ij->i", xi, xi)
        return (s2 * d - s1 * s1) / float(d * d)
    return x.var(axis=1, dtype=np.float64)


def drop_content(patches: np.ndarray, rate: float, rng: np.random.Generator, *, noise: float = 0.1,
                 min_keep: int = 0) -> np.ndarray:
    """Drop the least informative patches first; bool [N] keep mask in the patches' order.

    score = per-patch variance of its values + noise * std(scores) * N(0, 1) jitter, so the choice
    is not fully deterministic near the cut; the min(drop_count(rate, N), N - min_keep) lowest
    scores are dropped. Equal scores (e.g. a flat image, noise 0) are broken at random.
    """
    if noise < 0:
        raise ValueError(f"noise must be >= 0 (got {noise})")
    scores = content_scores(patches)
    n = len(scores)
    k = min(drop_count(rate, n), n - _floor_kept(min_keep, n))
    jitter = rng.standard_normal(n)
    ties = rng.random(n)
    if noise:  # noise >= 0 was checked above (one patch: its std is 0, nothing is added)
        scores = scores + (noise * float(scores.std())) * jitter
    keep = np.ones(n, dtype=bool)
    keep[np.lexsort((ties, scores))[:k]] = False
    return keep


# ---------------------------------------------------------------------------------------------
# the table of modes: each entry reads its own recipe keys and calls its function above

#: A drop mode: (grid, rate, cfg, rng, patches) -> (keep, blocks). `grid` is (gh, gw); `rate` the
#: target rate from `target_rate`; `patches()` gives the [gh*gw, D] patches in raster order (only
#: call it when the mode needs pixels: it checks them); keep is bool [gh*gw] in raster order;
#: blocks the dropped rectangles when the mode has them, else ().
Grid = tuple[int, int]
Pixels = Callable[[], np.ndarray]
Kept = tuple[np.ndarray, tuple[Rect, ...]]
DropMode = Callable[[Grid, float, "DropConfig", np.random.Generator, Pixels], Kept]


def mode_none(grid: Grid, rate: float, cfg: DropConfig, rng: np.random.Generator, patches: Pixels) -> Kept:
    """Keep every token."""
    return np.ones(grid[0] * grid[1], dtype=bool), ()


def mode_random(grid: Grid, rate: float, cfg: DropConfig, rng: np.random.Generator, patches: Pixels) -> Kept:
    """`drop_random` over all the grid's tokens."""
    return drop_random(grid[0] * grid[1], rate, rng, min_keep=cfg.min_keep), ()


def mode_block(grid: Grid, rate: float, cfg: DropConfig, rng: np.random.Generator, patches: Pixels) -> Kept:
    """`drop_block` with the recipe's block area and aspect."""
    keep, rects = drop_block(grid, rate, rng, min_area=cfg.block.min_area, aspect=cfg.block.aspect,
                             min_keep=cfg.min_keep)
    return keep, tuple(rects)


def mode_grid(grid: Grid, rate: float, cfg: DropConfig, rng: np.random.Generator, patches: Pixels) -> Kept:
    """`drop_grid` with the recipe's fixed stride, if any (else the stride nearest the rate)."""
    return drop_grid(grid, rate, rng, stride=cfg.grid.stride, min_keep=cfg.min_keep), ()


def mode_stripes(grid: Grid, rate: float, cfg: DropConfig, rng: np.random.Generator, patches: Pixels) -> Kept:
    """`drop_stripes`."""
    return drop_stripes(grid, rate, rng, min_keep=cfg.min_keep), ()


def mode_content(grid: Grid, rate: float, cfg: DropConfig, rng: np.random.Generator, patches: Pixels) -> Kept:
    """`drop_content` over the patches in raster order, with the recipe's noise."""
    return drop_content(patches(), rate, rng, noise=cfg.content.noise, min_keep=cfg.min_keep), ()


def mode_tube(grid: Grid, rate: float, cfg: DropConfig, rng: np.random.Generator, patches: Pixels) -> Kept:
    """Tube masking: `drop_random` positions on the spatial grid; `decide_drop` repeats them in every
    temporal slice of a clip (the same spatial positions dropped throughout)."""
    return drop_random(grid[0] * grid[1], rate, rng, min_keep=cfg.min_keep), ()


#: name -> mode: the one place a drop mode is registered (recipe `drop.mode` takes these names).
DROP_MODES: dict[str, DropMode] = {
    "none": mode_none,
    "random": mode_random,
    "block": mode_block,
    "grid": mode_grid,
    "stripes": mode_stripes,
    "content": mode_content,
    "tube": mode_tube,
}

#: Modes that decide once on the spatial grid and repeat it in every slice of a clip.
TUBE_MODES = ("tube",)


def drop_mode(name: str) -> DropMode:
    """The DROP_MODES entry for `name`, or an error listing the known modes."""
    try:
        return DROP_MODES[name]
    except (KeyError, TypeError):
        raise ValueError(f"unknown drop mode {name!r}: set drop.mode in the recipe to one of "
                         f"{', '.join(DROP_MODES)}") from None


# ---------------------------------------------------------------------------------------------
# decide, then apply


def _raster(patches: np.ndarray | None, coords: np.ndarray | None, grid: tuple[int, int]) -> np.ndarray:
    gh, gw = grid
    n = gh * gw
    if patches is None:
        raise ValueError("content mode needs the patches")
    x = np.asarray(patches)
    if x.ndim != 2 or x.shape[0] != n:
        raise ValueError(f"content mode needs all {gh}x{gw} = {n} patches as [N, D] (got shape {x.shape})")
    if coords is None:
        return x
    c = np.asarray(coords)
    if c.shape != (n, 2) or c.min(initial=0) < 0 or (c[:, 0] >= gh).any() or (c[:, 1] >= gw).any():
        raise ValueError(f"coords must be [N, 2] places in the {gh}x{gw} grid (got shape {c.shape})")
    flat = c[:, 0].astype(np.intp) * gw + c[:, 1]
    if np.bincount(flat, minlength=n).max(initial=0) > 1:
        raise ValueError("coords must name every grid place once")
    out = np.empty_like(x)
    out[flat] = x
    return out


def decide_drop(cfg: DropConfig, grid: tuple[int, int], patches: np.ndarray | None,
                rng: np.random.Generator, *, coords: np.ndarray | None = None, window: int = 1,
                times: np.ndarray | None = None, slices: int = 1) -> DropDecision:
    """Every random choice of token dropping for one image, as a DropDecision.

    The rate from `target_rate` (0 in mode none), then the mode's DROP_MODES entry, which passes
    `min_keep=cfg.min_keep` on (see the module docstring for how each mode honours it). `patches`
    ([gh*gw, D], raster order) is only read by modes that need pixels (content) and may be None
    otherwise; pass `coords` when the patches are not in raster order.

    `window` m > 1 (sizing.grid_multiple) drops whole m x m windows: the mode runs on the grid of
    windows (see `window_drop`) and its keep mask is widened back to tokens.

    A clip passes `slices` S > 1 and `times` (each token's slice): see `clip_drop`.
    """
    gh, gw = _check_grid(grid)
    mode = drop_mode(cfg.mode)
    if slices < 1 or window < 1:
        raise ValueError(f"slices and window must be >= 1 (got slices={slices}, window={window})")
    if slices > 1:
        return clip_drop(mode, cfg, (gh, gw), patches, rng, coords=coords, window=window, times=times,
                         slices=slices)
    rate = target_rate(cfg, gh * gw, rng)
    if window > 1:
        return window_drop(mode, cfg, (gh, gw), rate, rng, lambda: _raster(patches, coords, (gh, gw)), window)
    keep, blocks = mode((gh, gw), rate, cfg, rng, lambda: _raster(patches, coords, (gh, gw)))
    return DropDecision(keep, rate, tuple(blocks), cfg.mode)


def clip_drop(mode: DropMode, cfg: DropConfig, grid: Grid, patches: np.ndarray | None, rng: np.random.Generator, *,
              coords: np.ndarray | None, window: int, times: np.ndarray | None, slices: int) -> DropDecision:
    """The decision for a clip of `slices` temporal slices of a gh x gw grid: the rate drawn once
    over all its tokens, then either one spatial decision repeated in every slice (TUBE_MODES) or one
    decision per slice, in slice order. Each slice keeps at least ceil(min_keep / slices) tokens.
    keep is [slices * gh * gw], slice-major (the order of PatchSet.times)."""
    gh, gw = grid
    rate = target_rate(cfg, slices * gh * gw, rng)
    scfg = cfg.model_copy(update={"min_keep": -(-cfg.min_keep // slices)})

    def one(pixels: Pixels) -> DropDecision:
        if window > 1:
            return window_drop(mode, scfg, grid, rate, rng, pixels, window)
        keep, blocks = mode(grid, rate, scfg, rng, pixels)
        return DropDecision(np.asarray(keep, bool), rate, tuple(blocks), cfg.mode)

    if cfg.mode in TUBE_MODES:
        d = one(lambda: _raster(None, None, grid))
        return DropDecision(np.tile(d.keep, slices), rate, d.blocks, cfg.mode, slices)

    def slice_pixels(s: int) -> Pixels:
        def pixels() -> np.ndarray:
            if patches is None or times is None:
                raise ValueError(f"mode {cfg.mode} needs the patches and their times on a clip")
            sel = np.asarray(times) == s
            return _raster(np.asarray(patches)[sel], None if coords is None else np.asarray(coords)[sel], grid)
        return pixels

    keeps = [one(slice_pixels(s)).keep for s in range(slices)]
    return DropDecision(np.concatenate(keeps), rate, (), cfg.mode, slices)


def window_drop(mode: DropMode, cfg: DropConfig, grid: Grid, rate: float, rng: np.random.Generator,
                patches: Pixels, m: int) -> DropDecision:
    """A drop mode run on the grid of m x m windows, so whole windows go (an encoder that merges
    each window still finds it complete or absent).

    Counted in windows: the drop count is drop_count(rate, windows); min_keep, block.min_area and a
    grid stride are read as ceil(min_keep / m^2) windows, ceil(min_area / m^2) windows and every
    k-th window row and column. Content mode scores each window by the variance of all its values.
    The decision's keep mask and block rectangles are in tokens, like any other decision's."""
    gh, gw = grid
    if gh % m or gw % m:
        raise ValueError(f"grid {gh}x{gw} is not made of {m}x{m} windows: both sides must be multiples of "
                         f"sizing.grid_multiple={m}")
    wh, ww = gh // m, gw // m
    per = m * m
    wcfg = cfg.model_copy(update={"min_keep": -(-cfg.min_keep // per),
                                  "block": cfg.block.model_copy(update={"min_area": -(-cfg.block.min_area // per)})})

    def window_values() -> np.ndarray:
        x = patches()
        return np.ascontiguousarray(x.reshape(wh, m, ww, m, -1).transpose(0, 2, 1, 3, 4).reshape(wh * ww, -1))

    keep_w, blocks_w = mode((wh, ww), rate, wcfg, rng, window_values)
    keep = np.repeat(np.repeat(np.asarray(keep_w, bool).reshape(wh, ww), m, axis=0), m, axis=1).ravel()
    blocks = tuple((t * m, left * m, h * m, w * m) for t, left, h, w in blocks_w)
    return DropDecision(keep, rate, blocks, cfg.mode)


def apply_drop(ps: PatchSet, decision: DropDecision, how: str) -> PatchSet:
    """A new PatchSet with the decision applied; no randomness. `ps` is not changed.

    Tokens are matched to the decision's raster-order mask through their coords, so a PatchSet
    whose tokens were reordered works too. how "remove": only kept tokens stay (patches, coords and
    any `masked` flags filtered, token order kept). how "mask": every token stays and
    `masked` = not kept (OR-ed with flags already there). Both write meta["drop"] =
    {"mode", "rate", "kept", "total"} (kept: tokens kept or visible; total: tokens before). Every
    other field (key, label, text, ...) is carried over as it is.
    """
    if how not in ("remove", "mask"):
        raise ValueError(f"how must be 'remove' or 'mask', as in drop.output (got {how!r})")
    gh, gw = ps.grid
    keep = np.asarray(decision.keep, dtype=bool)
    places = ps.frames * gh * gw if ps.times is not None else gh * gw
    if keep.shape != (places,):
        raise ValueError(
            f"PatchSet {ps.key!r}: drop decision has {keep.size} places, grid {gh}x{gw}"
            + (f" x {ps.frames} slices" if ps.times is not None else "") + f" has {places}"
        )
    flat = ps.coords[:, 0].astype(np.intp) * gw + ps.coords[:, 1]
    if ps.times is not None:
        flat = flat + ps.times.astype(np.intp) * (gh * gw)
    token_keep = keep[flat]
    meta = {**ps.meta, "drop": {"mode": decision.mode, "rate": float(decision.rate),
                                "kept": int(np.count_nonzero(token_keep)), "total": ps.num_tokens}}
    if how == "mask":
        masked = ~token_keep if ps.masked is None else (ps.masked | ~token_keep)
        return replace(ps, meta=meta, masked=masked)
    if token_keep.all():
        return replace(ps, meta=meta)
    masked = None if ps.masked is None else ps.masked[token_keep]
    times = None if ps.times is None else ps.times[token_keep]
    return replace(ps, patches=ps.patches[token_keep], coords=ps.coords[token_keep], meta=meta, masked=masked,
                   times=times)
