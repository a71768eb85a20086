"""Size plans: which patch grid an image gets under a token budget, and the resize that applies it.

The math is in plain functions (`best_grid`, `plan_size`); `resize_to_plan` applies a plan with
Pillow. A plan is decided from the image header alone, before any pixel is decoded.

Two tables are the one place their names are registered (the recipe's allowed values are their
keys): `SIZING_MODES` (sizing.mode -> grid function, see `GridFn`) and `RESAMPLE_FILTERS`
(sizing.resample -> Pillow filter).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from PIL import Image

if TYPE_CHECKING:  # the recipe reads the tables, so no run-time import of it here
    from ..recipe.schema import CropConfig, SizingConfig

#: Budget mode uses at least this share of max_tokens (the grid may trade a little aspect accuracy
#: for it). With it, any aspect ratio within 1:4..4:1 gets a grid using >= 85 % of the budget.
BUDGET_FILL = 0.85

#: name -> Pillow filter: the one place a resample filter is registered (recipe sizing.resample).
RESAMPLE_FILTERS: dict[str, Image.Resampling] = {
    "nearest": Image.Resampling.NEAREST,
    "box": Image.Resampling.BOX,
    "bilinear": Image.Resampling.BILINEAR,
    "hamming": Image.Resampling.HAMMING,
    "bicubic": Image.Resampling.BICUBIC,
    "lanczos": Image.Resampling.LANCZOS,
}


def resample_filter(name: str) -> Image.Resampling:
    """The RESAMPLE_FILTERS entry for `name`, or an error listing the known filters."""
    try:
        return RESAMPLE_FILTERS[name]
    except (KeyError, TypeError):
        raise ValueError(f"unknown resample filter {name!r}: set sizing.resample in the recipe to one of "
                         f"{', '.join(RESAMPLE_FILTERS)}") from None


@dataclass(slots=True, frozen=True)
class SizePlan:
    """The decided size of one image: source crop, resized content size, and padded patch grid.

    `crop` is (left, top, right, bottom) in source pixels. The cropped region is resized to
    content_w x content_h pixels and placed at (pad_left, pad_top) in a canvas of
    grid_w*patch_size x grid_h*patch_size; the rest is background (only with aspect_rule 'pad').
    """

    grid_h: int
    grid_w: int
    patch_size: int
    crop: tuple[int, int, int, int]
    content_h: int
    content_w: int
    pad_top: int = 0
    pad_left: int = 0
    budget: int = 0
    source: tuple[int, int] = (0, 0)  # (height, width) of the image the plan was made for

    @property
    def tokens(self) -> int:
        return self.grid_h * self.grid_w

    @property
    def height(self) -> int:
        return self.grid_h * self.patch_size

    @property
    def width(self) -> int:
        return self.grid_w * self.patch_size

    @property
    def aspect_error(self) -> float:
        """|log| ratio between the grid's aspect and the (cropped) source's: 0 is exact."""
        left, top, right, bottom = self.crop
        return abs(math.log((self.grid_h / self.grid_w) / ((bottom - top) / (right - left))))

    @property
    def scale(self) -> float:
        """Resize factor along the long side of the crop (>1 is an upscale)."""
        left, top, right, bottom = self.crop
        return max(self.content_h / (bottom - top), self.content_w / (right - left))

    def to_dict(self) -> dict:
        return {
            "grid": [self.grid_h, self.grid_w],
            "tokens": self.tokens,
            "crop": list(self.crop),
            "content": [self.content_h, self.content_w],
            "pad": [self.pad_top, self.pad_left],
            "aspect_error": round(self.aspect_error, 6),
            "scale": round(self.scale, 6),
            "budget": self.budget,
        }


def best_grid(aspect: float, lo: int, hi: int) -> tuple[int, int]:
    """Integer grid (gh, gw) with lo <= gh*gw <= hi whose gh/gw is closest to `aspect` (= h/w).

    Closeness is |log(gh/gw) - log(aspect)|; ties go to more tokens, then to the taller grid.
    Vectorised over every grid height, so it is exact, not a heuristic.
    """
    if not 1 <= lo <= hi:
        raise ValueError(f"need 1 <= lo <= hi for a token window (got lo={lo}, hi={hi})")
    gh = np.arange(1, hi + 1, dtype=np.int64)
    w_lo = np.maximum(1, -(-lo // gh))  # ceil(lo / gh)
    w_hi = hi // gh
    ok = w_lo <= w_hi
    gh, w_lo, w_hi = gh[ok], w_lo[ok], w_hi[ok]
    ideal = gh / aspect
    log_target = np.log(aspect)
    best_err = None
    best_w = None
    for cand in (np.floor(ideal), np.ceil(ideal)):
        w = np.clip(cand.astype(np.int64), w_lo, w_hi)
        err = np.abs(np.log(gh / w) - log_target)
        if best_err is None:
            best_err, best_w = err, w
        else:
            better = (err < best_err - 1e-12) | ((np.abs(err - best_err) <= 1e-12) & (w > best_w))
            best_err = np.where(better, err, best_err)
            best_w = np.where(better, w, best_w)
    tokens = gh * best_w
    # Round away floating noise so equal errors (e.g. 2/1 vs 4/2) tie exactly.
    err_key = np.round(best_err, 12)
    order = np.lexsort((-gh, -tokens, err_key))
    i = order[0]
    return int(gh[i]), int(best_w[i])


def _budget_window(budget: int, min_tokens: int) -> tuple[int, int]:
    lo = max(min_tokens, math.ceil(BUDGET_FILL * budget))
    return min(lo, budget), budget


#: A sizing mode's grid function: (h, w, budget, cfg) -> (grid_h, grid_w) for an (already cropped)
#: h x w pixel region under a token budget (max_tokens, or this image's draw in sampled mode).
GridFn = Callable[[float, float, int, "SizingConfig"], tuple[int, int]]


def grid_budget(h: float, w: float, budget: int, cfg: SizingConfig) -> tuple[int, int]:
    """The grid closest to the region's aspect using BUDGET_FILL..100 % of the budget."""
    return best_grid(h / w, *_budget_window(budget, min(cfg.min_tokens, budget)))


