"""Patchify: an image array becomes a PatchSet of flattened patches with grid coordinates."""

from __future__ import annotations

import functools
from dataclasses import dataclass, field
from typing import Any

import numpy as np


@dataclass(slots=True, eq=False)  # arrays inside: compare fields explicitly
class PatchSet:
    """The tokens of one image.

    `patches` is [N, D] with D = patch*patch*channels flattened in (patch_row, patch_col, channel)
    order; `coords` is [N, 2] int32 (row, col) in the image's patch grid, raster order unless a
    later stage reordered or dropped tokens (coords always travel with their patch).
    """

    patches: np.ndarray
    coords: np.ndarray
    grid: tuple[int, int]
    key: str = ""
    label: int | None = None
    meta: dict[str, Any] = field(default_factory=dict)
    masked: np.ndarray | None = None  # bool [N]: True = hidden from the model (drop output: mask)
    text: str = ""  # the sample's text (source.text_key), "" when it has none
    # int32 [N]: the temporal slice of each token (0 for a still image) when the recipe is temporal
    # (clips or sizing.temporal_patch > 1), else None; `frames` is the number of slices (1 for images).
    times: np.ndarray | None = None
    frames: int = 1

    def __post_init__(self) -> None:
        if self.patches.ndim != 2 or self.coords.shape != (self.patches.shape[0], 2):
            raise ValueError(
                f"PatchSet {self.key!r}: patches must be [N, D] and coords [N, 2] "
                f"(got {self.patches.shape} and {self.coords.shape})"
            )
        if self.masked is not None and self.masked.shape != (self.patches.shape[0],):
            raise ValueError(f"PatchSet {self.key!r}: masked must be bool [N] (got {self.masked.shape})")
        if self.times is not None and self.times.shape != (self.patches.shape[0],):
            raise ValueError(f"PatchSet {self.key!r}: times must be int [N] (got {self.times.shape})")

    @property
    def num_tokens(self) -> int:
        return int(self.patches.shape[0])

    def __len__(self) -> int:
        return self.num_tokens


def patchify(image: np.ndarray, patch_size: int) -> np.ndarray:
    """[H, W, C] with H, W multiples of patch_size -> [(H/p)*(W/p), p*p*C], raster order, no copy loop."""
    if image.ndim != 3:
        raise ValueError(f"patchify needs an [H, W, C] array (got shape {image.shape})")
    h, w, c = image.shape
    p = patch_size
    if h % p or w % p:
        raise ValueError(f"image {w}x{h} is not a multiple of patch_size={p}; resize to a size plan first")
    gh, gw = h // p, w // p
    return np.ascontiguousarray(
        image.reshape(gh, p, gw, p, c).transpose(0, 2, 1, 3, 4).reshape(gh * gw, p * p * c)
    )


def tubeletify(frames: np.ndarray, patch_size: int, temporal_patch: int) -> np.ndarray:
    """[F, H, W, C] frames (F a multiple of t, H and W of p) -> [(F/t)*(H/p)*(W/p), t*p*p*C] tubelets:
    token k of slice s covers frames s*t..s*t+t-1 of one p x p patch, flattened in (frame, patch_row,
    patch_col, channel) order; slices one after the other, raster order inside each."""
    if frames.ndim != 4:
        raise ValueError(f"tubeletify needs [F, H, W, C] frames (got shape {frames.shape})")
    f, h, w, c = frames.shape
    p, t = patch_size, temporal_patch
    if f % t or h % p or w % p:
        raise ValueError(f"{f} frames of {w}x{h} do not split into tubelets of {t} frames x {p}x{p} pixels")
    s, gh, gw = f // t, h // p, w // p
    x = frames.reshape(s, t, gh, p, gw, p, c).transpose(0, 2, 4, 1, 3, 5, 6)
    return np.ascontiguousarray(x.reshape(s * gh * gw, t * p * p * c))


def slice_times(slices: int, tokens_per_slice: int) -> np.ndarray:
    """int32 [slices * tokens_per_slice]: the slice of each token of a clip in slice-major order."""
    return np.repeat(np.arange(slices, dtype=np.int32), tokens_per_slice)


def unpatchify(patches: np.ndarray, coords: np.ndarray, grid: tuple[int, int], patch_size: int,
               channels: int = 3, fill: int | float = 0) -> np.ndarray:
    """Place patches back at their coords on a [gh*p, gw*p, C] canvas (missing cells get `fill`)."""
    gh, gw = grid
    p = patch_size
    canvas = np.full((gh, gw, p, p, channels), fill, dtype=patches.dtype)
    canvas[coords[:, 0], coords[:, 1]] = patches.reshape(-1, p, p, channels)
    return canvas.transpose(0, 2, 1, 3, 4).reshape(gh * p, gw * p, channels)


def grid_coords(grid_h: int, grid_w: int) -> np.ndarray:
    """[gh*gw, 2] int32 (row, col) in raster order: a fresh copy of a cached array (grids repeat)."""
    return _grid_coords(grid_h, grid_w).copy()


@functools.lru_cache(maxsize=1024, typed=True)
def _grid_coords(grid_h: int, grid_w: int) -> np.ndarray:
    rows, cols = np.divmod(np.arange(grid_h * grid_w, dtype=np.int32), np.int32(grid_w))
    coords = np.stack([rows, cols], axis=1)
    coords.flags.writeable = False
    return coords


def window_order(grid_h: int, grid_w: int, m: int) -> np.ndarray:
    """int64 [gh*gw]: raster indices in window order, so `patches[window_order(...)]` puts the tokens
    of each m x m window together (windows in raster order, raster order inside each window).
    Both sides must be multiples of m (sizing.grid_multiple makes them so)."""
    if m < 1 or grid_h % m or grid_w % m:
        raise ValueError(f"grid {grid_h}x{grid_w} is not made of {m}x{m} windows: both sides must be multiples "
                         f"of sizing.grid_multiple={m}")
    idx = np.arange(grid_h * grid_w, dtype=np.int64).reshape(grid_h // m, m, grid_w // m, m)
    return idx.transpose(0, 2, 1, 3).reshape(-1)


def normalize(patches: np.ndarray, mean: tuple[float, ...], std: tuple[float, ...], dtype: str) -> np.ndarray:
    """Patches on the 0..255 scale -> (x/255 - mean)/std per channel in `dtype`, or uint8 as is
    (rounded and clipped if float). D's channel axis is the fastest."""
    if dtype == "uint8":
        if patches.dtype == np.uint8:
            return patches
        return np.clip(np.rint(patches), 0, 255).astype(np.uint8)
    channels = len(mean)
    scale = (1.0 / (255.0 * np.asarray(std, dtype=np.float32)))
    shift = (np.asarray(mean, dtype=np.float32) / np.asarray(std, dtype=np.float32))
    d = patches.shape[-1]
    reps = d // channels
    out = patches.astype(np.float32) * np.tile(scale, reps) - np.tile(shift, reps)
    return out.astype(dtype, copy=False)
