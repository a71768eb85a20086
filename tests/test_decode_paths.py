"""The libjpeg-turbo (simplejpeg) path and the Pillow path give the same pictures.

Every case decodes the same bytes twice, once as shipped and once with the fast path switched off,
and compares orientation (size and a marked corner) and pixels (PSNR). The path counter, not
timing, shows which decoder ran.
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image, ImageCms

import patchloom.image.decode as decode_mod
from patchloom.image.decode import DecodeError, decode_path_counts, open_image, reset_decode_path_counts

pytest.importorskip("simplejpeg")

LIMIT = 50_000_000


def _scene(h: int = 240, w: int = 320, seed: int = 0) -> np.ndarray:
    """A smooth made-up scene with some texture, plus a pure red block in the top-left corner."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:h, 0:w].astype(np.float32)
    img = np.stack([np.sin(x / 23 + y / 41), np.cos(x / 57 - y / 19), np.sin((x + y) / 31)], -1) * 70 + 128
    img += rng.normal(0, 4, img.shape)
    arr = np.clip(img, 0, 255).astype(np.uint8)
    arr[:32, :32] = (255, 0, 0)
    return arr


def _jpeg(img: Image.Image, **params) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "JPEG", quality=90, **params)
    return buf.getvalue()


def _oriented(img: Image.Image, orientation: int, **params) -> bytes:
    exif = Image.Exif()
    exif[0x0112] = orientation
    return _jpeg(img, exif=exif, **params)


def _psnr(a: np.ndarray, b: np.ndarray) -> float:
    mse = np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2)
    return float("inf") if mse == 0 else 10 * np.log10(255.0**2 / mse)


def _both(data: bytes, monkeypatch, reduce_to=None) -> tuple[np.ndarray, np.ndarray, dict[str, int]]:
    """(fast-path pixels, Pillow-path pixels, path counts of the first decode)."""
    reset_decode_path_counts()
    fast = np.asarray(open_image(data, pixel_limit=LIMIT).decode(reduce_to=reduce_to))
    counts = decode_path_counts()
    with monkeypatch.context() as m:
        m.setattr(decode_mod, "simplejpeg", None)
        slow = np.asarray(open_image(data, pixel_limit=LIMIT).decode(reduce_to=reduce_to))
    return fast, slow, counts


def _red_corner(arr: np.ndarray) -> str:
    """Which corner holds the red marker block: 'tl', 'tr', 'bl' or 'br'."""
    h, w = arr.shape[:2]
    k = max(2, min(h, w) // 40)
    corners = {"tl": arr[:k, :k], "tr": arr[:k, -k:], "bl": arr[-k:, :k], "br": arr[-k:, -k:]}
    red = {name: float(c[..., 0].mean() - c[..., 1:].mean()) for name, c in corners.items()}
    return max(red, key=red.get)


def test_baseline_jpeg_takes_the_fast_path_and_matches_pillow(monkeypatch):
    data = _jpeg(Image.fromarray(_scene()))
    fast, slow, counts = _both(data, monkeypatch)
    assert counts == {"simplejpeg": 1}
    assert fast.shape == slow.shape == (240, 320, 3)
    assert _psnr(fast, slow) >= 35


@pytest.mark.parametrize("reduce_to,expect", [((80, 60), (160, 120)), ((40, 30), (80, 60)), ((20, 15), (40, 30))])
def test_scaled_decode_matches_pillow_draft(monkeypatch, reduce_to, expect):
    data = _jpeg(Image.fromarray(_scene()))
    fast, slow, counts = _both(data, monkeypatch, reduce_to=reduce_to)
    assert counts == {"simplejpeg": 1}
    assert fast.shape[:2] == slow.shape[:2] == expect[::-1]
    assert _psnr(fast, slow) >= 35


@pytest.mark.parametrize("orientation,corner", [(1, "tl"), (2, "tr"), (3, "br"), (4, "bl"), (5, "tl"), (6, "tr"),
                                                (7, "br"), (8, "bl")])
def test_exif_orientation_is_the_same_on_both_paths(monkeypatch, orientation, corner):
    data = _oriented(Image.fromarray(_scene()), orientation)
    fast, slow, counts = _both(data, monkeypatch, reduce_to=(60, 60))
    assert counts == {"simplejpeg": 1}
    assert fast.shape == slow.shape
    assert (fast.shape[1] > fast.shape[0]) == (orientation < 5)  # 90-degree turns swap the sides
    assert _red_corner(fast) == _red_corner(slow) == corner
    assert _psnr(fast, slow) >= 35


def test_grayscale_jpeg_becomes_equal_rgb_channels(monkeypatch):
    grey = Image.fromarray(_scene()).convert("L")
    fast, slow, counts = _both(_jpeg(grey), monkeypatch)
    assert counts == {"simplejpeg": 1}
    assert fast.shape == slow.shape == (240, 320, 3)
    assert np.array_equal(fast[..., 0], fast[..., 2])
    assert _psnr(fast, slow) >= 35


def test_progressive_jpeg_matches(monkeypatch):
    data = _jpeg(Image.fromarray(_scene()), progressive=True)
    assert Image.open(io.BytesIO(data)).info.get("progressive")
    fast, slow, counts = _both(data, monkeypatch, reduce_to=(40, 30))
    assert counts == {"simplejpeg": 1}
    assert fast.shape == slow.shape
    assert _psnr(fast, slow) >= 35


def test_cmyk_jpeg_goes_through_pillow(monkeypatch):
    cmyk = Image.fromarray(_scene()).convert("CMYK")
    fast, slow, counts = _both(_jpeg(cmyk), monkeypatch, reduce_to=(80, 60))
    assert counts == {"pillow": 1}
    assert np.array_equal(fast, slow)
    assert _red_corner(fast) == "tl"


def test_non_srgb_profile_goes_through_pillow_and_srgb_does_not(monkeypatch):
    img = Image.fromarray(_scene())
    lab_profile = ImageCms.ImageCmsProfile(ImageCms.createProfile("LAB")).tobytes()  # not sRGB
    reset_decode_path_counts()
    open_image(_jpeg(img, icc_profile=lab_profile), pixel_limit=LIMIT).decode()
    assert decode_path_counts() == {"pillow": 1}
    srgb = ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()
    fast, slow, counts = _both(_jpeg(img, icc_profile=srgb), monkeypatch)
    assert counts == {"simplejpeg": 1}
    assert _psnr(fast, slow) >= 35


def test_png_takes_libspng_and_webp_pillow():
    img = Image.fromarray(_scene())
    for fmt, path in (("PNG", "pyspng" if decode_mod.pyspng is not None else "pillow"), ("WEBP", "pillow")):
        buf = io.BytesIO()
        img.save(buf, fmt)
        reset_decode_path_counts()
        open_image(buf.getvalue(), pixel_limit=LIMIT).decode(reduce_to=(40, 30))
        assert decode_path_counts() == {path: 1}, fmt


def test_truncated_jpeg_falls_back_and_pillow_words_the_error():
    data = _jpeg(Image.fromarray(_scene()))
    cut = data[: len(data) // 2]
    reset_decode_path_counts()
    with pytest.raises(DecodeError, match="truncated"):
        open_image(cut, pixel_limit=LIMIT).decode()
    assert decode_path_counts() == {"pillow": 1}
