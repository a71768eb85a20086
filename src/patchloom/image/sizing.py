"""Size plans: which patch grid an image gets under a token budget, and the resize that applies it.

The math is in plain functions (`best_grid`, `plan_size`); `resize_to_plan` applies a plan with
the named filter (OpenCV area resampling by default, or a Pillow filter). A plan is decided from
the image header alone, before any pixel is decoded.

Two tables are the one place their names are registered (the recipe's allowed values are their
keys): `SIZING_MODES` (sizing.mode -> grid function, see `GridFn`) and `RESAMPLE_FILTERS`
(sizing.resample -> Pillow filter or array resampler).
"""

from __future__ import annotations

import functools
import math
import os
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from PIL import Image

from ..extras import require
from .decode import DecodedImage

if TYPE_CHECKING:  # the recipe reads the tables, so no run-time import of it here
    from ..recipe.schema import CropConfig, SizingConfig

#: Budget mode uses at least this share of max_tokens (the grid may trade a little aspect accuracy
#: for it). With it, any aspect ratio within 1:4..4:1 gets a grid using >= 85 % of the budget.
BUDGET_FILL = 0.85

#: An array resampler: (HxWx3 uint8 pixels, output (width, height), source box (left, top, right,
#: bottom) in pixels, may be fractional) -> the resized HxWx3 uint8 pixels.
ArrayResample = Callable[[np.ndarray, tuple[int, int], tuple[float, float, float, float]], np.ndarray]

_cv2_pid = -1  # the process OpenCV was last set to one thread in (DataLoader workers are new processes)


def _opencv():
    """OpenCV, imported on first use and set to one thread in each process: loaders already run one
    process per core, and OpenCV's own thread pool would only compete with them."""
    global _cv2_pid
    cv2 = require("cv2", "the area resize (sizing.resample: area, the default)")

    pid = os.getpid()
    if pid != _cv2_pid:
        cv2.setNumThreads(1)
        _cv2_pid = pid
    return cv2


def _box_steps(shrink: float) -> int:
    """Mid-grid pixels per output pixel along one axis for a `shrink` factor (source / output): 1 when
    enlarging, 2 below a shrink of 2 (the mid grid is then finer than the source), else the whole
    part of the factor (the cubic step then shrinks by less than 1.5)."""
    if shrink <= 1 + 1e-9:
        return 1
    return 2 if shrink < 2 else int(math.floor(shrink + 1e-9))


def resize_area(pixels: np.ndarray, size: tuple[int, int], box: tuple[float, float, float, float]) -> np.ndarray:
    """Antialiased area resize (OpenCV): cubic interpolation onto a grid k times the output size per
    axis, then the mean of each k x k block.

    k is 2 for shrink factors below 2 and the whole part of the factor above, so each output pixel
    averages the whole source area it covers, as an area filter does, while the cubic step places
    that area to a fraction of a pixel and never shrinks by 1.5 or more. OpenCV's block mean is fast
    only for whole factors, hence the two steps: several times Pillow's bicubic speed at about 2 dB
    less PSNR against Lanczos on real photos (docs/benchmarks.md). Enlarging is cubic interpolation.
    """
    cv2 = _opencv()
    w, h = int(size[0]), int(size[1])
    left, top, right, bottom = (float(v) for v in box)
    kx, ky = _box_steps((right - left) / w), _box_steps((bottom - top) / h)
    mid_w, mid_h = w * kx, h * ky
    if all(v.is_integer() for v in (left, top, right, bottom)):
        src = pixels[int(top):int(bottom), int(left):int(right)]
        mid = src if src.shape[:2] == (mid_h, mid_w) else cv2.resize(src, (mid_w, mid_h),
                                                                      interpolation=cv2.INTER_CUBIC)
    else:  # a fractional box (a crop mapped onto a reduced decode): the same sampling, as an affine map
        ax, ay = (right - left) / mid_w, (bottom - top) / mid_h
        to_src = np.array([[ax, 0.0, left + 0.5 * ax - 0.5], [0.0, ay, top + 0.5 * ay - 0.5]])
        mid = cv2.warpAffine(pixels, to_src, (mid_w, mid_h), flags=cv2.INTER_CUBIC | cv2.WARP_INVERSE_MAP,
                             borderMode=cv2.BORDER_REPLICATE)
    if (kx, ky) == (1, 1):
        return np.ascontiguousarray(mid)
    return cv2.resize(mid, (w, h), interpolation=cv2.INTER_AREA)


