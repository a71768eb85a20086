"""The report's pictures: plain functions from arrays to HxWx3 uint8 arrays (tests check pixels).

Nothing here decides anything about a sample: the pictures are drawn from what the pipeline's own
stages produced (the trace of `process_record`, the arrays of a `PackedBatch`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

from ..packing.batch import PackedBatch
from ..image.patches import unpatchify
from . import palette

RGB = tuple[int, int, int]


# ---------------------------------------------------------------------------------------------
# basics


def as_rgb(image: np.ndarray | Image.Image) -> np.ndarray:
    """HxWx3 uint8 from a PIL image or an array (grey or RGBA are converted)."""
    if isinstance(image, Image.Image):
        image = np.asarray(image.convert("RGB"))
    arr = np.asarray(image)
    if arr.ndim == 2:
        arr = np.repeat(arr[:, :, None], 3, axis=2)
    if arr.shape[2] == 4:
        arr = arr[:, :, :3]
    if arr.dtype != np.uint8:
        arr = np.clip(np.rint(arr), 0, 255).astype(np.uint8)
    return np.ascontiguousarray(arr)


def display_size(height: int, width: int, box: int) -> tuple[int, int]:
    """Size to show an image at inside a box x box square: downscale to fit, or enlarge small
    images by a whole factor (so patch cells stay crisp)."""
    scale = min(box / height, box / width)
    if scale >= 1:
        factor = max(1, int(scale))
        return height * factor, width * factor
    return max(1, round(height * scale)), max(1, round(width * scale))


def fit(image: np.ndarray | Image.Image, box: int) -> np.ndarray:
    """The image resized for display inside a box x box square (see display_size)."""
    arr = as_rgb(image)
    h, w = arr.shape[:2]
    dh, dw = display_size(h, w, box)
    if (dh, dw) == (h, w):
        return arr
    method = Image.Resampling.NEAREST if dh >= h else Image.Resampling.LANCZOS
    return np.asarray(Image.fromarray(arr).resize((dw, dh), method, reducing_gap=3.0 if dh < h else None))


def cell_edges(pixels: int, cells: int) -> np.ndarray:
    """Pixel boundaries of `cells` equal cells over `pixels` pixels (cells + 1 values, 0 and pixels)."""
    return np.rint(np.arange(cells + 1) * (pixels / cells)).astype(np.int64)


def blend(pixels: np.ndarray, colour: RGB, amount: float) -> np.ndarray:
    """pixels * (1 - amount) + colour * amount, as uint8."""
    out = pixels.astype(np.float32) * (1.0 - amount) + np.asarray(colour, np.float32) * amount
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)


def save_png(image: np.ndarray, path: str | Path) -> Path:
    path = Path(path)
    Image.fromarray(as_rgb(image)).save(path, format="PNG", compress_level=3)
    return path


# ---------------------------------------------------------------------------------------------
# one image


def draw_grid(image: np.ndarray, grid: tuple[int, int], *, colour: RGB = palette.GRID,
              amount: float = 0.75) -> np.ndarray:
    """The patch grid drawn as 1-pixel lines (blended) on every cell boundary, border included."""
    out = as_rgb(image).copy()
    h, w = out.shape[:2]
    rows = np.minimum(cell_edges(h, grid[0]), h - 1)
    cols = np.minimum(cell_edges(w, grid[1]), w - 1)
    line = np.zeros((h, w), dtype=bool)
    line[rows, :] = True
    line[:, cols] = True
    out[line] = blend(out[line], colour, amount)
    return out


def draw_box(image: np.ndarray, box: tuple[float, float, float, float], *, colour: RGB = palette.CROP,
             width: int = 2) -> np.ndarray:
    """Outline of (left, top, right, bottom) in the image's pixels."""
    out = as_rgb(image).copy()
    h, w = out.shape[:2]
    left, top, right, bottom = (round(float(v)) for v in box)
    left, right = max(0, min(left, w - 1)), max(0, min(right - 1, w - 1))
    top, bottom = max(0, min(top, h - 1)), max(0, min(bottom - 1, h - 1))
    for k in range(width):
        t, b = min(top + k, h - 1), max(bottom - k, 0)
        lf, rt = min(left + k, w - 1), max(right - k, 0)
        out[t, left : right + 1] = colour
        out[b, left : right + 1] = colour
        out[top : bottom + 1, lf] = colour
        out[top : bottom + 1, rt] = colour
    return out


