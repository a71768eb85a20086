"""Tests for patchloom.image.decode: formats, modes, alpha, 16-bit scaling, guards, errors, orientation, ICC."""

from __future__ import annotations

import io
import struct
import warnings
import zlib

import numpy as np
import pytest
from PIL import Image, ImageCms, ImageFile

from patchloom.image.decode import DecodeError, OpenedImage, dct_scale, decode_rgb, open_image, to_rgb

# ----------------------------------------------------------------------------- builders

# Four flat 8x8 blocks of distinct colours in a 16x24 (w x h) image: asymmetric, few colours (so
# GIF's palette is exact) and flat (so JPEG's error stays small away from the block edges).
_BLOCKS = [(220, 30, 40), (30, 200, 60), (40, 50, 210), (240, 230, 20), (250, 250, 250), (10, 10, 10)]


def _block_image() -> np.ndarray:
    arr = np.zeros((24, 16, 3), np.uint8)
    for i, colour in enumerate(_BLOCKS):
        r, c = divmod(i, 2)
        arr[r * 8 : r * 8 + 8, c * 8 : c * 8 + 8] = colour
    return arr


def _encode(img: Image.Image, fmt: str, **params) -> bytes:
    buf = io.BytesIO()
    img.save(buf, fmt, **params)
    return buf.getvalue()


def _chunk(kind: bytes, payload: bytes) -> bytes:
    return struct.pack(">I", len(payload)) + kind + payload + struct.pack(">I", zlib.crc32(kind + payload))


def _png(width: int, height: int, bit_depth: int, colour_type: int, rows: bytes) -> bytes:
    """A minimal PNG written by hand (for bit depths and sizes Pillow will not write for us)."""
    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, colour_type, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + _chunk(b"IHDR", ihdr)
        + _chunk(b"IDAT", zlib.compress(rows))
        + _chunk(b"IEND", b"")
    )


def _png16_rgb(arr: np.ndarray) -> bytes:
    """16-bit-per-channel RGB PNG from an HxWx3 uint16 array (filter type 0 on every row)."""
    big = arr.astype(">u2")
    rows = b"".join(b"\x00" + big[y].tobytes() for y in range(big.shape[0]))
    return _png(arr.shape[1], arr.shape[0], 16, 2, rows)


def _s15(x: float) -> bytes:
    return struct.pack(">i", round(x * 65536))


def _xyz(x: float, y: float, z: float) -> bytes:
    return b"XYZ " + bytes(4) + _s15(x) + _s15(y) + _s15(z)


def _desc(text: str) -> bytes:
    ascii_ = text.encode("ascii") + b"\x00"
    return b"desc" + bytes(4) + struct.pack(">I", len(ascii_)) + ascii_ + bytes(8) + bytes(3) + bytes(67)


def _gamma(g: float) -> bytes:
    return b"curv" + bytes(4) + struct.pack(">IH", 1, round(g * 256)) + bytes(2)


def _icc(device_class: bytes, space: bytes, pcs: bytes, tags: dict[bytes, bytes]) -> bytes:
    """A version 2 ICC profile assembled from tag payloads (ImageCms only creates sRGB/LAB/XYZ)."""
    start = 128 + 4 + 12 * len(tags)
    table, body = b"", b""
    for sig, data in tags.items():
        body += bytes(-(start + len(body)) % 4)
        table += sig + struct.pack(">II", start + len(body), len(data))
        body += data
    body += bytes(-(start + len(body)) % 4)
    size = start + len(body)
    header = (
        struct.pack(">I", size) + bytes(4) + struct.pack(">I", 0x02100000) + device_class + space + pcs
        + bytes(12) + b"acsp" + bytes(4 * 4) + bytes(8) + bytes(4)
        + _s15(0.9642) + _s15(1.0) + _s15(0.8249) + bytes(4) + bytes(16) + bytes(28)
    )
    assert len(header) == 128
    return header + struct.pack(">I", len(tags)) + table + body


D50 = (0.9642, 1.0, 0.8249)


def _linear_rgb_profile() -> bytes:
    """sRGB primaries with a linear (gamma 1.0) tone curve: a real, non-sRGB RGB profile."""
    return _icc(b"mntr", b"RGB ", b"XYZ ", {
        b"desc": _desc("patchloom test linear RGB"),
        b"wtpt": _xyz(*D50),
        b"rXYZ": _xyz(0.4361, 0.2225, 0.0139),
        b"gXYZ": _xyz(0.3851, 0.7169, 0.0971),
        b"bXYZ": _xyz(0.1431, 0.0606, 0.7141),
        b"rTRC": _gamma(1.0),
        b"gTRC": _gamma(1.0),
        b"bTRC": _gamma(1.0),
    })