def grid_native(h: float, w: float, budget: int, cfg: SizingConfig) -> tuple[int, int]:
    """The native size rounded to patch multiples; only shrunk when over budget, only grown when
    under min_tokens."""
    p = cfg.patch_size
    min_tokens = min(cfg.min_tokens, budget)
    gh, gw = max(1, round(h / p)), max(1, round(w / p))
    if gh * gw > budget:
        return best_grid(h / w, *_budget_window(budget, min_tokens))
    if gh * gw < min_tokens:
        return best_grid(h / w, min_tokens, min(budget, max(min_tokens, math.ceil(min_tokens / BUDGET_FILL))))
    return gh, gw


def grid_fixed(h: float, w: float, budget: int, cfg: SizingConfig) -> tuple[int, int]:
    """A square isqrt(budget) x isqrt(budget) grid, whatever the aspect."""
    side = max(1, math.isqrt(budget))
    return side, side


#: name -> grid function: the one place a sizing mode is registered (recipe sizing.mode). Sampled
#: mode plans like budget mode; its budget is drawn per image by `draw_budget`.
SIZING_MODES: dict[str, GridFn] = {
    "budget": grid_budget,
    "native": grid_native,
    "fixed": grid_fixed,
    "sampled": grid_budget,
}


def sizing_mode(name: str) -> GridFn:
    """The SIZING_MODES entry for `name`, or an error listing the known modes."""
    try:
        return SIZING_MODES[name]
    except (KeyError, TypeError):
        raise ValueError(f"unknown sizing mode {name!r}: set sizing.mode in the recipe to one of "
                         f"{', '.join(SIZING_MODES)}") from None


def plan_grid(h: float, w: float, cfg: SizingConfig, budget: int | None = None) -> tuple[int, int]:
    """Grid for an (already cropped) h x w region under the config's mode; budget overrides max_tokens."""
    return sizing_mode(cfg.mode)(h, w, cfg.max_tokens if budget is None else budget, cfg)


def draw_budget(cfg: SizingConfig, rng: np.random.Generator | None) -> int:
    """The token budget for one image: max_tokens, or a draw from `sampled` in sampled mode."""
    if cfg.mode != "sampled":
        return cfg.max_tokens
    if rng is None:
        raise ValueError("sizing mode 'sampled' draws a budget per image and needs a generator")
    s = cfg.sampled
    assert s is not None  # the recipe validator guarantees it
    if s.range is not None:
        return int(rng.integers(s.range[0], s.range[1] + 1))
    weights = None
    if s.weights is not None:
        weights = np.asarray(s.weights, dtype=np.float64)
        weights = weights / weights.sum()
    return int(rng.choice(np.asarray(s.choices), p=weights))