#: name -> Pillow filter, or an array resampler of ours: the one place a resample filter is
#: registered (recipe sizing.resample). `area` (the default) is the fastest one whose mean PSNR
#: against full decode + Lanczos stays >= 40 dB on real photos; the Pillow filters give exactly
#: Pillow's `Image.resize`.
RESAMPLE_FILTERS: dict[str, Image.Resampling | ArrayResample] = {
    "area": resize_area,
    "nearest": Image.Resampling.NEAREST,
    "box": Image.Resampling.BOX,
    "bilinear": Image.Resampling.BILINEAR,
    "hamming": Image.Resampling.HAMMING,
    "bicubic": Image.Resampling.BICUBIC,
    "lanczos": Image.Resampling.LANCZOS,
}

#: sizing.resample when a recipe does not name one.
DEFAULT_RESAMPLE = "area"

# How many resizes each filter ran in this process, and how many PIL images it had to copy into
# an array first ("area from a Pillow copy"); for tests and benchmarks, never for decisions.
_RESIZES: Counter[str] = Counter()


def resize_path_counts() -> dict[str, int]:
    """Resizes per filter name in this process so far, plus "area from a Pillow copy": area resizes
    whose input was a plain PIL image (not a DecodedImage, so its pixels were copied out first)."""
    return dict(_RESIZES)


def reset_resize_path_counts() -> None:
    """Zero the counters of resize_path_counts()."""
    _RESIZES.clear()


def resample_filter(name: str) -> Image.Resampling | ArrayResample:
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
    return _best_grid(aspect, lo, hi)