def _grey_cmyk_profile() -> bytes:
    """CMYK -> Lab through a 2-point lut8: paper (no ink) is L*=50 grey, full K is black.

    Naive CMYK->RGB would make paper white (255), so a mid grey proves the profile was used.
    """
    identity = bytes(range(256))
    clut = b""
    for c in (0, 1):
        for m in (0, 1):
            for y in (0, 1):
                for k in (0, 1):
                    clut += bytes((0 if k else 128, 128, 128))
    lut = (
        b"mft1" + bytes(4) + bytes((4, 3, 2, 0))
        + b"".join(_s15(v) for v in (1, 0, 0, 0, 1, 0, 0, 0, 1))
        + identity * 4 + clut + identity * 3
    )
    return _icc(b"prtr", b"CMYK", b"Lab ", {
        b"desc": _desc("patchloom test grey CMYK"),
        b"wtpt": _xyz(*D50),
        b"A2B0": lut,
    })


def _srgb_encode(linear: np.ndarray) -> np.ndarray:
    """IEC 61966-2-1 transfer function, 0..1 linear -> 0..255 encoded."""
    v = np.where(linear <= 0.0031308, 12.92 * linear, 1.055 * np.power(linear, 1 / 2.4) - 0.055)
    return v * 255


def _with_orientation(img: Image.Image, fmt: str, orientation: int, **params) -> bytes:
    exif = Image.Exif()
    exif[0x0112] = orientation
    return _encode(img, fmt, exif=exif, **params)


@pytest.fixture(autouse=True)
def _pillow_globals_untouched():
    """No test (and so no code path in decode) may change Pillow's process-wide settings."""
    before = (Image.MAX_IMAGE_PIXELS, ImageFile.LOAD_TRUNCATED_IMAGES)
    yield
    assert (Image.MAX_IMAGE_PIXELS, ImageFile.LOAD_TRUNCATED_IMAGES) == before


# ----------------------------------------------------------------------------- formats


@pytest.mark.parametrize(
    ("fmt", "params", "tolerance"),
    [
        ("JPEG", {"quality": 95}, 12),
        ("PNG", {}, 0),
        ("WEBP", {"lossless": True}, 0),
        ("GIF", {}, 0),
        ("BMP", {}, 0),
        ("TIFF", {}, 0),
        ("TIFF", {"compression": "tiff_lzw"}, 0),
    ],
)
def test_formats_round_trip(fmt, params, tolerance):
    arr = _block_image()
    data = _encode(Image.fromarray(arr), fmt, **params)
    opened = open_image(data, pixel_limit=10_000)
    assert opened.format == fmt
    assert (opened.width, opened.height, opened.orientation) == (16, 24, 1)
    out = decode_rgb(data)
    assert out.shape == (24, 16, 3) and out.dtype == np.uint8
    diff = np.abs(out.astype(int) - arr.astype(int))
    if tolerance == 0:
        assert diff.max() == 0
    else:  # lossy: compare block centres, away from the 8x8 block edges
        for i, colour in enumerate(_BLOCKS):
            r, c = divmod(i, 2)
            centre = out[r * 8 + 2 : r * 8 + 6, c * 8 + 2 : c * 8 + 6].reshape(-1, 3)
            assert np.abs(centre.astype(int) - colour).max() <= tolerance


def test_decode_returns_rgb_pil_image_and_header_is_lazy():
    data = _encode(Image.fromarray(_block_image()), "PNG")
    opened = open_image(data, pixel_limit=10_000)
    assert isinstance(opened, OpenedImage)
    assert opened.mode == "RGB"
    assert opened.image._im is None  # header only: no pixel buffer yet
    img = opened.decode()
    assert isinstance(img, Image.Image) and img.mode == "RGB" and img.size == (16, 24)


def test_decode_rgb_array_is_writable_copy():
    out = decode_rgb(_encode(Image.new("RGB", (3, 2), (1, 2, 3)), "PNG"))
    out[0, 0] = 0  # must not raise: callers augment in place
    assert out[1, 1].tolist() == [1, 2, 3]


