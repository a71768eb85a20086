"""Built-in demo data: a made-up survey archive of the fictional coastal town of Gullwick Point.

`make_demo_shards` draws synthetic scenes (shorelines, building fronts, receipts, panoramas,
thumbnails, charts) of very different sizes and aspect ratios, and writes them as webdataset-style
tar shards. The set deliberately mixes image formats and modes (EXIF-rotated JPEG, CMYK JPEG,
16-bit PNG, palette GIF with transparency, ...) and holds exactly one truncated JPEG, so that the
`patchloom demo` command exercises the decoder, the sizing policy and the skip ledger in seconds.
Everything is drawn with numpy (plus Pillow's ImageDraw) from `numpy.random.SeedSequence`, so the
same seed gives byte-identical shards (with the same Pillow build); no global random state is read.

Each sample is `{key}.{ext}` (the image), `{key}.cls` (label id as ASCII text) and `{key}.json`
(key, category, label, width and height as displayed, format, mode, caption, and for the special
samples a `note` plus fields such as `exif_orientation` or `corrupt`).
"""

from __future__ import annotations

import io
import json
import re
import sys
import tarfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageChops, ImageDraw, features
from tqdm import tqdm

__all__ = [
    "DEMO_CLASSES",
    "DEMO_CORRUPT_KEYS",
    "DEMO_KEY_PREFIX",
    "MIN_SAMPLES",
    "demo_key",
    "demo_shard_pattern",
    "make_demo_shards",
]

DEMO_CLASSES: list[str] = ["shoreline", "facade", "receipt", "panorama", "thumbnail", "chart"]
"""Label names; the index in this list is the label id stored in each sample's `.cls` member."""

DEMO_KEY_PREFIX = "gullwick"
_SHARD_STEM = "demo-"
_CORRUPT_SLOT = (0, 3)  # (shard, index) of the one truncated JPEG, the same for every seed
_MTIME = 1_700_000_000  # fixed tar member time, so shards are byte-identical run to run
_SEED_SALT = 0x6775_6C6C  # separates demo-data draws from any other use of the same seed

_CLASS_ID = {name: i for i, name in enumerate(DEMO_CLASSES)}
_Rgb = tuple[int, int, int]


def demo_key(shard: int, index: int) -> str:
    """Sample key for one slot, e.g. `gullwick-s000-000017` (no dots: webdataset splits on them)."""
    return f"{DEMO_KEY_PREFIX}-s{shard:03d}-{index:06d}"


DEMO_CORRUPT_KEYS: list[str] = [demo_key(*_CORRUPT_SLOT)]
"""Keys of the deliberately corrupt samples (a truncated JPEG); the same for every seed and size."""


# --------------------------------------------------------------------------------------------
# Small numpy drawing helpers (whole-array operations only; no per-pixel Python loops)
# --------------------------------------------------------------------------------------------