def hatch_mask(height: int, width: int, *, period: int = 6, thickness: int = 2) -> np.ndarray:
    """bool [H, W]: diagonal stripes (y + x) mod period < thickness."""
    y, x = np.mgrid[0:height, 0:width]
    return (y + x) % period < thickness


def drop_map(image: np.ndarray, grid: tuple[int, int], present: np.ndarray, masked: np.ndarray | None = None,
             *, shade: float = 0.7, period: int = 6, thickness: int = 2) -> np.ndarray:
    """The kept / dropped / masked map of one image's patch grid, drawn over its pixels.

    `present` bool [gh, gw]: a token for that cell reached the batch. Cells without one are shaded
    (blended `shade` towards palette.SHADE); `masked` bool [gh, gw] cells (sent, but hidden from
    the model) are hatched with palette.HATCH; kept cells are left exactly as they are.
    """
    out = as_rgb(image).copy()
    h, w = out.shape[:2]
    gh, gw = grid
    present = np.asarray(present, dtype=bool).reshape(gh, gw)
    masked = np.zeros((gh, gw), bool) if masked is None else np.asarray(masked, dtype=bool).reshape(gh, gw)
    ys, xs = cell_edges(h, gh), cell_edges(w, gw)
    row_of = np.repeat(np.arange(gh), np.diff(ys))
    col_of = np.repeat(np.arange(gw), np.diff(xs))
    dropped_px = ~present[row_of[:, None], col_of[None, :]]
    masked_px = (present & masked)[row_of[:, None], col_of[None, :]]
    out[dropped_px] = blend(out[dropped_px], palette.SHADE, shade)
    stripes = masked_px & hatch_mask(h, w, period=period, thickness=thickness)
    out[stripes] = palette.HATCH
    return out


# ---------------------------------------------------------------------------------------------
# packed rows