def test_gif_two_frames_gives_first():
    red, blue = Image.new("RGB", (5, 4), (255, 0, 0)), Image.new("RGB", (5, 4), (0, 0, 255))
    data = _encode(red, "GIF", save_all=True, append_images=[blue], duration=50, loop=0)
    assert getattr(Image.open(io.BytesIO(data)), "n_frames", 1) == 2
    out = decode_rgb(data)
    assert out.shape == (4, 5, 3)
    assert (out == (255, 0, 0)).all()


def test_animated_webp_gives_first_frame():
    green, blue = Image.new("RGB", (6, 4), (0, 255, 0)), Image.new("RGB", (6, 4), (0, 0, 255))
    data = _encode(green, "WEBP", save_all=True, append_images=[blue], lossless=True, duration=50)
    assert getattr(Image.open(io.BytesIO(data)), "n_frames", 1) == 2
    assert (decode_rgb(data) == (0, 255, 0)).all()


def test_multipage_tiff_gives_first_page():
    first, second = Image.new("RGB", (4, 3), (9, 99, 199)), Image.new("RGB", (8, 8), (0, 0, 0))
    data = _encode(first, "TIFF", save_all=True, append_images=[second])
    assert Image.open(io.BytesIO(data)).n_frames == 2
    out = decode_rgb(data)
    assert out.shape == (3, 4, 3) and (out == (9, 99, 199)).all()


# ----------------------------------------------------------------------------- modes


def _palette_image() -> Image.Image:
    img = Image.new("P", (3, 1))
    img.putpalette([255, 0, 0, 0, 255, 0, 0, 0, 255] + [0] * (253 * 3))
    img.putdata([0, 1, 2])
    return img


def _one_pixel(mode: str, value) -> Image.Image:
    return Image.new(mode, (1, 1), value)


def _rgb_of(img: Image.Image, **kw) -> list[list[int]]:
    return np.asarray(to_rgb(img, **kw)).reshape(-1, 3).tolist()


def test_mode_1():
    img = Image.fromarray(np.array([[0, 255]], np.uint8)).convert("1")
    assert img.mode == "1"
    assert _rgb_of(img) == [[0, 0, 0], [255, 255, 255]]


def test_mode_L():
    img = Image.fromarray(np.array([[0, 77, 255]], np.uint8))
    assert _rgb_of(img) == [[0, 0, 0], [77, 77, 77], [255, 255, 255]]


def test_mode_P():
    assert _rgb_of(_palette_image()) == [[255, 0, 0], [0, 255, 0], [0, 0, 255]]


def test_mode_P_with_transparent_index_composites_via_rgba():
    img = _palette_image()
    img.info["transparency"] = 1  # index 1 (green) fully transparent
    assert _rgb_of(img, background=(7, 8, 9)) == [[255, 0, 0], [7, 8, 9], [0, 0, 255]]
    # the same through a real PNG (tRNS chunk) and a real GIF
    for fmt in ("PNG", "GIF"):
        data = _encode(img, fmt, transparency=1)
        assert decode_rgb(data, background=(7, 8, 9)).reshape(-1, 3).tolist() == [
            [255, 0, 0], [7, 8, 9], [0, 0, 255]
        ], fmt


def test_mode_P_with_per_entry_alpha():
    img = _palette_image()
    img.info["transparency"] = bytes([255, 0, 128])  # PNG tRNS with one alpha per palette entry
    bg = (0, 0, 0)
    expect_blue = round((255 * 128 + 0 * 127) / 255)
    assert _rgb_of(img, background=bg) == [[255, 0, 0], [0, 0, 0], [0, 0, expect_blue]]


def test_mode_L_and_RGB_colour_key_transparency():
    grey = Image.fromarray(np.array([[10, 20]], np.uint8))
    grey.info["transparency"] = 20
    assert _rgb_of(grey, background=(1, 2, 3)) == [[10, 10, 10], [1, 2, 3]]
    rgb = Image.fromarray(np.array([[[1, 2, 3], [4, 5, 6]]], np.uint8))
    data = _encode(rgb, "PNG", transparency=(4, 5, 6))
    out = decode_rgb(data, background=(200, 201, 202))
    assert out.reshape(-1, 3).tolist() == [[1, 2, 3], [200, 201, 202]]


def _blend(c: int, a: int, b: int) -> int:
    """Straight-alpha 'over' onto an opaque background, rounded to nearest."""
    return int(np.floor((c * a + b * (255 - a)) / 255 + 0.5))


