"""patchloom.image.decode checked against outside definitions (each test names its source)."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from patchloom.image.decode import decode_rgb, open_image

# Stored image: 48 wide x 32 high, mid grey, with two 8x8 marks (JPEG-safe flat blocks):
# red at the stored top-left corner, green at the stored top-right corner.
W, H, M = 48, 32, 8
RED, GREEN, GREY = (230, 20, 20), (20, 220, 20), (128, 128, 128)


def _marked_jpeg(orientation: int) -> bytes:
    arr = np.full((H, W, 3), GREY, np.uint8)
    arr[:M, :M] = RED
    arr[:M, -M:] = GREEN
    exif = Image.Exif()
    exif[0x0112] = orientation  # Orientation tag
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, "JPEG", quality=95, exif=exif)
    return buf.getvalue()


def _corner(out: np.ndarray, where: str) -> np.ndarray:
    """Mean colour of the 4x4 centre of the 8x8 mark at a display corner."""
    rows = slice(2, 6) if where[0] == "t" else slice(-6, -2)
    cols = slice(2, 6) if where[1] == "l" else slice(-6, -2)
    return out[rows, cols].reshape(-1, 3).mean(axis=0)


@pytest.mark.parametrize(
    ("orientation", "display_size", "red_at", "green_at"),
    [
        # 6: "The 0th row is the visual right-hand side of the image, and the 0th column is the
        #    visual top" -> shown rotated 90 degrees clockwise.
        (6, (H, W), "tr", "br"),
        # 3: "The 0th row is the visual bottom of the image, and the 0th column is the visual
        #    right-hand side" -> shown rotated 180 degrees.
        (3, (W, H), "br", "bl"),
        # 8: "The 0th row is the visual left-hand side of the image, and the 0th column is the
        #    visual bottom" -> shown rotated 90 degrees counter-clockwise.
        (8, (H, W), "bl", "tl"),
        # 1: "The 0th row is the visual top of the image, and the 0th column is the visual
        #    left-hand side" -> shown as stored.
        (1, (W, H), "tl", "tr"),
    ],
)
def test_exif_orientation_per_standard(orientation, display_size, red_at, green_at):
    """Source: EXIF standard (JEITA CP-3451), tag 0x0112 Orientation, values 1, 3, 6 and 8.

    The quoted row/column sentences are the standard's definitions of each value. The stored
    top-left corner (red) and top-right corner (green) must land where those definitions put them.
    """
    data = _marked_jpeg(orientation)
    opened = open_image(data, pixel_limit=10_000)
    assert (opened.orientation, opened.width, opened.height) == (orientation, *display_size)
    out = decode_rgb(data)
    assert (out.shape[1], out.shape[0]) == display_size
    assert np.abs(_corner(out, red_at) - RED).max() <= 12
    assert np.abs(_corner(out, green_at) - GREEN).max() <= 12
    others = {"tl", "tr", "bl", "br"} - {red_at, green_at}
    for where in others:
        assert np.abs(_corner(out, where) - GREY).max() <= 12


def test_greyscale_uses_bt601_luma_weights():
    """Source: Pillow's documentation of Image.convert: converting RGB to "L" uses the ITU-R 601-2
    luma transform L = R * 299/1000 + G * 587/1000 + B * 114/1000.

    An RGB image converted to L, stored as PNG and decoded, must come back with R = G = B equal to
    that formula (within 1 for Pillow's fixed-point rounding).
    """
    rng = np.random.default_rng(601)
    rgb = rng.integers(0, 256, size=(8, 16, 3), dtype=np.uint8)
    rgb[0, :6] = [(255, 0, 0), (0, 255, 0), (0, 0, 255), (255, 255, 255), (0, 0, 0), (10, 200, 90)]
    buf = io.BytesIO()
    Image.fromarray(rgb).convert("L").save(buf, "PNG")
    out = decode_rgb(buf.getvalue()).astype(int)
    assert (out[..., 0] == out[..., 1]).all() and (out[..., 1] == out[..., 2]).all()
    r, g, b = (rgb[..., i].astype(float) for i in range(3))
    luma = r * 299 / 1000 + g * 587 / 1000 + b * 114 / 1000
    assert np.abs(out[..., 0] - luma).max() <= 1
    assert out[0, :3, 0].tolist() == [76, 150, 29]  # the pure primaries: 76.245, 149.685, 29.07
