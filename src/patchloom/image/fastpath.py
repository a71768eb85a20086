"""Decoded pixels as numpy arrays: the fast decoders' calls (libjpeg-turbo through simplejpeg, libspng
through pyspng), EXIF orientation and alpha compositing on arrays, and `DecodedImage`, the PIL image
that hands a decoder's array on without a copy. `decode.OpenedImage` decides which call an image
gets (from its header) and falls back to Pillow; this module only runs the calls.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from PIL import Image

try:  # libjpeg-turbo binding
    import simplejpeg
except ImportError:  # pragma: no cover - a platform without a wheel
    simplejpeg = None  # type: ignore[assignment]

try:  # libspng binding
    import pyspng
except ImportError:  # pragma: no cover - a platform without a wheel
    pyspng = None  # type: ignore[assignment]

__all__ = ["DecodedImage", "FastDecode", "fast_pixels", "orient_pixels"]

# The same turns on a numpy array (rows, columns, channels): display = op(stored).
_ORIENT_ARRAY = {
    2: lambda a: a[:, ::-1],
    3: lambda a: a[::-1, ::-1],
    4: lambda a: a[::-1],
    5: lambda a: a.transpose(1, 0, 2),
    6: lambda a: a.transpose(1, 0, 2)[:, ::-1],
    7: lambda a: a.transpose(1, 0, 2)[::-1, ::-1],
    8: lambda a: a.transpose(1, 0, 2)[::-1],
}

# The array shape pyspng returns past (height, width) for each output format.
_PNG_BANDS = {"RGB": (3,), "RGBA": (4,), "L": ()}


class DecodedImage(Image.Image):
    """An RGB PIL image around a decoder's HxWx3 uint8 array (made read-only), kept as `pixels`.

    `np.asarray(image)` returns that array without a copy, so array code (the OpenCV resize) reads
    the decoder's output directly; Pillow's own copy is made only when Pillow code first touches the
    image (`image.im`, `load()`, any Pillow method). Pickles as its array.
    """

    def __init__(self, pixels: np.ndarray) -> None:
        super().__init__()
        if pixels.dtype != np.uint8 or pixels.ndim != 3 or pixels.shape[2] != 3:
            raise ValueError(f"DecodedImage takes HxWx3 uint8 pixels (got {pixels.dtype} {pixels.shape})")
        self.pixels = np.ascontiguousarray(pixels)
        self.pixels.flags.writeable = False
        self._mode = "RGB"
        self._size = (int(pixels.shape[1]), int(pixels.shape[0]))

    @property
    def im(self):  # noqa: ANN201 - Pillow's core image type is private
        if self._im is None:
            self._im = Image.fromarray(self.pixels).im
        return Image.Image.im.fget(self)

    @im.setter
    def im(self, im) -> None:  # noqa: ANN001
        self._im = im

    def load(self):  # noqa: ANN201
        if self._im is None:
            self._im = Image.fromarray(self.pixels).im
        return super().load()

    @property
    def __array_interface__(self) -> dict[str, Any]:
        return self.pixels.__array_interface__

    def __reduce__(self) -> tuple[Any, ...]:
        return (DecodedImage, (np.array(self.pixels),))


@dataclass(frozen=True, slots=True)
class FastDecode:
    """A fast decoder call chosen from the header (`OpenedImage.fast_decode`): which library, the
    (width, height) it must return in stored orientation, and its output format. A bare loop can
    repeat it through `fast_pixels` (the benchmark's kernels line)."""

    path: str  # "simplejpeg" (libjpeg-turbo) or "pyspng" (libspng)
    size: tuple[int, int]
    out: str  # "RGB" for JPEG; pyspng's "RGB", "RGBA" or "L"


def fast_pixels(call: FastDecode, data: bytes) -> np.ndarray | None:
    """Stored-orientation pixels from the fast decoder `call` names: HxWx3 (grey repeated into three
    equal channels), or HxWx4 for RGBA (the caller composites the alpha); None to use Pillow.

    Any error or surprise (truncated data, an unexpected output size) returns None, so Pillow
    decides and words the error.
    """
    w, h = call.size
    try:
        if call.path == "simplejpeg":
            pixels = simplejpeg.decode_jpeg(data, "RGB", min_height=h, min_width=w, strict=True)
        else:
            pixels = pyspng.load(data, call.out)
    except Exception:  # noqa: BLE001 - a fast decoder's refusals all mean: let Pillow decide
        return None
    if pixels.dtype != np.uint8 or pixels.shape[:2] != (h, w) or pixels.shape[2:] != _PNG_BANDS[call.out]:
        return None
    if call.out == "L":
        rgb = np.empty((h, w, 3), np.uint8)
        rgb[...] = pixels[:, :, None]
        return rgb
    return pixels


def orient_pixels(pixels: np.ndarray, orientation: int) -> np.ndarray:
    """Stored HxWx3 pixels turned to display orientation by an EXIF orientation (1..8), as the
    Pillow path's transpose does."""
    turn = _ORIENT_ARRAY.get(orientation)
    return pixels if turn is None else np.ascontiguousarray(turn(pixels))