def draw_crop(height: int, width: int, cfg: CropConfig, rng: np.random.Generator) -> tuple[int, int, int, int]:
    """A random crop box (left, top, right, bottom) keeping a share of the area drawn from `area`, with
    the image's own aspect times a log-uniform factor from `aspect_jitter`; no resize (the size plan follows).

    Up to 10 draws are tried for a box that fits; otherwise the whole image is kept.
    """
    if cfg.mode == "none":
        return (0, 0, width, height)
    area = height * width
    log_lo, log_hi = math.log(cfg.aspect_jitter[0]), math.log(cfg.aspect_jitter[1])
    for _ in range(10):
        share = rng.uniform(cfg.area[0], cfg.area[1])
        aspect = (width / height) * math.exp(rng.uniform(log_lo, log_hi))  # w / h of the crop
        crop_w = round(math.sqrt(share * area * aspect))
        crop_h = round(math.sqrt(share * area / aspect))
        if 1 <= crop_w <= width and 1 <= crop_h <= height:
            left = int(rng.integers(0, width - crop_w + 1))
            top = int(rng.integers(0, height - crop_h + 1))
            return (left, top, left + crop_w, top + crop_h)
    return (0, 0, width, height)


def plan_size(
    height: int,
    width: int,
    cfg: SizingConfig,
    rng: np.random.Generator | None = None,
    *,
    region: tuple[int, int, int, int] | None = None,
) -> SizePlan:
    """Decide the size plan for an image of `height` x `width` pixels (display orientation).

    `region` (left, top, right, bottom) restricts the plan to part of the image (a random crop);
    the max_aspect rule then applies within it.
    """
    if height < 1 or width < 1:
        raise ValueError(f"image has no pixels ({width}x{height})")
    p = cfg.patch_size
    budget = draw_budget(cfg, rng)
    x0, y0, x1, y1 = region if region is not None else (0, 0, width, height)
    if not (0 <= x0 < x1 <= width and 0 <= y0 < y1 <= height):
        raise ValueError(f"region {region} is not inside the {width}x{height} image")
    crop = (x0, y0, x1, y1)
    rh, rw = y1 - y0, x1 - x0
    region_h, region_w = float(rh), float(rw)
    limit = cfg.max_aspect
    aspect = rh / rw
    over = limit is not None and cfg.mode != "fixed" and max(aspect, 1 / aspect) > limit
    if over and cfg.aspect_rule == "crop":
        # Centre-crop the long side down to the limit (floored, so the result never exceeds it).
        if aspect > 1:
            keep = max(1, min(rh, math.floor(rw * limit)))
            top = y0 + (rh - keep) // 2
            crop = (x0, top, x1, top + keep)
        else:
            keep = max(1, min(rw, math.floor(rh * limit)))
            left = x0 + (rw - keep) // 2
            crop = (left, y0, left + keep, y1)
        region_h, region_w = crop[3] - crop[1], crop[2] - crop[0]
    if over and cfg.aspect_rule == "pad":
        # Plan the grid for the limit aspect, then fit the whole region inside it.
        padded_h, padded_w = (region_w * limit, region_w) if aspect > 1 else (region_h, region_h * limit)
        gh, gw = plan_grid(padded_h, padded_w, cfg, budget)
        fit = min(gh * p / region_h, gw * p / region_w)
        content_h = max(1, min(gh * p, round(region_h * fit)))
        content_w = max(1, min(gw * p, round(region_w * fit)))
        return SizePlan(
            gh, gw, p, crop, content_h, content_w,
            pad_top=(gh * p - content_h) // 2, pad_left=(gw * p - content_w) // 2, budget=budget,
            source=(height, width),
        )
    gh, gw = plan_grid(region_h, region_w, cfg, budget)
    return SizePlan(gh, gw, p, crop, gh * p, gw * p, budget=budget, source=(height, width))


def resize_to_plan(
    image: Image.Image,
    plan: SizePlan,
    *,
    resample: str = "bicubic",
    background: tuple[int, int, int] = (255, 255, 255),
) -> Image.Image:
    """Crop, resize (antialiased, one Pillow filter) and pad an RGB image to the plan's pixel size."""
    src_h, src_w = plan.source if plan.source != (0, 0) else (image.height, image.width)
    if image.size != (src_w, src_h):
        # A reduced decode (e.g. JPEG draft) gives fewer pixels of the same picture: scale the crop.
        if abs(image.width / src_w - image.height / src_h) > 0.05 * max(image.width / src_w, image.height / src_h):
            raise ValueError(
                f"image is {image.width}x{image.height} but the plan was made for {src_w}x{src_h}; "
                "plan from the same (oriented) image you resize"
            )
    sx, sy = image.width / src_w, image.height / src_h
    left, top, right, bottom = plan.crop
    box = (left * sx, top * sy, right * sx, bottom * sy)
    filt = resample_filter(resample)
    full = box == (0, 0, image.width, image.height)
    if full and (plan.content_w, plan.content_h) == image.size:
        content = image
    else:
        content = image.resize((plan.content_w, plan.content_h), filt, box=None if full else box)
    if (plan.content_w, plan.content_h) == (plan.width, plan.height):
        return content
    canvas = Image.new("RGB", (plan.width, plan.height), background)
    canvas.paste(content, (plan.pad_left, plan.pad_top))
    return canvas