def segment_strip(segment_ids: np.ndarray, *, cells_per_line: int = 1024, cell_w: int | None = None,
                  cell_h: int = 14, gap: int = 3) -> np.ndarray:
    """One packed row's L tokens as cells coloured by segment id (padding: palette.PADDING).

    Long rows wrap after `cells_per_line` cells; `cell_w` defaults to the widest whole number of
    pixels that keeps a line within 1024 pixels.
    """
    seg = np.asarray(segment_ids).reshape(-1)
    n = seg.size
    per_line = max(1, min(cells_per_line, n))
    cw = cell_w if cell_w is not None else max(1, 1024 // per_line)
    lines = -(-n // per_line)
    colours = np.array([palette.segment_colour(int(s)) for s in range(int(seg.max(initial=0)) + 1)], np.uint8)
    out = np.full((lines * (cell_h + gap) - gap, per_line * cw, 3), palette.BACKGROUND, np.uint8)
    for line in range(lines):
        part = seg[line * per_line : (line + 1) * per_line]
        band = np.repeat(colours[part], cw, axis=0)  # [cells * cw, 3]
        top = line * (cell_h + gap)
        out[top : top + cell_h, : band.shape[0]] = band[None, :, :]
    return out


def strip_cell_centre(index: int, *, length: int, cells_per_line: int = 1024, cell_w: int | None = None,
                      cell_h: int = 14, gap: int = 3) -> tuple[int, int]:
    """(y, x) pixel at the centre of token `index` in segment_strip's picture (for tests and labels)."""
    per_line = max(1, min(cells_per_line, length))
    cw = cell_w if cell_w is not None else max(1, 1024 // per_line)
    line, pos = divmod(index, per_line)
    return line * (cell_h + gap) + cell_h // 2, pos * cw + cw // 2


def patches_to_display(patches: np.ndarray, *, mean: Sequence[float], std: Sequence[float],
                       standardized: bool = False) -> np.ndarray:
    """Token values -> uint8 pixels for display.

    uint8 patches are returned as they are. Float patches undo the output normalisation
    ((x * std + mean) * 255, per channel; the channel axis is D's fastest). Standardized patches
    (zero mean, unit variance each) cannot be undone, so each is stretched to 0..255 on its own.
    """
    x = np.asarray(patches)
    if x.dtype == np.uint8:
        return x
    x = x.astype(np.float32)
    if standardized:
        lo = x.min(axis=-1, keepdims=True)
        span = x.max(axis=-1, keepdims=True) - lo
        flat = span <= 1e-12
        out = np.where(flat, 128.0, (x - lo) * (255.0 / np.where(flat, 1.0, span)))
        return np.clip(np.rint(out), 0, 255).astype(np.uint8)
    channels = len(mean)
    reps = x.shape[-1] // channels
    values = (x * np.tile(np.asarray(std, np.float32), reps) + np.tile(np.asarray(mean, np.float32), reps)) * 255.0
    return np.clip(np.rint(values), 0, 255).astype(np.uint8)


@dataclass(slots=True, eq=False)
class RowImage:
    """One image of a packed row, rebuilt from its tokens alone."""

    segment: int  # 1-based segment id in the row
    key: str
    grid: tuple[int, int]
    tokens: int
    image: np.ndarray  # [gh*p, gw*p, C] (display values); cells with no token hold `fill`
    present: np.ndarray  # bool [gh, gw]: a token of this image sits at that cell
    masked: np.ndarray  # bool [gh, gw]: that token is flagged masked in the batch
    group: int = 0  # the image's sample within the row (PackedBatch.groups); shared by a sample's images


def reconstruct_row(batch: PackedBatch, row: int, patch_size: int, *, display=None,
                    fill: int = palette.EMPTY[0]) -> list[RowImage]:
    """The images of one packed row, each placed back from its tokens by their (row, col) coords.

    `display` maps a [n, D] block of token values to uint8 (e.g. patches_to_display with the
    recipe's mean/std); None keeps the batch's values (uint8 batches then give the exact pixels).
    Cells no token fills (dropped tokens) hold `fill`.
    """
    seg = batch.segment_ids[row]
    p = patch_size
    out: list[RowImage] = []
    for j in range(1, batch.max_images + 1):
        idx = np.flatnonzero(seg == j)
        if idx.size == 0:
            continue
        gh, gw = (int(v) for v in batch.grids[row, j - 1])
        if batch.times is not None:  # a clip shows its first slice; a tubelet token its first frame
            idx = idx[batch.times[row, idx] == 0]
        values = batch.patches[row, idx]
        if batch.times is not None:
            values = values[:, : p * p * 3]
        if display is not None:
            values = display(values)
        channels = values.shape[1] // (p * p)
        coords = batch.coords[row, idx].astype(np.int64)
        image = unpatchify(values, coords, (gh, gw), p, channels=channels, fill=fill)
        present = np.zeros((gh, gw), bool)
        present[coords[:, 0], coords[:, 1]] = True
        masked = np.zeros((gh, gw), bool)
        if batch.masked is not None:
            masked[coords[:, 0], coords[:, 1]] = batch.masked[row, idx]
        key = batch.keys[row][j - 1] if row < len(batch.keys) and j - 1 < len(batch.keys[row]) else ""
        tokens = int(np.count_nonzero(seg == j))
        out.append(RowImage(j, key, (gh, gw), tokens, image, present, masked, int(batch.groups[row, j - 1])))
    return out


def group_note(items: Sequence[RowImage], it: RowImage) -> str:
    """', image 2 of 3 of group 4' for an image of a multi-image sample, '' for a one-image sample."""
    same = [x.segment for x in items if x.group == it.group]
    if len(same) < 2:
        return ""
    return f", image {same.index(it.segment) + 1} of {len(same)} of group {it.group}"


def frame(image: np.ndarray, colour: RGB, width: int = 3) -> np.ndarray:
    """The image with a solid border of `width` pixels in `colour` around it."""
    arr = as_rgb(image)
    h, w = arr.shape[:2]
    out = np.empty((h + 2 * width, w + 2 * width, 3), np.uint8)
    out[:] = colour
    out[width : width + h, width : width + w] = arr
    return out


def flow(images: Sequence[np.ndarray], *, max_width: int, gap: int = 6, align_height: bool = False) -> np.ndarray:
    """Lay pictures out left to right, wrapping into new lines at max_width (top-aligned)."""
    if not images:
        return np.full((1, 1, 3), palette.BACKGROUND, np.uint8)
    lines: list[list[np.ndarray]] = [[]]
    width = 0
    for im in images:
        w = im.shape[1]
        if lines[-1] and width + gap + w > max_width:
            lines.append([])
            width = 0
        width += (gap if lines[-1] else 0) + w
        lines[-1].append(im)
    total_w = max(sum(im.shape[1] for im in line) + gap * (len(line) - 1) for line in lines)
    heights = [max(im.shape[0] for im in line) for line in lines]
    out = np.full((sum(heights) + gap * (len(lines) - 1), total_w, 3), palette.BACKGROUND, np.uint8)
    y = 0
    for line, lh in zip(lines, heights):
        x = 0
        for im in line:
            out[y : y + im.shape[0], x : x + im.shape[1]] = as_rgb(im)
            x += im.shape[1] + gap
        y += lh + gap
    return out


def stack(pictures: Sequence[np.ndarray], *, gap: int = 8) -> np.ndarray:
    """Pictures one below the other, left-aligned."""
    width = max(p.shape[1] for p in pictures)
    height = sum(p.shape[0] for p in pictures) + gap * (len(pictures) - 1)
    out = np.full((height, width, 3), palette.BACKGROUND, np.uint8)
    y = 0
    for p in pictures:
        out[y : y + p.shape[0], : p.shape[1]] = as_rgb(p)
        y += p.shape[0] + gap
    return out


def _join_groups(tiles: list[np.ndarray], groups: list[int], max_width: int) -> list[np.ndarray]:
    """The tiles of each multi-image sample side by side as one tile, in a thin black frame, so a
    sample's images stay together on one line of the row picture."""
    out: list[tuple[int, list[np.ndarray]]] = []
    for i, (tile, g) in enumerate(zip(tiles, groups)):
        if i > 0 and g == groups[i - 1]:
            out[-1][1].append(tile)
        else:
            out.append((g, [tile]))
    return [parts[0] if len(parts) == 1 else frame(flow(parts, max_width=max_width, gap=2), palette.BLACK, 2)
            for _, parts in out]


def row_picture(batch: PackedBatch, row: int, patch_size: int, *, display=None, image_height: int = 96,
                max_width: int = 1024) -> tuple[np.ndarray, list[RowImage]]:
    """A packed row as one picture: its segment strip on top, then each of its images rebuilt from
    its tokens (framed in its segment's colour; dropped cells shaded, masked ones hatched). The
    images of a multi-image sample sit side by side in one black-framed tile."""
    strip = segment_strip(batch.segment_ids[row])
    items = reconstruct_row(batch, row, patch_size, display=display)
    tiles = []
    for it in items:
        gh, gw = it.grid
        h = image_height
        w = max(1, round(h * gw / gh))
        if w > max_width // 2:
            w = max_width // 2
            h = max(1, round(w * gh / gw))
        shown = np.asarray(Image.fromarray(as_rgb(it.image)).resize((w, h), Image.Resampling.NEAREST
                                                                    if h >= it.image.shape[0] else
                                                                    Image.Resampling.BOX))
        shown = drop_map(shown, it.grid, it.present, it.masked)
        tiles.append(frame(shown, palette.segment_colour(it.segment), 3))
    tiles = _join_groups(tiles, [it.group for it in items], max_width)
    parts = [strip] + ([flow(tiles, max_width=max(max_width, strip.shape[1]))] if tiles else [])
    return stack(parts, gap=6), items