def _grid(h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Normalised (y, x) coordinates in [0, 1], shaped [h, 1] and [1, w] for broadcasting."""
    y = np.linspace(0.0, 1.0, h, dtype=np.float32)[:, None]
    x = np.linspace(0.0, 1.0, w, dtype=np.float32)[None, :]
    return y, x


def _lerp(a: np.ndarray | _Rgb, b: np.ndarray | _Rgb, t: np.ndarray) -> np.ndarray:
    """Blend two colours by weight t (any shape); returns t.shape + (3,) float32."""
    a = np.asarray(a, dtype=np.float32)
    b = np.asarray(b, dtype=np.float32)
    return a + (b - a) * t[..., None]


def _jitter(rng: np.random.Generator, rgb: _Rgb, amount: int = 18) -> np.ndarray:
    """A colour near `rgb`, so scenes of one category are not all the same shade."""
    return np.clip(np.asarray(rgb, np.float32) + rng.uniform(-amount, amount, 3), 0, 255)


_NOISE_TILE = (241, 263)  # noise repeats with this period; odd sizes so it never lines up with JPEG blocks


def _finish(img: np.ndarray | Image.Image, rng: np.random.Generator, sigma: float) -> np.ndarray:
    """Add mild luma noise, so JPEG behaves as on real photos, and return HxWx3 uint8.

    The noise is one seeded tile repeated over the image and added by Pillow in C: far cheaper
    than a full-size float draw, and invisible at this strength.
    """
    if isinstance(img, np.ndarray):
        img = Image.fromarray(img if img.dtype == np.uint8 else np.clip(img, 0, 255).astype(np.uint8))
    if sigma > 0:
        w, h = img.size
        tile = np.clip(np.rint(128 + rng.standard_normal(_NOISE_TILE) * sigma), 0, 255).astype(np.uint8)
        reps = (-(-h // _NOISE_TILE[0]), -(-w // _NOISE_TILE[1]))
        luma = Image.fromarray(np.tile(tile, reps)[:h, :w])
        img = ImageChops.add(img, Image.merge("RGB", (luma, luma, luma)), scale=1.0, offset=-128)
    return np.asarray(img)


_SMOOTH_SIDE = 360  # smooth scenes are computed at most this large, then upscaled


def _smooth(h: int, w: int, base: Callable[[int, int], np.ndarray]) -> Image.Image:
    """Compute a smooth float scene at reduced size and upscale it (bilinear) to h x w, for speed."""
    scale = min(1.0, _SMOOTH_SIDE / max(h, w))
    hs, ws = max(2, round(h * scale)), max(2, round(w * scale))
    small = Image.fromarray(np.clip(base(hs, ws), 0, 255).astype(np.uint8))
    return small if (hs, ws) == (h, w) else small.resize((w, h), Image.Resampling.BILINEAR)


def _text_bars(draw: ImageDraw.ImageDraw, rng: np.random.Generator, box: tuple[int, int, int, int],
               line_h: int, fill: _Rgb | int, *, right_column: bool = False) -> None:
    """Fill a box with rows of dark bars standing in for printed words (one loop step per line)."""
    x0, y0, x1, y1 = box
    bar_h = max(1, int(line_h * 0.55))
    y = y0
    while y + bar_h <= y1:
        if rng.random() < 0.12:  # blank line
            y += line_h
            continue
        x = x0
        end = x0 + (x1 - x0) * rng.uniform(0.35, 0.75 if right_column else 1.0)
        while x < end:
            word = int(rng.integers(max(2, line_h // 2), max(3, line_h * 3)))
            draw.rectangle([x, y, min(x + word, int(end)), y + bar_h], fill=fill)
            x += word + max(2, line_h // 3)
        if right_column:  # a price aligned to the right edge
            word = int(rng.integers(max(3, line_h), max(4, line_h * 3)))
            draw.rectangle([x1 - word, y, x1, y + bar_h], fill=fill)
        y += line_h


# --------------------------------------------------------------------------------------------
# Scene renderers: (h, w, rng) -> HxWx3 uint8 array
# --------------------------------------------------------------------------------------------


def _sky_palette(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """(zenith, horizon) sky colours: a clear-day or a dusk palette."""
    if rng.random() < 0.6:
        return _jitter(rng, (70, 130, 200)), _jitter(rng, (190, 215, 235))
    return _jitter(rng, (60, 50, 110)), _jitter(rng, (245, 160, 95))


def draw_shoreline(h: int, w: int, rng: np.random.Generator) -> np.ndarray:
    """Sky gradient, sun disk with glow and reflection, sea with perspective waves, maybe a beach."""
    top, low = _sky_palette(rng)  # every random draw happens here; base() only computes
    horizon = float(rng.uniform(0.42, 0.62))
    cx, cy = float(rng.uniform(0.15, 0.85)), float(rng.uniform(0.1, horizon - 0.08))
    radius_frac = float(rng.uniform(0.04, 0.09))
    sun_rgb = _jitter(rng, (255, 236, 170), 10)
    sea_far, sea_near = _jitter(rng, (70, 120, 150)), _jitter(rng, (20, 60, 90))
    fx, phase = float(rng.uniform(2.0, 6.0)), float(rng.uniform(0, 2 * np.pi))
    beach = rng.random() < 0.5
    sand_top, sand_low, beach_f = _jitter(rng, (205, 185, 140)), _jitter(rng, (170, 150, 110)), float(rng.uniform(1, 3))

    def base(hh: int, ww: int) -> np.ndarray:
        y, x = _grid(hh, ww)
        img = _lerp(top, low, np.broadcast_to(y ** 0.8, (hh, ww)))
        # sun: a soft-edged disk above the horizon, measured in pixels so it stays round
        radius = max(1.0, radius_frac * hh)
        dist = np.sqrt(((x - cx) * ww) ** 2 + ((y - cy) * hh) ** 2)
        weight = np.maximum(np.exp(-dist / (3.0 * radius)) * 0.45, np.clip(radius - dist + 0.5, 0.0, 1.0))
        img = _lerp(img, np.broadcast_to(sun_rgb, img.shape), weight)
        # sea: darker toward the viewer, bands of waves that narrow toward the horizon
        depth = np.clip((y - horizon) / (1.0 - horizon), 0.0, 1.0)
        sea = _lerp(sea_far, sea_near, np.broadcast_to(depth, (hh, ww)))
        wave = np.sin(2 * np.pi * (14.0 * np.sqrt(depth) + 0.25 * np.sin(2 * np.pi * fx * x + phase)))
        sea *= (0.88 + 0.12 * wave)[..., None]
        streak = np.exp(-(((x - cx) * ww) / (1.6 * radius)) ** 2) * (wave > 0.2) * (1.0 - depth) * 0.6
        sea = _lerp(sea, np.broadcast_to(sun_rgb, sea.shape), streak)
        img = np.where((y > horizon)[..., None], sea, img)
        if beach:  # sandy foreground with a wavy waterline
            line = 0.86 + 0.04 * np.sin(2 * np.pi * (beach_f * x + phase))
            sand = _lerp(sand_top, sand_low, np.broadcast_to(y, (hh, ww)))
            img = np.where((y > line)[..., None], sand, img)
        return img

    img = _smooth(h, w, base)
    if rng.random() < 0.4 and h >= 60:  # a lighthouse on the horizon
        d = ImageDraw.Draw(img)
        lx, foot, tower = int(rng.uniform(0.05, 0.9) * w), int(horizon * h), int(0.22 * h)
        half = max(2, tower // 10)
        d.polygon([(lx - half, foot), (lx + half, foot), (lx + half // 2, foot - tower),
                   (lx - half // 2, foot - tower)], fill=(235, 235, 230))
        d.rectangle([lx - half // 2, foot - tower * 2 // 3, lx + half // 2, foot - tower // 2], fill=(190, 40, 40))
    return _finish(img, rng, 2.5)


def draw_facade(h: int, w: int, rng: np.random.Generator) -> np.ndarray:
    """A building front: brick or render wall, a grid of windows (some lit), a door and a roofline."""
    yy = np.arange(h, dtype=np.int32)[:, None]
    xx = np.arange(w, dtype=np.int32)[None, :]
    # one colour-index map (0 wall, 1 mortar, 2.. windows, last roof), then a single table lookup
    idx = np.zeros((h, w), np.uint8)
    if rng.random() < 0.6:  # brick courses: mortar lines, alternate rows offset by half a brick
        bh = max(3, h // 60)
        bw = bh * 3
        joints = [(xx + shift) % bw == 0 for shift in (0, bw // 2)]  # vertical joints, even/odd course
        idx[((yy % bh) == 0) | np.where((yy // bh) % 2 == 1, joints[1], joints[0])] = 1
    rows, cols = int(rng.integers(3, 8)), int(rng.integers(2, 6))
    roof = int(h * rng.uniform(0.06, 0.14))
    top, bottom = roof + h // 20, int(h * 0.7)
    px, py = w / (cols + 0.5), (bottom - top) / rows
    fx, fy = (xx - 0.25 * px) / px, (yy - top) / py
    ci, ri = np.floor(fx).astype(np.int32), np.floor(fy).astype(np.int32)
    in_x = (fx - ci > 0.2) & (fx - ci < 0.8) & (ci >= 0) & (ci < cols)
    in_y = (fy - ri > 0.15) & (fy - ri < 0.8) & (ri >= 0) & (ri < rows)
    idx = np.where(in_x & in_y, (2 + ri * cols + ci).astype(np.uint8), idx)
    idx[:roof] = 2 + rows * cols
    wall = _jitter(rng, [(170, 80, 60), (210, 200, 180), (120, 140, 160), (200, 170, 120)][int(rng.integers(4))], 20)
    lit = rng.random(rows * cols) < 0.3
    glass = np.where(lit[:, None], [250, 220, 130], [45, 60, 80]) + rng.uniform(-15, 15, (rows * cols, 3))
    table = np.vstack([wall, wall * 0.75 + 40, glass, _jitter(rng, (60, 55, 60), 15)])
    img = np.clip(table, 0, 255).astype(np.uint8)[idx]
    pil = Image.fromarray(img)
    d = ImageDraw.Draw(pil)
    dw = max(2, int(w * rng.uniform(0.12, 0.2)))
    dx = int(w * rng.uniform(0.25, 0.75)) - dw // 2
    d.rectangle([dx, int(h * 0.8), dx + dw, h], fill=tuple(int(c) for c in _jitter(rng, (80, 45, 30), 20)))
    if rng.random() < 0.5 and w >= 60:  # a shop sign with lettering bars
        sy = int(h * 0.72)
        d.rectangle([w // 10, sy, w - w // 10, sy + max(4, h // 25)], fill=(30, 50, 40))
        _text_bars(d, rng, (w // 10 + 4, sy + 2, w - w // 10 - 4, sy + max(4, h // 25) - 1),
                   max(3, h // 40), (230, 220, 170))
    return _finish(pil, rng, 2.5)


def draw_receipt(h: int, w: int, rng: np.random.Generator) -> np.ndarray:
    """A tall paper slip: header, rows of text bars with prices, dashed rules and a barcode."""
    fresh, aged = _jitter(rng, (246, 244, 236), 6), _jitter(rng, (232, 226, 206), 8)

    def paper(hh: int, ww: int) -> np.ndarray:
        y, x = _grid(hh, ww)
        return _lerp(fresh, aged, np.abs(x - 0.5) * 0.6 + y * 0.4)

    pil = _smooth(h, w, paper)
    d = ImageDraw.Draw(pil)
    ink = (int(rng.integers(20, 60)),) * 3
    m = max(4, w // 12)
    line_h = max(6, int(w * rng.uniform(0.05, 0.08)))
    d.rectangle([w // 4, m, 3 * w // 4, m + line_h], fill=ink)  # shop name, bold
    y0 = m + 3 * line_h
    barcode_h = max(8, h // 14)
    body_end = h - barcode_h - 4 * line_h
    for rule_y in (y0 - line_h // 2, body_end + line_h // 2):  # dashed rules
        for dx in range(m, w - m, max(4, line_h // 2)):
            d.line([dx, rule_y, dx + max(2, line_h // 4), rule_y], fill=ink, width=1)
    _text_bars(d, rng, (m, y0, w - m, body_end), line_h, ink, right_column=True)
    d.rectangle([w - m - 4 * line_h, body_end + line_h, w - m, body_end + int(1.8 * line_h)], fill=ink)
    img = np.array(pil)
    # barcode: a 1-D stripe pattern broadcast down the band
    stripes = rng.random(max(1, (w - 2 * m) // 2)) < 0.5
    code = np.repeat(stripes, 2)[: w - 2 * m]
    band = slice(h - barcode_h - m, h - m)
    img[band, m:m + code.size] = np.where(code[None, :, None], np.uint8(ink[0]), img[band, m:m + code.size])
    return _finish(img, rng, 3.0)


def draw_panorama(h: int, w: int, rng: np.random.Generator) -> np.ndarray:
    """A very wide headland view: sky, layered hazy ridges (sums of sines), water in front."""
    top, low = _sky_palette(rng)
    near = _jitter(rng, (40, 70, 45), 15)
    layers = int(rng.integers(2, 5))
    waves = [[(float(rng.uniform(1.0, 14.0)), float(rng.uniform(0.01, 0.06)), float(rng.uniform(0, 6.3)))
              for _ in range(4)] for _ in range(layers)]
    water = float(rng.uniform(0.78, 0.88))
    sea_far, sea_near = _jitter(rng, (60, 100, 130)), _jitter(rng, (25, 55, 80))

    def base(hh: int, ww: int) -> np.ndarray:
        y, x = _grid(hh, ww)
        img = _lerp(top, low, np.broadcast_to(y ** 0.8, (hh, ww)))
        haze = top + (low - top) * 0.6 ** 0.8
        for k, terms in enumerate(waves):  # back to front, each nearer ridge darker and less hazy
            ridge = 0.35 + 0.12 * k + sum(a * np.sin(2 * np.pi * f * x + ph) for f, a, ph in terms)
            colour = haze + (near - haze) * ((k + 1) / layers)
            img = np.where((y > ridge)[..., None], colour * (0.9 + 0.1 * y[..., None]), img)
        ripple = 0.9 + 0.1 * np.sin(2 * np.pi * (40 * (y - water) + 0.2 * np.sin(2 * np.pi * 9 * x)))
        sea = _lerp(sea_far, sea_near, np.broadcast_to(np.clip((y - water) / (1 - water), 0, 1), (hh, ww)))
        return np.where((y > water)[..., None], sea * ripple[..., None], img)

    return _finish(_smooth(h, w, base), rng, 2.5)


def draw_thumbnail(h: int, w: int, rng: np.random.Generator) -> np.ndarray:
    """A tiny index-card preview: a diagonal gradient, a coloured disk and a band."""
    y, x = _grid(h, w)
    corner_a, corner_b = _jitter(rng, (90, 140, 190), 40), _jitter(rng, (220, 200, 150), 40)
    img = _lerp(corner_a, corner_b, np.broadcast_to((x + y) / 2, (h, w)))
    cx, cy, r = rng.uniform(0.25, 0.75), rng.uniform(0.25, 0.75), rng.uniform(0.15, 0.35)
    disk = ((x - cx) * w) ** 2 + ((y - cy) * h) ** 2 < (r * min(h, w)) ** 2
    img = np.where(disk[..., None], _jitter(rng, (200, 60, 50), 50), img)
    band = np.abs(y - rng.uniform(0.6, 0.9)) < 0.08
    img = np.where(np.broadcast_to(band, (h, w))[..., None], _jitter(rng, (40, 40, 50), 20), img)
    return _finish(img, rng, 2.0)


def draw_chart(h: int, w: int, rng: np.random.Generator, *, noise: float = 0.0) -> np.ndarray:
    """A plot of tide readings or catch counts: grid, axes, title bar and lines or bars."""
    pil = Image.new("RGB", (w, h), tuple(int(c) for c in _jitter(rng, (250, 249, 244), 5)))
    _draw_chart_on(ImageDraw.Draw(pil), w, h, rng)
    return _finish(pil, rng, noise)


def _draw_chart_on(d: ImageDraw.ImageDraw, w: int, h: int, rng: np.random.Generator) -> None:
    """Draw the plot elements of a chart onto an existing RGB or RGBA canvas."""
    ml, mr, mt, mb = int(w * 0.12), int(w * 0.05), int(h * 0.12), int(h * 0.12)
    x0, x1, y0, y1 = ml, w - mr, mt, h - mb
    d.rectangle([x0, y0, x1, y1], fill=(255, 255, 255, 230))
    for gy in np.linspace(y0, y1, int(rng.integers(4, 9))):
        d.line([x0, int(gy), x1, int(gy)], fill=(215, 215, 215, 255), width=1)
    d.line([x0, y0, x0, y1, x1, y1], fill=(40, 40, 40, 255), width=max(1, w // 300))
    d.rectangle([w // 4, mt // 3, 3 * w // 4, mt // 3 + max(2, mt // 3)], fill=(50, 50, 60, 255))
    palette = [(31, 100, 170), (215, 95, 30), (50, 150, 70), (160, 50, 140)]
    if rng.random() < 0.5:
        n = int(rng.integers(30, 120))
        xs = np.linspace(x0 + 2, x1 - 2, n)
        for s in range(int(rng.integers(1, 4))):
            walk = np.cumsum(rng.normal(0, 1, n)) + 3 * np.sin(np.linspace(0, float(rng.uniform(3, 12)), n))
            walk = (walk - walk.min()) / max(1e-6, float(np.ptp(walk)))
            ys = y1 - 4 - walk * (y1 - y0 - 8)
            d.line(list(zip(xs.tolist(), ys.tolist())), fill=palette[s] + (255,), width=max(1, w // 250))
    else:
        n = int(rng.integers(4, 16))
        slot = (x1 - x0) / n
        heights = rng.uniform(0.1, 0.95, n)
        for i, frac in enumerate(heights):
            bx = x0 + i * slot
            d.rectangle([int(bx + slot * 0.15), int(y1 - frac * (y1 - y0)), int(bx + slot * 0.85), y1 - 1],
                        fill=palette[i % 2] + (255,))


_DRAW: dict[str, Callable[[int, int, np.random.Generator], np.ndarray]] = {
    "shoreline": draw_shoreline,
    "facade": draw_facade,
    "receipt": draw_receipt,
    "panorama": draw_panorama,
    "thumbnail": draw_thumbnail,
    "chart": draw_chart,
}


# --------------------------------------------------------------------------------------------
# Sizes and captions
# --------------------------------------------------------------------------------------------


def _log_uniform(rng: np.random.Generator, lo: int, hi: int) -> int:
    """An integer drawn log-uniformly from [lo, hi]: many moderate sizes, a few large ones."""
    return int(round(np.exp(rng.uniform(np.log(lo), np.log(hi)))))


def _pick_size(category: str, rng: np.random.Generator) -> tuple[int, int]:
    """(width, height) for a category, spanning its typical aspect range."""
    if category == "shoreline":  # landscape 3:2 .. 16:9
        w = _log_uniform(rng, 400, 1600)
        return w, round(w / rng.uniform(1.5, 16 / 9))
    if category == "facade":  # portrait around 2:3
        h = _log_uniform(rng, 320, 1200)
        return round(h * rng.uniform(0.55, 0.75)), h
    if category == "receipt":  # tall thin slips 1:3 .. 1:6
        w = int(rng.integers(160, 321))
        return w, round(w * rng.uniform(3.0, 6.0))
    if category == "panorama":  # very wide 5:1 .. 8:1
        h = int(rng.integers(120, 281))
        return round(h * rng.uniform(5.0, 8.0)), h
    if category == "thumbnail":  # tiny, about 4:3
        w = int(rng.integers(12, 65))
        return w, max(2, round(w * rng.uniform(0.7, 0.8)))
    side = int(rng.integers(240, 721))  # chart, square-ish
    return side, round(side * rng.uniform(0.8, 1.2))


_PLACES = ["Gullwick Point", "the Wrenfold breakwater", "Pellock Sands", "Tidewell Row",
           "Brackmoor Lane", "the old net loft", "Cindle Cove", "the tide-gauge hut", "Harbour Steps"]
_TIMES = ["Early morning", "Low tide", "Late afternoon", "Dusk", "A grey noon", "High water"]
_CAPTIONS = {
    "shoreline": ["{time} off {place}, looking out to sea.", "{time} at {place}; calm water, sun low.",
                  "Survey frame from {place}: horizon, swell and sky."],
    "facade": ["Front elevation, {n} {street}.", "House front on {street}, recorded for the survey.",
               "Shopfront at {n} {street}, ground floor let."],
    "receipt": ["Chandlery receipt found in the {place} ledger box.", "Till slip, fish market, item {n}.",
                "Ferry ticket stub filed with the {place} notes."],
    "panorama": ["Panorama of the headland from {place}.", "Wide view across the bay toward {place}.",
                 "Stitched sweep of the ridge above {place}."],
    "thumbnail": ["Index-card preview no. {n}.", "Contact-sheet crop, frame {n}.", "Tiny preview from card {n}."],
    "chart": ["Tide readings at {place}, week {n}.", "Monthly catch counts logged at {place}.",
              "Water temperature at {place}, survey year {n}."],
}


def _caption(category: str, rng: np.random.Generator) -> str:
    """A one-line, entirely made-up caption for a sample."""
    template = _CAPTIONS[category][int(rng.integers(len(_CAPTIONS[category])))]
    return template.format(time=_TIMES[int(rng.integers(len(_TIMES)))], place=_PLACES[int(rng.integers(len(_PLACES)))],
                           street=_PLACES[int(rng.integers(3, 5))], n=int(rng.integers(1, 60)))


# --------------------------------------------------------------------------------------------
# Encoding: each sample is drawn, then encoded as one of the variants below
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Encoded:
    """One encoded image plus what its metadata should say about it."""

    data: bytes
    ext: str
    fmt: str
    mode: str
    width: int  # as displayed (after EXIF orientation)
    height: int
    note: str = ""
    extra: tuple[tuple[str, object], ...] = ()


def _save(im: Image.Image, fmt: str, **options: object) -> bytes:
    """Encode a PIL image to bytes."""
    buf = io.BytesIO()
    im.save(buf, fmt, **options)
    return buf.getvalue()


def _jpeg(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Ordinary RGB JPEG with varied quality, chroma subsampling and sometimes progressive scan."""
    h, w = arr.shape[:2]
    data = _save(Image.fromarray(arr), "JPEG", quality=int(rng.integers(72, 91)),
                 subsampling=int(rng.choice([0, 2, 2, 2])), progressive=bool(rng.random() < 0.15))
    return _Encoded(data, "jpg", "JPEG", "RGB", w, h)


def _png(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Ordinary RGB PNG."""
    h, w = arr.shape[:2]
    return _Encoded(_save(Image.fromarray(arr), "PNG"), "png", "PNG", "RGB", w, h)


@dataclass(frozen=True, slots=True)
class _Special:
    """A sample with a fixed category, size and encoding, placed so that every demo set has it."""

    name: str
    category: str
    size: tuple[int, int]  # (width, height) as displayed
    encode: Callable[[np.ndarray, np.random.Generator], _Encoded]


def _enc_exif_rotated(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """JPEG whose pixels are stored rotated 90 degrees counter-clockwise with EXIF orientation 6."""
    h, w = arr.shape[:2]
    stored = Image.fromarray(arr).transpose(Image.Transpose.ROTATE_90)  # displays upright after orientation
    exif = Image.Exif()
    exif[0x0112] = 6
    data = _save(stored, "JPEG", quality=82, exif=exif.tobytes())
    return _Encoded(data, "jpg", "JPEG", "RGB", w, h, "EXIF orientation 6: stored pixels are rotated",
                    (("exif_orientation", 6), ("stored_width", h), ("stored_height", w)))


def _enc_gray_png(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """8-bit grayscale (L) PNG, as from a document scanner."""
    im = Image.fromarray(arr).convert("L")
    return _Encoded(_save(im, "PNG"), "png", "PNG", "L", im.width, im.height, "grayscale scan")


def _enc_rgba_png(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """RGBA PNG chart: fully transparent outside the plot area (the renderer is redrawn on alpha)."""
    h, w = arr.shape[:2]
    im = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    _draw_chart_on(ImageDraw.Draw(im), w, h, rng)
    return _Encoded(_save(im, "PNG"), "png", "PNG", "RGBA", w, h, "transparent background")


def _enc_palette_gif(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Palette GIF icon (a life ring) whose background and centre use the transparent index 0."""
    h, w = arr.shape[:2]
    y, x = _grid(h, w)
    dy, dx = (y - 0.5) * h, (x - 0.5) * w
    r = np.sqrt(dx ** 2 + dy ** 2) / (0.5 * min(h, w))
    quadrant = ((np.arctan2(dy, dx) + np.pi) // (np.pi / 2)).astype(np.int32) % 2  # alternating quarters
    idx = np.zeros((h, w), np.uint8)  # 0 = transparent
    idx[(r > 0.4) & (r < 0.95)] = 1  # dark outline
    band = (r > 0.47) & (r < 0.88)
    idx[band] = np.where(quadrant == 0, 2, 3)[band]  # red and white quarters
    im = Image.frombytes("P", (w, h), idx.tobytes())
    im.putpalette([0, 0, 0, 30, 30, 40, 220, 60, 40, 245, 245, 240] + [0, 0, 0] * 252)
    data = _save(im, "GIF", transparency=0, optimize=False)
    return _Encoded(data, "gif", "GIF", "P", w, h, "palette with transparent index 0")


def _enc_png16(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """16-bit grayscale PNG (mode I;16): a smooth tide-height field using the full 0..65535 range."""
    h, w = arr.shape[:2]
    y, x = _grid(h, w)
    field = (np.sin(2 * np.pi * (1.5 * x + rng.uniform())) * np.cos(2 * np.pi * (1.2 * y + rng.uniform()))
             + 0.5 * np.sin(2 * np.pi * 4 * (x + y)))
    field = (field - field.min()) / max(1e-6, float(np.ptp(field)))
    im = Image.fromarray(np.round(field * 65535).astype(np.uint16))
    return _Encoded(_save(im, "PNG"), "png", "PNG", "I;16", w, h, "16-bit grayscale height map")


def _enc_cmyk_jpeg(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """CMYK JPEG, as from a print workflow."""
    h, w = arr.shape[:2]
    data = _save(Image.fromarray(arr).convert("CMYK"), "JPEG", quality=85)
    return _Encoded(data, "jpg", "JPEG", "CMYK", w, h, "CMYK colour")


def _enc_webp(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Lossy RGB WebP."""
    h, w = arr.shape[:2]
    return _Encoded(_save(Image.fromarray(arr), "WEBP", quality=80, method=4), "webp", "WEBP", "RGB", w, h)


def _enc_bmp(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """Uncompressed 24-bit BMP."""
    h, w = arr.shape[:2]
    return _Encoded(_save(Image.fromarray(arr), "BMP"), "bmp", "BMP", "RGB", w, h)


def _enc_tiff(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """RGB TIFF, LZW-compressed where Pillow has libtiff."""
    h, w = arr.shape[:2]
    options = {"compression": "tiff_lzw"} if features.check("libtiff") else {}
    return _Encoded(_save(Image.fromarray(arr), "TIFF", **options), "tiff", "TIFF", "RGB", w, h)


def _enc_truncated_jpeg(arr: np.ndarray, rng: np.random.Generator) -> _Encoded:
    """A baseline JPEG cut off partway through its scan data: the header parses, decoding fails."""
    h, w = arr.shape[:2]
    full = _save(Image.fromarray(arr), "JPEG", quality=85)
    return _Encoded(full[: len(full) * 2 // 5], "jpg", "JPEG", "RGB", w, h,
                    "CORRUPT: truncated JPEG (deliberate; should be skipped)", (("corrupt", True),))


_CORRUPT = _Special("truncated JPEG", "shoreline", (1024, 640), _enc_truncated_jpeg)
_SPECIALS: list[_Special] = [
    _Special("JPEG with EXIF orientation 6", "shoreline", (1600, 900), _enc_exif_rotated),
    _Special("grayscale (L) PNG, 1:6", "receipt", (240, 1440), _enc_gray_png),
    _Special("RGBA PNG with transparency", "chart", (480, 400), _enc_rgba_png),
    _Special("palette GIF with transparency", "thumbnail", (64, 64), _enc_palette_gif),
    _Special("16-bit grayscale PNG (I;16)", "chart", (320, 240), _enc_png16),
    _Special("CMYK JPEG", "facade", (400, 600), _enc_cmyk_jpeg),
    _Special("WebP panorama, 8:1", "panorama", (1600, 200), _enc_webp),
    _Special("BMP", "facade", (160, 240), _enc_bmp),
    _Special("TIFF", "chart", (360, 300), _enc_tiff),
    _Special("3x2 thumbnail JPEG", "thumbnail", (3, 2), _jpeg),
    _Special("5:1 panorama JPEG", "panorama", (1250, 250), _jpeg),
]
MIN_SAMPLES = len(_SPECIALS) + 1
"""Smallest demo that still holds every special sample plus the corrupt one."""

_WEIGHTS = {"shoreline": 0.26, "facade": 0.2, "receipt": 0.14, "panorama": 0.1, "thumbnail": 0.14, "chart": 0.16}


def _special_slots(shards: int, per_shard: int) -> dict[tuple[int, int], _Special]:
    """Place the special samples round-robin over the shards' first slots, the corrupt one fixed."""
    slots = {_CORRUPT_SLOT: _CORRUPT}
    order = [(s, i) for i in range(per_shard) for s in range(shards) if (s, i) != _CORRUPT_SLOT]
    slots.update(zip(order, _SPECIALS))
    return slots


def _sample(seed: int, shard: int, index: int, special: _Special | None) -> tuple[dict[str, bytes], dict]:
    """Draw and encode one sample; returns its tar members (by extension) and its metadata."""
    rng = np.random.default_rng(np.random.SeedSequence([_SEED_SALT, int(seed), shard, index]))
    if special is not None:
        category, (w, h) = special.category, special.size
        encode = special.encode
    else:
        names = list(_WEIGHTS)
        category = names[int(rng.choice(len(names), p=np.array(list(_WEIGHTS.values())) / sum(_WEIGHTS.values())))]
        w, h = _pick_size(category, rng)
        lossless = (category == "chart" and rng.random() < 0.4) or (category == "thumbnail" and rng.random() < 0.2)
        encode = _png if lossless else _jpeg
    pixels = draw_chart(h, w, rng, noise=2.0) if category == "chart" and encode is _jpeg else _DRAW[category](h, w, rng)
    enc = encode(pixels, rng)
    key = demo_key(shard, index)
    meta: dict[str, object] = {
        "key": key, "category": category, "label": _CLASS_ID[category], "width": enc.width, "height": enc.height,
        "format": enc.fmt, "mode": enc.mode, "caption": _caption(category, rng),
    }
    if enc.note:
        meta["note"] = enc.note
    meta.update(dict(enc.extra))
    members = {
        enc.ext: enc.data,
        "cls": str(_CLASS_ID[category]).encode("ascii"),
        "json": json.dumps(meta, ensure_ascii=False, sort_keys=True).encode("utf-8"),
    }
    return members, meta


def _add_member(tar: tarfile.TarFile, name: str, data: bytes) -> None:
    """Append one file with fixed owner, mode and time, so the archive bytes are reproducible."""
    info = tarfile.TarInfo(name)
    info.size, info.mtime, info.mode = len(data), _MTIME, 0o644
    info.uid = info.gid = 0
    info.uname = info.gname = ""
    tar.addfile(info, io.BytesIO(data))


def make_demo_shards(out_dir: str | Path, *, shards: int = 4, per_shard: int = 40, seed: int = 0,
                     progress: bool = True) -> list[Path]:
    """Write shards out_dir/demo-000000.tar ... deterministically; return their paths.

    Also writes out_dir/classes.json (the label names) and out_dir/README.txt (what the data is).
    Stale `demo-NNNNNN.tar` files beyond `shards` are removed so the folder matches its pattern.
    """
    if shards < 1 or per_shard < _CORRUPT_SLOT[1] + 1 or shards * per_shard < MIN_SAMPLES:
        raise ValueError(f"demo needs shards >= 1, per_shard >= {_CORRUPT_SLOT[1] + 1} and "
                         f"shards * per_shard >= {MIN_SAMPLES}; got shards={shards}, per_shard={per_shard}")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    specials = _special_slots(shards, per_shard)
    listed: list[tuple[str, _Special]] = []
    paths: list[Path] = []
    counts = {name: 0 for name in DEMO_CLASSES}
    formats: dict[str, int] = {}
    with tqdm(total=shards * per_shard, desc="demo shards", unit="img", file=sys.stderr,
              disable=not progress, leave=False) as bar:
        for s in range(shards):
            path = out / f"{_SHARD_STEM}{s:06d}.tar"
            tmp = path.with_name(path.name + ".tmp")
            with tarfile.open(tmp, "w", format=tarfile.USTAR_FORMAT) as tar:
                for i in range(per_shard):
                    members, meta = _sample(seed, s, i, specials.get((s, i)))
                    for ext in sorted(members):
                        _add_member(tar, f"{meta['key']}.{ext}", members[ext])
                    counts[str(meta["category"])] += 1
                    label = f"{meta['format']} {meta['mode']}"
                    formats[label] = formats.get(label, 0) + 1
                    if (s, i) in specials:
                        listed.append((str(meta["key"]), specials[(s, i)]))
                    bar.update(1)
            tmp.replace(path)
            paths.append(path)
    for stale in out.glob(f"{_SHARD_STEM}*.tar"):
        match = re.fullmatch(rf"{_SHARD_STEM}(\d{{6}})\.tar", stale.name)
        if match and int(match.group(1)) >= shards:
            stale.unlink()
    (out / "classes.json").write_text(json.dumps(DEMO_CLASSES, indent=2) + "\n", encoding="utf-8")
    (out / "README.txt").write_text(_readme(out, shards, per_shard, seed, counts, formats, listed), encoding="utf-8")
    return paths


def _readme(out: Path, shards: int, per_shard: int, seed: int, counts: dict[str, int],
            formats: dict[str, int], listed: list[tuple[str, _Special]]) -> str:
    """Plain-text description of a generated demo folder."""
    lines = [
        "Gullwick Point survey archive (patchloom demo data)",
        "=" * 51,
        "",
        "A made-up field-survey archive of a fictional coastal town. Every image is drawn by",
        "patchloom.demo.data from a seed; no real people, places or photographs are involved.",
        "The images vary wildly in size, aspect ratio, format and mode on purpose, to exercise",
        "decoding, aspect-preserving sizing and packing.",
        "",
        f"shards: {shards} x {per_shard} samples, seed {seed}",
        f"pattern: {demo_shard_pattern(out, shards=shards)}",
        "",
        "Each sample is {key}.{ext} (the image), {key}.cls (label id as text) and {key}.json",
        "(category, label, width and height as displayed, format, mode, caption).",
        "",
        "Classes (label id: name, count):",
        *(f"  {i}: {name} ({counts[name]})" for i, name in enumerate(DEMO_CLASSES)),
        "",
        "Formats and modes (count):",
        *(f"  {name}: {n}" for name, n in sorted(formats.items())),
        "",
        "Special samples:",
        *(f"  {key}  {sp.name} ({sp.category}, {sp.size[0]}x{sp.size[1]})" for key, sp in listed),
        "",
        "Corrupt samples (deliberately truncated; a reader should skip them and record why):",
        *(f"  {key}" for key in DEMO_CORRUPT_KEYS),
        "",
    ]
    return "\n".join(lines)


def demo_shard_pattern(out_dir: str | Path, *, shards: int | None = None) -> str:
    """Brace pattern for the demo shards, e.g. `.../demo-{000000..000003}.tar`.

    `shards` defaults to the number of demo shards found in `out_dir` (4 if there are none yet).
    """
    out = Path(out_dir)
    if shards is None:
        found = [p for p in out.glob(f"{_SHARD_STEM}*.tar") if re.fullmatch(rf"{_SHARD_STEM}\d{{6}}\.tar", p.name)]
        shards = len(found) or 4
    if shards < 1:
        raise ValueError(f"shards must be >= 1, got {shards}")
    return str(out / f"{_SHARD_STEM}{{{0:06d}..{shards - 1:06d}}}.tar")