@pytest.mark.parametrize("mode", ["RGBA", "RGBa", "PA"])
def test_colour_alpha_modes_composite(mode):
    colour, a, bg = (200, 100, 50), 64, (10, 20, 30)
    if mode == "PA":
        img = Image.new("PA", (1, 1))
        img.putpalette(list(colour) + [0] * 765)
        img.putpixel((0, 0), (0, a))
    elif mode == "RGBa":  # premultiplied storage: Pillow un-premultiplies on the way to RGBA
        img = Image.new("RGBA", (1, 1), (*colour, a)).convert("RGBa")
        colour = img.convert("RGBA").getpixel((0, 0))[:3]
    else:
        img = _one_pixel("RGBA", (*colour, a))
    assert img.mode == mode
    expect = [_blend(c, a, b) for c, b in zip(colour, bg)]
    assert _rgb_of(img, background=bg) == [expect]


@pytest.mark.parametrize("mode", ["LA", "La"])
def test_grey_alpha_modes_composite(mode):
    img = Image.new("LA", (1, 1), (180, 200))
    if mode == "La":
        img = img.convert("La")
    v = img.convert("LA").getpixel((0, 0))[0]
    bg = (0, 128, 255)
    assert _rgb_of(img, background=bg) == [[_blend(v, 200, b) for b in bg]]


def test_alpha_composite_png_against_hand_formula():
    """A known pixel of an RGBA PNG blended onto a known background, checked channel by channel."""
    arr = np.array(
        [[[200, 100, 50, 64], [200, 100, 50, 0], [200, 100, 50, 255], [3, 250, 128, 191]]], np.uint8
    )
    bg = (10, 20, 30)
    out = decode_rgb(_encode(Image.fromarray(arr), "PNG"), background=bg)
    # (200*64 + 10*191)/255 = 57.69 -> 58; (100*64 + 20*191)/255 = 40.08 -> 40;
    # (50*64 + 30*191)/255 = 35.02 -> 35
    assert out[0, 0].tolist() == [58, 40, 35]
    assert out[0, 1].tolist() == list(bg)  # fully transparent -> background exactly
    assert out[0, 2].tolist() == [200, 100, 50]  # opaque -> colour exactly
    assert out[0, 3].tolist() == [_blend(c, 191, b) for c, b in zip((3, 250, 128), bg)]
    # and the default background is white
    assert decode_rgb(_encode(Image.fromarray(arr), "PNG"))[0, 1].tolist() == [255, 255, 255]


def test_rgba_webp_composites():
    data = _encode(_one_pixel("RGBA", (0, 0, 255, 0)), "WEBP", lossless=True, exact=True)
    assert decode_rgb(data, background=(1, 2, 3)).reshape(-1).tolist() == [1, 2, 3]


def test_mode_CMYK_without_profile():
    # Pillow 13's CMYK->RGB without a profile: channel = (255 - ink) * (255 - K) / 255, rounded
    c, m, y, k = 50, 0, 200, 100
    expect = [round((255 - v) * (255 - k) / 255) for v in (c, m, y)]
    assert _rgb_of(_one_pixel("CMYK", (c, m, y, k))) == [expect]
    data = _encode(Image.new("CMYK", (8, 8), (0, 255, 0, 0)), "JPEG", quality=100)
    out = decode_rgb(data)
    assert np.abs(out.astype(int) - (255, 0, 255)).max() <= 3


def test_mode_RGBX():
    assert _rgb_of(_one_pixel("RGBX", (10, 20, 30, 0))) == [[10, 20, 30]]


def test_mode_YCbCr():
    # BT.601 full range: Cb = Cr = 128 is grey with R = G = B = Y
    assert _rgb_of(_one_pixel("YCbCr", (90, 128, 128))) == [[90, 90, 90]]


def test_mode_HSV():
    assert _rgb_of(_one_pixel("HSV", (0, 255, 255))) == [[255, 0, 0]]
    assert _rgb_of(_one_pixel("HSV", (0, 0, 77))) == [[77, 77, 77]]


def test_mode_LAB():
    # L* = 100, a* = b* = 0 is white; L* = 50 is Y = ((50 + 16) / 116) ** 3, encoded by sRGB
    assert min(_rgb_of(_one_pixel("LAB", (255, 128, 128)))[0]) >= 254
    mid = _rgb_of(_one_pixel("LAB", (128, 128, 128)))[0]
    lstar = 128 / 255 * 100
    expect = float(_srgb_encode(np.array(((lstar + 16) / 116) ** 3)))
    assert max(abs(c - expect) for c in mid) <= 2