@functools.lru_cache(maxsize=64, typed=True)
def _grid_rows(lo: int, hi: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every grid height with a width in lo..hi tokens, and its least and greatest width (read-only).

    Cached: a recipe has only a few token windows, and this is the same for every image."""
    gh = np.arange(1, hi + 1, dtype=np.int64)
    w_lo = np.maximum(1, -(-lo // gh))  # ceil(lo / gh)
    w_hi = hi // gh
    ok = w_lo <= w_hi
    rows = gh[ok], w_lo[ok], w_hi[ok]
    for a in rows:
        a.flags.writeable = False
    return rows


#: Images repeat sizes a lot, so best_grid's answers are kept in a bounded LRU cache per
#: (aspect, lo, hi); the answer is a pure function of those, so a hit is the same grid.
@functools.lru_cache(maxsize=4096, typed=True)
def _best_grid(aspect: float, lo: int, hi: int) -> tuple[int, int]:
    """best_grid's search, after its window was checked."""
    gh, w_lo, w_hi = _grid_rows(lo, hi)
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
    """Grid for an (already cropped) h x w region under the config's mode; budget overrides max_tokens.

    With `grid_multiple` m > 1 the mode plans a grid of m x m windows (as if the patch were m*p
    pixels, the budget budget // m^2 windows and min_tokens ceil(min_tokens / m^2) windows), which
    is then scaled by m: both sides are multiples of m and every budget rule holds in windows."""
    budget = cfg.max_tokens if budget is None else budget
    m = cfg.grid_multiple
    if m == 1:
        return sizing_mode(cfg.mode)(h, w, budget, cfg)
    windows = budget // (m * m)
    if windows < 1:
        raise ValueError(f"a budget of {budget} tokens holds no {m}x{m} window: raise sizing.max_tokens "
                         f"(or the sampled budgets) to at least {m * m}, or lower sizing.grid_multiple")
    bh, bw = sizing_mode(cfg.mode)(h, w, windows, window_config(cfg))
    return bh * m, bw * m


def window_config(cfg: SizingConfig) -> SizingConfig:
    """The sizing config in units of m x m windows (m = grid_multiple): patch m*p pixels, budgets in
    windows. Not validated again (a plain copy), so it only feeds the grid functions."""
    m = cfg.grid_multiple
    return cfg.model_copy(update={"patch_size": cfg.patch_size * m, "max_tokens": max(1, cfg.max_tokens // (m * m)),
                                  "min_tokens": -(-cfg.min_tokens // (m * m)), "grid_multiple": 1})


def usable_tokens(cfg: SizingConfig, budget: int) -> int:
    """Most tokens a grid of this config can have under `budget`: whole m x m windows
    (m = grid_multiple), and a square in fixed mode. 0 when not even one window fits."""
    m = cfg.grid_multiple
    windows = budget // (m * m)
    if cfg.mode == "fixed":
        return (m * math.isqrt(windows)) ** 2
    return windows * m * m


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
    cap: int | None = None,
) -> SizePlan:
    """Decide the size plan for an image of `height` x `width` pixels (display orientation).

    `region` (left, top, right, bottom) restricts the plan to part of the image (a random crop);
    the max_aspect rule then applies within it. `cap` lowers the budget (max_tokens, or the
    sampled draw) to at most that many tokens: each image of an n-image sample is planned under
    min(max_tokens, seq_len // n).
    """
    if height < 1 or width < 1:
        raise ValueError(f"image has no pixels ({width}x{height})")
    p = cfg.patch_size
    budget = draw_budget(cfg, rng)
    if cap is not None:
        budget = min(budget, int(cap))
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
    image: Image.Image | np.ndarray,
    plan: SizePlan,
    *,
    resample: str = DEFAULT_RESAMPLE,
    background: tuple[int, int, int] = (255, 255, 255),
) -> Image.Image | np.ndarray:
    """Crop, resize (antialiased, the named filter) and pad an RGB image to the plan's pixel size.

    Takes a PIL image or an HxWx3 uint8 array and returns the same kind; each filter runs on the
    form it needs (Pillow's on a PIL image, ours on an array). Under `area` a PIL image costs no
    copy when it is a DecodedImage (what the fast decoders return), and the result is one too."""
    is_array = isinstance(image, np.ndarray)
    img_h, img_w = image.shape[:2] if is_array else (image.height, image.width)
    src_h, src_w = plan.source if plan.source != (0, 0) else (img_h, img_w)
    if (img_w, img_h) != (src_w, src_h):
        # A reduced decode (e.g. JPEG draft) gives fewer pixels of the same picture: scale the crop.
        if abs(img_w / src_w - img_h / src_h) > 0.05 * max(img_w / src_w, img_h / src_h):
            raise ValueError(
                f"image is {img_w}x{img_h} but the plan was made for {src_w}x{src_h}; "
                "plan from the same (oriented) image you resize"
            )
    sx, sy = img_w / src_w, img_h / src_h
    left, top, right, bottom = plan.crop
    box = (left * sx, top * sy, right * sx, bottom * sy)
    filt = resample_filter(resample)
    size = (plan.content_w, plan.content_h)
    full = box == (0, 0, img_w, img_h)
    if full and size == (img_w, img_h):
        content = image
    elif isinstance(filt, Image.Resampling):
        _RESIZES[resample] += 1
        pil = Image.fromarray(image) if is_array else image
        content = pil.resize(size, filt, box=None if full else box)
        content = np.asarray(content) if is_array else content
    else:
        _RESIZES[resample] += 1
        if not is_array and not isinstance(image, DecodedImage):
            _RESIZES[f"{resample} from a Pillow copy"] += 1
        pixels = filt(image if is_array else np.asarray(image), size, box)
        content = pixels if is_array else DecodedImage(pixels)
    if size == (plan.width, plan.height):
        return content
    if is_array:
        canvas = np.empty((plan.height, plan.width, 3), np.uint8)
        canvas[...] = np.asarray(background, np.uint8)
        canvas[plan.pad_top:plan.pad_top + plan.content_h, plan.pad_left:plan.pad_left + plan.content_w] = content
        return canvas
    canvas = Image.new("RGB", (plan.width, plan.height), background)
    canvas.paste(content, (plan.pad_left, plan.pad_top))
    return canvas
