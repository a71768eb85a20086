"""The demo archive's scenes, drawn with numpy (plus Pillow's ImageDraw): shorelines, building fronts,
receipts, panoramas, thumbnails and charts of any size, from a given numpy Generator only.

Used by the demo shards (`demo.data`) and the benchmark corpus (`bench.photos`). Nothing real is
depicted; the same generator state gives the same pixels. Each renderer takes an optional `facts`
dict that it fills with what it drew (sky, counts, colours), from which the demo writes captions;
passing it changes no draw.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from PIL import Image, ImageChops, ImageDraw

__all__ = [
    "SCENES",
    "WALL_COLOURS",
    "draw_chart",
    "draw_chart_on",
    "draw_facade",
    "draw_panorama",
    "draw_receipt",
    "draw_shoreline",
    "draw_thumbnail",
    "unit_grid",
]

_Rgb = tuple[int, int, int]
Facts = dict[str, Any]


# --------------------------------------------------------------------------------------------
# Small numpy drawing helpers (whole-array operations only; no per-pixel Python loops)
# --------------------------------------------------------------------------------------------


def unit_grid(h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
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


def _sky_palette(rng: np.random.Generator, facts: Facts) -> tuple[np.ndarray, np.ndarray]:
    """(zenith, horizon) sky colours: a clear-day or a dusk palette (facts["sky"] says which)."""
    if rng.random() < 0.6:
        facts["sky"] = "clear"
        return _jitter(rng, (70, 130, 200)), _jitter(rng, (190, 215, 235))
    facts["sky"] = "dusk"
    return _jitter(rng, (60, 50, 110)), _jitter(rng, (245, 160, 95))


def draw_shoreline(h: int, w: int, rng: np.random.Generator, facts: Facts | None = None) -> np.ndarray:
    """Sky gradient, sun disk with glow and reflection, sea with perspective waves, maybe a beach.
    facts: sky, sun ("left"/"middle"/"right"), beach, lighthouse."""
    facts = {} if facts is None else facts
    top, low = _sky_palette(rng, facts)  # every random draw happens here; base() only computes
    horizon = float(rng.uniform(0.42, 0.62))
    cx, cy = float(rng.uniform(0.15, 0.85)), float(rng.uniform(0.1, horizon - 0.08))
    radius_frac = float(rng.uniform(0.04, 0.09))
    sun_rgb = _jitter(rng, (255, 236, 170), 10)
    sea_far, sea_near = _jitter(rng, (70, 120, 150)), _jitter(rng, (20, 60, 90))
    fx, phase = float(rng.uniform(2.0, 6.0)), float(rng.uniform(0, 2 * np.pi))
    beach = rng.random() < 0.5
    sand_top, sand_low, beach_f = _jitter(rng, (205, 185, 140)), _jitter(rng, (170, 150, 110)), float(rng.uniform(1, 3))
    facts.update(sun="left" if cx < 0.4 else "right" if cx > 0.6 else "middle", beach=beach, lighthouse=False)

    def base(hh: int, ww: int) -> np.ndarray:
        y, x = unit_grid(hh, ww)
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
        facts["lighthouse"] = True
        d = ImageDraw.Draw(img)
        lx, foot, tower = int(rng.uniform(0.05, 0.9) * w), int(horizon * h), int(0.22 * h)
        half = max(2, tower // 10)
        d.polygon([(lx - half, foot), (lx + half, foot), (lx + half // 2, foot - tower),
                   (lx - half // 2, foot - tower)], fill=(235, 235, 230))
        d.rectangle([lx - half // 2, foot - tower * 2 // 3, lx + half // 2, foot - tower // 2], fill=(190, 40, 40))
    return _finish(img, rng, 2.5)


#: Names of draw_facade's four wall colours, in its order.
WALL_COLOURS = ("red", "cream", "slate blue", "ochre")


def draw_facade(h: int, w: int, rng: np.random.Generator, facts: Facts | None = None) -> np.ndarray:
    """A building front: brick or render wall, a grid of windows (some lit), a door and a roofline.
    facts: brick, wall (a WALL_COLOURS name), rows, cols, lit (windows lit), sign."""
    facts = {} if facts is None else facts
    facts["brick"] = False
    yy = np.arange(h, dtype=np.int32)[:, None]
    xx = np.arange(w, dtype=np.int32)[None, :]
    # one colour-index map (0 wall, 1 mortar, 2.. windows, last roof), then a single table lookup
    idx = np.zeros((h, w), np.uint8)
    if rng.random() < 0.6:  # brick courses: mortar lines, alternate rows offset by half a brick
        facts["brick"] = True
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
    wall_index = int(rng.integers(4))
    wall = _jitter(rng, [(170, 80, 60), (210, 200, 180), (120, 140, 160), (200, 170, 120)][wall_index], 20)
    lit = rng.random(rows * cols) < 0.3
    facts.update(wall=WALL_COLOURS[wall_index], rows=rows, cols=cols, lit=int(lit.sum()), sign=False)
    glass = np.where(lit[:, None], [250, 220, 130], [45, 60, 80]) + rng.uniform(-15, 15, (rows * cols, 3))
    table = np.vstack([wall, wall * 0.75 + 40, glass, _jitter(rng, (60, 55, 60), 15)])
    img = np.clip(table, 0, 255).astype(np.uint8)[idx]
    pil = Image.fromarray(img)
    d = ImageDraw.Draw(pil)
    dw = max(2, int(w * rng.uniform(0.12, 0.2)))
    dx = int(w * rng.uniform(0.25, 0.75)) - dw // 2
    d.rectangle([dx, int(h * 0.8), dx + dw, h], fill=tuple(int(c) for c in _jitter(rng, (80, 45, 30), 20)))
    if rng.random() < 0.5 and w >= 60:  # a shop sign with lettering bars
        facts["sign"] = True
        sy = int(h * 0.72)
        d.rectangle([w // 10, sy, w - w // 10, sy + max(4, h // 25)], fill=(30, 50, 40))
        _text_bars(d, rng, (w // 10 + 4, sy + 2, w - w // 10 - 4, sy + max(4, h // 25) - 1),
                   max(3, h // 40), (230, 220, 170))
    return _finish(pil, rng, 2.5)


def draw_receipt(h: int, w: int, rng: np.random.Generator, facts: Facts | None = None) -> np.ndarray:
    """A tall paper slip: header, rows of text bars with prices, dashed rules and a barcode.
    facts: length (height over width, rounded)."""
    if facts is not None:
        facts["length"] = max(1, round(h / max(1, w)))
    fresh, aged = _jitter(rng, (246, 244, 236), 6), _jitter(rng, (232, 226, 206), 8)

    def paper(hh: int, ww: int) -> np.ndarray:
        y, x = unit_grid(hh, ww)
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


def draw_panorama(h: int, w: int, rng: np.random.Generator, facts: Facts | None = None) -> np.ndarray:
    """A very wide headland view: sky, layered hazy ridges (sums of sines), water in front.
    facts: sky, ridges."""
    facts = {} if facts is None else facts
    top, low = _sky_palette(rng, facts)
    near = _jitter(rng, (40, 70, 45), 15)
    layers = int(rng.integers(2, 5))
    facts["ridges"] = layers
    waves = [[(float(rng.uniform(1.0, 14.0)), float(rng.uniform(0.01, 0.06)), float(rng.uniform(0, 6.3)))
              for _ in range(4)] for _ in range(layers)]
    water = float(rng.uniform(0.78, 0.88))
    sea_far, sea_near = _jitter(rng, (60, 100, 130)), _jitter(rng, (25, 55, 80))

    def base(hh: int, ww: int) -> np.ndarray:
        y, x = unit_grid(hh, ww)
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


def draw_thumbnail(h: int, w: int, rng: np.random.Generator, facts: Facts | None = None) -> np.ndarray:
    """A tiny index-card preview: a diagonal gradient, a coloured disk and a band.
    facts: disk ("left"/"middle"/"right": where the disk's centre is)."""
    y, x = unit_grid(h, w)
    corner_a, corner_b = _jitter(rng, (90, 140, 190), 40), _jitter(rng, (220, 200, 150), 40)
    img = _lerp(corner_a, corner_b, np.broadcast_to((x + y) / 2, (h, w)))
    cx, cy, r = rng.uniform(0.25, 0.75), rng.uniform(0.25, 0.75), rng.uniform(0.15, 0.35)
    if facts is not None:
        facts["disk"] = "left" if cx < 0.42 else "right" if cx > 0.58 else "middle"
    disk = ((x - cx) * w) ** 2 + ((y - cy) * h) ** 2 < (r * min(h, w)) ** 2
    img = np.where(disk[..., None], _jitter(rng, (200, 60, 50), 50), img)
    band = np.abs(y - rng.uniform(0.6, 0.9)) < 0.08
    img = np.where(np.broadcast_to(band, (h, w))[..., None], _jitter(rng, (40, 40, 50), 20), img)
    return _finish(img, rng, 2.0)


def draw_chart(h: int, w: int, rng: np.random.Generator, facts: Facts | None = None, *,
               noise: float = 0.0) -> np.ndarray:
    """A plot of tide readings or catch counts: grid, axes, title bar and lines or bars (facts as
    draw_chart_on)."""
    pil = Image.new("RGB", (w, h), tuple(int(c) for c in _jitter(rng, (250, 249, 244), 5)))
    draw_chart_on(ImageDraw.Draw(pil), w, h, rng, facts)
    return _finish(pil, rng, noise)


def draw_chart_on(d: ImageDraw.ImageDraw, w: int, h: int, rng: np.random.Generator,
                  facts: Facts | None = None) -> None:
    """Draw the plot elements of a chart onto an existing RGB or RGBA canvas.
    facts: kind ("line"/"bar"), series (lines) or bars (bar count)."""
    facts = {} if facts is None else facts
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
        series = int(rng.integers(1, 4))
        facts.update(kind="line", series=series)
        for s in range(series):
            walk = np.cumsum(rng.normal(0, 1, n)) + 3 * np.sin(np.linspace(0, float(rng.uniform(3, 12)), n))
            walk = (walk - walk.min()) / max(1e-6, float(np.ptp(walk)))
            ys = y1 - 4 - walk * (y1 - y0 - 8)
            d.line(list(zip(xs.tolist(), ys.tolist())), fill=palette[s] + (255,), width=max(1, w // 250))
    else:
        n = int(rng.integers(4, 16))
        facts.update(kind="bar", bars=n)
        slot = (x1 - x0) / n
        heights = rng.uniform(0.1, 0.95, n)
        for i, frac in enumerate(heights):
            bx = x0 + i * slot
            d.rectangle([int(bx + slot * 0.15), int(y1 - frac * (y1 - y0)), int(bx + slot * 0.85), y1 - 1],
                        fill=palette[i % 2] + (255,))


#: Category -> renderer (h, w, rng, facts=None) -> HxWx3 uint8.
SCENES: dict[str, Callable[..., np.ndarray]] = {
    "shoreline": draw_shoreline,
    "facade": draw_facade,
    "receipt": draw_receipt,
    "panorama": draw_panorama,
    "thumbnail": draw_thumbnail,
    "chart": draw_chart,
}