@pytest.mark.parametrize("mode", ["I;16", "I;16B", "I;16L"])
def test_16bit_modes_scaled_not_clipped(mode):
    values = np.array([[0, 300, 1000, 32768, 65535]], np.uint16)
    img = Image.fromarray(values).convert(mode) if mode != "I;16" else Image.fromarray(values)
    if mode == "I;16B":
        img = Image.frombytes("I;16B", (5, 1), values.astype(">u2").tobytes())
    elif mode == "I;16L":
        img = Image.frombytes("I;16L", (5, 1), values.astype("<u2").tobytes())
    assert img.mode == mode
    out = [p[0] for p in _rgb_of(img)]
    # round(v * 255 / 65535): 300 -> 1.17 -> 1, 1000 -> 3.89 -> 4, 32768 -> 127.5019 -> 128
    assert out == [0, 1, 4, 128, 255]
    assert out[3] != 255  # the clipping bug: values over 255 saturate to white


def test_mode_I_scaled_as_16bit():
    img = Image.fromarray(np.array([[0, 32768, 65535, 70000, -5]], np.int32))
    assert img.mode == "I"
    assert [p[0] for p in _rgb_of(img)] == [0, 128, 255, 255, 0]


def test_16bit_grey_png_and_tiff_scaled():
    values = np.array([[0, 257, 32768, 65535]], np.uint16)
    for fmt in ("PNG", "TIFF"):
        data = _encode(Image.fromarray(values), fmt)
        assert open_image(data, pixel_limit=100).mode.startswith("I;16"), fmt
        assert decode_rgb(data)[0, :, 0].tolist() == [0, 1, 128, 255], fmt


def test_16bit_rgb_png_scaled_not_clipped():
    """Pillow opens 16-bit RGB PNGs as 8-bit RGB keeping each sample's high byte (v >> 8).

    That is a scaling (not a clip) and is within 1 of round(v * 255 / 65535) for every v.
    """
    rng = np.random.default_rng(5)
    arr = rng.integers(0, 65536, size=(4, 6, 3), dtype=np.uint16)
    arr[0, 0] = (65535, 32768, 0)
    out = decode_rgb(_png16_rgb(arr))
    assert out.shape == (4, 6, 3)
    assert out[0, 0].tolist() == [255, 128, 0]
    exact = np.rint(arr.astype(np.float64) * 255 / 65535)
    assert np.abs(out.astype(int) - exact).max() <= 1


def test_16bit_grey_alpha_png():
    # grey 32768 (-> 128) at alpha 65535 (opaque), then grey 65535 at alpha 0 (transparent)
    rows = b"\x00" + np.array([32768, 65535, 65535, 0], ">u2").tobytes()
    out = decode_rgb(_png(2, 1, 16, 4, rows), background=(5, 6, 7))
    assert out.reshape(-1, 3).tolist() == [[128, 128, 128], [5, 6, 7]]


def test_mode_F_float():
    unit = Image.fromarray(np.array([[0.0, 0.5, 1.0, np.nan]], np.float32))
    assert unit.mode == "F"
    assert [p[0] for p in _rgb_of(unit)] == [0, 128, 255, 0]
    wide = Image.fromarray(np.array([[0.0, 127.6, 300.0, -4.0]], np.float32))
    assert [p[0] for p in _rgb_of(wide)] == [0, 128, 255, 0]
    data = _encode(unit, "TIFF")
    assert decode_rgb(data)[0, :3, 0].tolist() == [0, 128, 255]


def test_to_rgb_rejects_bad_background():
    with pytest.raises(ValueError, match="background"):
        to_rgb(Image.new("RGB", (1, 1)), background=(0, 0, 300))


# ----------------------------------------------------------------------------- guards


def _huge_png_header(width: int, height: int) -> bytes:
    """A valid PNG header claiming a large size, with almost no pixel data behind it."""
    return _png(width, height, 8, 2, b"\x00" * 64)


def test_pixel_limit_rejects_from_header_before_decoding(monkeypatch):
    loads = []
    original = ImageFile.ImageFile.load
    monkeypatch.setattr(ImageFile.ImageFile, "load", lambda self: loads.append(1) or original(self))
    # a real image one pixel over the limit
    data = _encode(Image.new("RGB", (10, 10)), "PNG")
    over = r"10x10 = 100 pixels, over decode.pixel_limit=99; raise decode.pixel_limit"
    with pytest.raises(DecodeError, match=over):
        open_image(data, pixel_limit=99)
    assert open_image(data, pixel_limit=100).width == 10
    # a header claiming 10000x10000 with no real pixel data: the limit, not the decoder, answers
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # Pillow's DecompressionBombWarning must be silenced
        over = r"10000x10000 = 100000000 pixels, over decode.pixel_limit=64000000"
        with pytest.raises(DecodeError, match=over):
            decode_rgb(_huge_png_header(10_000, 10_000))
    assert loads == []


def test_our_limit_governs_between_pillow_warning_and_error():
    """100 M pixels is past Pillow's warning threshold; a raised per-call limit lets it open quietly."""
    default = Image.MAX_IMAGE_PIXELS
    assert default is not None and default < 100_000_000 < 2 * default
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        opened = open_image(_huge_png_header(10_000, 10_000), pixel_limit=150_000_000)
    assert (opened.width, opened.height) == (10_000, 10_000)
    assert Image.MAX_IMAGE_PIXELS == default


def test_pillow_hard_limit_becomes_decode_error():
    data = _huge_png_header(20_000, 20_000)  # 400 M pixels: over 2 x Pillow's default limit
    over = r"400000000 pixels.*MAX_IMAGE_PIXELS.*decode.pixel_limit=500000000"
    with pytest.raises(DecodeError, match=over) as info:
        open_image(data, pixel_limit=500_000_000)
    assert isinstance(info.value.__cause__, Image.DecompressionBombError)
    with pytest.raises(DecodeError, match="decode.pixel_limit=64000000"):
        open_image(data, pixel_limit=64_000_000)


def test_pixel_limit_must_be_positive():
    with pytest.raises(ValueError, match="pixel_limit"):
        open_image(b"", pixel_limit=0)


# ----------------------------------------------------------------------------- errors


@pytest.mark.parametrize("data", [b"", b"hello, not an image", bytes(range(256)) * 4, b"\x89PNG\r\n\x1a\n"])
def test_not_an_image(data):
    with pytest.raises(DecodeError, match="not a readable image.*image_keys") as info:
        decode_rgb(data)
    assert not isinstance(info.value, OSError)


def _noise(size=(48, 40)) -> Image.Image:
    return Image.fromarray(np.random.default_rng(1).integers(0, 256, (size[1], size[0], 3), dtype=np.uint8))


@pytest.mark.parametrize("fmt", ["JPEG", "PNG", "WEBP", "TIFF", "BMP", "GIF"])
def test_truncated_data(fmt):
    data = _encode(_noise(), fmt)
    cut = data[: len(data) * 2 // 3]
    with pytest.raises(DecodeError) as info:
        decode_rgb(cut)
    assert not isinstance(info.value, OSError)
    message = str(info.value)
    causes = ("truncated image data", "corrupt image data", "not a readable image")
    assert any(cause in message for cause in causes)
    if fmt in ("JPEG", "PNG"):
        assert "truncated image data (" in message and "on_error" in message
    assert ImageFile.LOAD_TRUNCATED_IMAGES is False


def test_corrupt_png_data():
    data = bytearray(_encode(_noise(), "PNG"))
    data[120:200] = b"\xff" * 80  # inside the IDAT stream
    with pytest.raises(DecodeError, match=r"(corrupt|truncated) image data \("):
        decode_rgb(bytes(data))


def test_format_outside_the_accepted_list():
    data = _encode(Image.new("RGB", (4, 4)), "PPM")
    with pytest.raises(DecodeError, match="JPEG, PNG, WEBP, GIF, BMP, TIFF"):
        open_image(data, pixel_limit=100)


# ----------------------------------------------------------------------------- orientation


@pytest.mark.parametrize("fmt", ["JPEG", "PNG", "TIFF"])
@pytest.mark.parametrize("orientation", range(1, 9))
def test_header_size_equals_decoded_size(orientation, fmt):
    data = _with_orientation(Image.fromarray(_block_image()), fmt, orientation)
    opened = open_image(data, pixel_limit=10_000)
    assert opened.orientation == orientation
    expect = (24, 16) if orientation >= 5 else (16, 24)
    assert (opened.width, opened.height) == expect
    assert opened.decode().size == expect


@pytest.mark.parametrize(("fmt", "params"), [
    ("PNG", {}), ("WEBP", {"lossless": True}), ("TIFF", {}), ("TIFF", {"compression": "tiff_lzw"}),
])
def test_orientation_in_other_formats(fmt, params):
    """TIFF matters most: Pillow's TIFF reader applies the orientation itself; not twice."""
    img = Image.fromarray(_block_image())
    data = _with_orientation(img, fmt, 6, **params)
    opened = open_image(data, pixel_limit=10_000)
    assert (opened.orientation, opened.width, opened.height) == (6, 24, 16)
    out = np.asarray(opened.decode())
    assert np.array_equal(out, np.rot90(_block_image(), k=-1))  # 90 degrees clockwise


def test_bad_orientation_value_is_ignored():
    data = _with_orientation(Image.new("RGB", (4, 2)), "JPEG", 9)
    opened = open_image(data, pixel_limit=100)
    assert (opened.orientation, opened.width, opened.height) == (1, 4, 2)


# ----------------------------------------------------------------------------- ICC


def test_srgb_tagged_image_passes_unchanged():
    arr = _block_image()
    srgb = ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()
    data = _encode(Image.fromarray(arr), "PNG", icc_profile=srgb)
    assert Image.open(io.BytesIO(data)).info["icc_profile"] == srgb
    assert np.array_equal(decode_rgb(data), arr)


def test_non_srgb_rgb_profile_is_converted():
    """Linear-light pixels tagged with a linear profile come out sRGB-encoded."""
    levels = np.array([0, 32, 64, 128, 200, 255], np.uint8)
    arr = np.repeat(levels[None, :, None], 3, axis=2)
    data = _encode(Image.fromarray(arr), "PNG", icc_profile=_linear_rgb_profile())
    out = decode_rgb(data)[0].astype(float)
    expect = _srgb_encode(levels / 255.0)
    assert np.abs(out - expect[:, None]).max() <= 2
    assert out[3, 0] > 180  # without colour management it would stay 128


def test_cmyk_jpeg_with_profile_is_converted():
    """The test profile maps any C/M/Y to grey and K to darkness (see _grey_cmyk_profile).

    Full cyan would be (0, 255, 255) without colour management; through the profile it is the
    L*=50 grey. (littlecms pins unprinted paper to white, so paper itself is not a useful probe.)
    """
    img = Image.new("CMYK", (16, 8), (255, 0, 0, 0))
    img.paste((0, 0, 0, 128), (8, 0, 16, 8))
    data = _encode(img, "JPEG", quality=100, icc_profile=_grey_cmyk_profile())
    out = decode_rgb(data).astype(float)

    def grey(lstar: float) -> float:
        return float(_srgb_encode(np.array(((lstar + 16) / 116) ** 3)))

    cyan_grey = grey(128 / 255 * 100)  # about 119
    half_k = grey(128 / 255 * 100 * (1 - 128 / 255))  # K interpolated halfway to black, about 59
    assert np.abs(out[2:6, 2:6] - cyan_grey).max() <= 3
    assert np.abs(out[2:6, 10:14] - half_k).max() <= 3


def test_profile_of_the_wrong_colour_space_is_ignored():
    img = Image.fromarray(np.array([[10, 200]], np.uint8))  # L image
    data = _encode(img, "PNG", icc_profile=_linear_rgb_profile())  # but an RGB profile
    assert decode_rgb(data)[0].tolist() == [[10, 10, 10], [200, 200, 200]]


def test_without_littlecms_profiles_are_skipped_quietly(monkeypatch):
    import patchloom.image.decode as decode

    monkeypatch.setattr(decode, "ImageCms", None)
    arr = np.full((2, 3, 3), 128, np.uint8)
    data = _encode(Image.fromarray(arr), "PNG", icc_profile=_linear_rgb_profile())
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert np.array_equal(decode_rgb(data), arr)  # unmanaged, unchanged, no warning


def test_unreadable_profile_is_ignored():
    img = Image.new("RGB", (2, 2), (10, 20, 30))
    img.info["icc_profile"] = b"not a profile at all"
    assert _rgb_of(img) == [[10, 20, 30]] * 4


# ----------------------------------------------------------------------------- reduce_to


def test_reduce_to_stays_at_least_twice_the_plan():
    data = _encode(Image.fromarray(np.kron(_block_image(), np.ones((4, 4, 1), np.uint8))), "JPEG")  # 64x96
    full = open_image(data, pixel_limit=10_000).decode()
    assert full.size == (64, 96)
    small = open_image(data, pixel_limit=10_000).decode(reduce_to=(8, 12))
    assert small.size == (16, 24)  # 1/4: 16 >= 2 * 8; 1/8 would be 8 < 2 * 8
    half = open_image(data, pixel_limit=10_000).decode(reduce_to=(16, 24))
    assert half.size == (32, 48)
    odd = open_image(data, pixel_limit=10_000).decode(reduce_to=(10, 13))
    assert odd.size[0] >= 20 and odd.size[1] >= 26 and odd.size[0] < 64
    big = open_image(data, pixel_limit=10_000).decode(reduce_to=(40, 60))  # 2x would be over the image
    assert big.size == (64, 96)


def test_dct_scale_is_a_power_of_two_keeping_the_margin():
    assert dct_scale((4000, 3000), (224, 160)) == 8  # 500x375 >= 448x320
    assert dct_scale((4000, 3000), (300, 200)) == 4  # 1/8 gives 500 < 600
    assert dct_scale((500, 430), (224, 192)) == 1  # typical web image at 196 tokens: full decode
    assert dct_scale((1000, 1000), (250, 250), margin=1) == 4
    assert dct_scale((17, 9), (1, 1)) == 1  # 1/8 and 1/4 round unevenly (3x2, 5x3); 1/2 -> 9x5 also uneven
    with pytest.raises(ValueError, match="positive"):
        dct_scale((10, 10), (0, 5))


def test_reduce_to_keeps_the_aspect_of_small_images():
    data = _encode(Image.new("RGB", (17, 9), (50, 60, 70)), "JPEG")  # / 8 would round to 3x2
    out = open_image(data, pixel_limit=1_000).decode(reduce_to=(1, 1))
    assert out.size == (17, 9)


def test_reduce_to_is_in_display_orientation():
    img = Image.fromarray(np.kron(_block_image(), np.ones((4, 4, 1), np.uint8)))  # stored 64x96
    data = _with_orientation(img, "JPEG", 6)
    opened = open_image(data, pixel_limit=10_000)
    assert (opened.width, opened.height) == (96, 64)
    out = opened.decode(reduce_to=(24, 16))
    assert out.size == (48, 32)
    out = open_image(data, pixel_limit=10_000).decode(reduce_to=(45, 10))  # 2 * 45 > 96 / 2: no reduction
    assert out.size == (96, 64)


def test_reduce_to_ignored_for_png():
    data = _encode(Image.fromarray(_block_image()), "PNG")
    assert open_image(data, pixel_limit=10_000).decode(reduce_to=(2, 3)).size == (16, 24)


# ----------------------------------------------------------------------------- row bands


@pytest.fixture
def small_bands(monkeypatch):
    """Row bands of 7 pixels, so a 13x11 image is converted in 13 bands (one row each)."""
    import patchloom.image.decode as dec

    monkeypatch.setattr(dec, "_BAND_PIXELS", 7)
    return dec


def test_banded_composite_equals_the_whole_image_formula(small_bands):
    rng = np.random.default_rng(5)
    c = rng.integers(0, 256, (13, 11, 3), dtype=np.uint8)
    a = rng.integers(0, 256, (13, 11), dtype=np.uint8)
    a[0, 0], a[0, 1] = 0, 255
    bg = (255, 0, 37)
    expect = (c.astype(np.int64) * a[..., None] + np.array(bg) * (255 - a[..., None].astype(np.int64)) + 127) // 255
    out = np.asarray(small_bands._composite(Image.fromarray(c), a, bg))
    assert np.array_equal(out, expect.astype(np.uint8))


def test_banded_16bit_and_float_scaling_equal_the_whole_image_formulas(small_bands):
    rng = np.random.default_rng(6)
    v = rng.integers(-1000, 70000, (13, 11), dtype=np.int32)  # mode I: out-of-range values clamp
    expect = (np.clip(v.astype(np.int64), 0, 65535) * 255 + 32767) // 65535
    assert np.array_equal(small_bands._scale_16bit(v), expect.astype(np.uint8))
    f = rng.random((13, 11)).astype(np.float32)
    f[0, :3] = [np.nan, np.inf, -np.inf]
    # 0..1 data: scaled by 255; then a value over 1 in the last band only makes the whole image 0..255
    expect_01 = np.clip(np.rint(np.nan_to_num(f.astype(np.float64), nan=0, posinf=1, neginf=0) * 255), 0, 255)
    assert np.array_equal(small_bands._scale_float(f), expect_01.astype(np.uint8))
    f[-1, -1] = 200.0
    expect_255 = np.clip(np.rint(np.nan_to_num(f.astype(np.float64), nan=0, posinf=255, neginf=0)), 0, 255)
    assert np.array_equal(small_bands._scale_float(f), expect_255.astype(np.uint8))
