"""The fast kernels give the same pictures as the Pillow paths, and the pipeline really takes them.

PNG through libspng (pyspng) against Pillow: pixels identical for every mode it takes, the Pillow
path for everything it does not. The `area` resize on a PIL image and on an array, whole and
fractional crop boxes. A DecodedImage hands its pixels on without a copy. Path counters (never
timing) show which decoder and which resize ran. Images are made up here.
"""

from __future__ import annotations

import io
import pickle
import struct
import tarfile
import zlib

import numpy as np
import pytest
from PIL import Image, ImageCms

import patchloom.image.decode as decode_mod
from patchloom import Pipeline, Recipe
from patchloom.image.decode import (
    DecodedImage,
    DecodeError,
    decode_path_counts,
    decode_rgb,
    open_image,
    reset_decode_path_counts,
)
from patchloom.image.sizing import (
    RESAMPLE_FILTERS,
    plan_size,
    resize_area,
    resize_path_counts,
    resize_to_plan,
    reset_resize_path_counts,
)

pytest.importorskip("pyspng")

LIMIT = 50_000_000
BG = (10, 200, 30)


def _scene(h: int = 60, w: int = 90, seed: int = 0) -> np.ndarray:
    """Made-up smooth colours with noise, and a pure red block in the top-left corner."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:h, 0:w].astype(np.float32)
    img = np.stack([np.sin(x / 9 + y / 17), np.cos(x / 23 - y / 7), np.sin((x + y) / 13)], -1) * 70 + 128
    arr = np.clip(img + rng.normal(0, 6, img.shape), 0, 255).astype(np.uint8)
    arr[:8, :8] = (255, 0, 0)
    return arr


def _png(img: Image.Image, **params) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "PNG", **params)
    return buf.getvalue()


def _both(data: bytes, monkeypatch) -> tuple[np.ndarray, np.ndarray, dict[str, int]]:
    """(shipped pixels, Pillow-path pixels, path counts of the shipped decode)."""
    reset_decode_path_counts()
    fast = np.asarray(open_image(data, pixel_limit=LIMIT).decode(background=BG))
    counts = decode_path_counts()
    with monkeypatch.context() as m:
        m.setattr(decode_mod, "pyspng", None)
        slow = np.asarray(open_image(data, pixel_limit=LIMIT).decode(background=BG))
    return fast, slow, counts


def _rgba() -> Image.Image:
    arr = np.dstack([_scene(), np.linspace(0, 255, 60 * 90).reshape(60, 90).astype(np.uint8)])
    return Image.fromarray(arr, "RGBA")


@pytest.mark.parametrize("name,make", [
    ("RGB", lambda: Image.fromarray(_scene())),
    ("RGBA, graded alpha", _rgba),
    ("RGBA, opaque", lambda: Image.fromarray(_scene()).convert("RGBA")),
    ("L", lambda: Image.fromarray(_scene()[..., 1])),
    ("P 8-bit", lambda: Image.fromarray(_scene()).convert("P", palette=Image.Palette.ADAPTIVE, colors=200)),
    ("P 4-bit", lambda: Image.fromarray(_scene()).convert("P", palette=Image.Palette.ADAPTIVE, colors=16)),
    ("P 1-bit", lambda: Image.fromarray(_scene()).convert("P", palette=Image.Palette.ADAPTIVE, colors=2)),
])
def test_png_modes_libspng_takes_decode_identically_to_pillow(name, make, monkeypatch):
    img = make()
    fast, slow, counts = _both(_png(img, bits=4) if name == "P 4-bit" else _png(img), monkeypatch)
    assert counts == {"pyspng": 1}, name
    assert fast.shape == slow.shape == (60, 90, 3) and fast.dtype == np.uint8
    np.testing.assert_array_equal(fast, slow)


def _chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def _raw_png(w: int, h: int, depth: int, colour: int, rows: list[bytes], extra: bytes = b"") -> bytes:
    """A PNG written chunk by chunk (modes Pillow does not write: 16-bit RGB, 2-bit grey, colour keys)."""
    ihdr = struct.pack(">IIBBBBB", w, h, depth, colour, 0, 0, 0)
    raw = b"".join(b"\0" + r for r in rows)
    return (b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", ihdr) + extra + _chunk(b"IDAT", zlib.compress(raw))
            + _chunk(b"IEND", b""))


def _psnr(a: np.ndarray, b: np.ndarray) -> float:
    mse = float(np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2))
    return float("inf") if mse == 0 else 10 * np.log10(255.0**2 / mse)


def _not_srgb_profile() -> bytes:
    return ImageCms.ImageCmsProfile(ImageCms.createProfile("LAB")).tobytes()


@pytest.mark.parametrize("name,data", [
    ("16-bit RGB", _raw_png(2, 1, 16, 2, [struct.pack(">6H", 0, 1, 255, 256, 65535, 32768)])),
    ("16-bit grey", _raw_png(2, 1, 16, 0, [struct.pack(">2H", 0, 40000)])),
    ("2-bit grey", _raw_png(4, 1, 2, 0, [bytes([0b00011011])])),
    ("RGB with a colour key", _raw_png(2, 1, 8, 2, [bytes([10, 20, 30, 40, 50, 60])],
                                       extra=_chunk(b"tRNS", struct.pack(">3H", 10, 20, 30)))),
    ("grey + alpha", _png(Image.fromarray(np.dstack([_scene()[..., 0], _scene()[..., 2]]), "LA"))),
    ("palette with transparency", _png(Image.fromarray(_scene()).convert("P", palette=Image.Palette.ADAPTIVE,
                                                                      colors=8), transparency=2)),
])
def test_pngs_libspng_does_not_match_take_the_pillow_path(name, data, monkeypatch):
    fast, slow, counts = _both(data, monkeypatch)
    assert counts == {"pillow": 1}, name
    np.testing.assert_array_equal(fast, slow)
    if name == "RGB with a colour key":
        assert fast[0, 0].tolist() == list(BG) and fast[0, 1].tolist() == [40, 50, 60]


def test_png_colour_profiles_srgb_fast_others_through_pillow(monkeypatch):
    img = Image.fromarray(_scene())
    srgb = ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()
    fast, slow, counts = _both(_png(img, icc_profile=srgb), monkeypatch)
    assert counts == {"pyspng": 1}
    np.testing.assert_array_equal(fast, slow)
    _, _, counts = _both(_png(img, icc_profile=_not_srgb_profile()), monkeypatch)
    assert counts == {"pillow": 1}
    grey = Image.fromarray(_scene()[..., 0])
    _, _, counts = _both(_png(grey, icc_profile=ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()),
                         monkeypatch)
    assert counts == {"pillow": 1}  # a profile on grey pixels: Pillow decides what it means


def test_animated_png_goes_through_pillow():
    frames = [Image.fromarray(_scene(seed=s)) for s in range(2)]
    buf = io.BytesIO()
    frames[0].save(buf, "PNG", save_all=True, append_images=frames[1:])
    reset_decode_path_counts()
    out = np.asarray(open_image(buf.getvalue(), pixel_limit=LIMIT).decode())
    assert decode_path_counts() == {"pillow": 1} and out.shape == (60, 90, 3)


@pytest.mark.parametrize("orientation,corner", [(1, "tl"), (3, "br"), (6, "tr"), (8, "bl")])
def test_png_exif_orientation_is_the_same_on_both_paths(orientation, corner, monkeypatch):
    exif = Image.Exif()
    exif[0x0112] = orientation
    data = _png(Image.fromarray(_scene()), exif=exif)
    fast, slow, counts = _both(data, monkeypatch)
    assert counts == {"pyspng": 1}
    np.testing.assert_array_equal(fast, slow)
    turned = orientation in (6, 8)
    assert fast.shape[:2] == ((90, 60) if turned else (60, 90))
    if open_image(data, pixel_limit=LIMIT).orientation == orientation:  # Pillow read the eXIf chunk
        k = 4
        red = {"tl": fast[:k, :k], "tr": fast[:k, -k:], "bl": fast[-k:, :k], "br": fast[-k:, -k:]}
        assert max(red, key=lambda c: float(red[c][..., 0].mean() - red[c][..., 1:].mean())) == corner


def test_damaged_png_falls_back_and_pillow_words_the_error():
    data = _png(Image.fromarray(_scene()))
    reset_decode_path_counts()
    with pytest.raises(DecodeError, match="truncated|corrupt"):
        open_image(data[: len(data) // 2], pixel_limit=LIMIT).decode()
    assert decode_path_counts() == {"pillow": 1}


def test_decoded_image_hands_its_pixels_on_without_a_copy():
    data = _png(Image.fromarray(_scene()))
    img = open_image(data, pixel_limit=LIMIT).decode()
    assert isinstance(img, DecodedImage) and img.mode == "RGB" and img.size == (90, 60)
    arr = np.asarray(img)
    assert np.shares_memory(arr, img.pixels) and not arr.flags.writeable
    # Pillow code gets its own copy when it touches the image, and sees the same pixels.
    np.testing.assert_array_equal(np.asarray(img.transpose(Image.Transpose.ROTATE_90)), np.rot90(arr))
    np.testing.assert_array_equal(np.asarray(img.convert("L")), np.asarray(Image.fromarray(arr).convert("L")))
    assert img.getpixel((0, 0)) == (255, 0, 0)
    again = pickle.loads(pickle.dumps(img))
    np.testing.assert_array_equal(np.asarray(again), arr)
    out = decode_rgb(data)
    assert out.flags.writeable and not np.shares_memory(out, arr)  # decode_rgb stays a writable copy
    with pytest.raises(ValueError, match="HxWx3 uint8"):
        DecodedImage(np.zeros((4, 4), np.uint8))


def _plan(h: int, w: int, tokens: int = 24, p: int = 8):
    return plan_size(h, w, Recipe.from_dict({"sizing": {"patch_size": p, "max_tokens": tokens}}).sizing)


def test_area_is_the_default_filter_and_registered():
    assert Recipe.from_dict({}).sizing.resample == "area"
    assert RESAMPLE_FILTERS["area"] is resize_area


def test_area_resize_is_the_same_on_a_pil_image_an_array_and_a_decoded_image():
    arr = _scene(120, 170)
    plan = _plan(120, 170)
    reset_resize_path_counts()
    from_array = resize_to_plan(arr, plan)
    from_pil = resize_to_plan(Image.fromarray(arr), plan)
    from_decoded = resize_to_plan(DecodedImage(arr), plan)
    assert isinstance(from_array, np.ndarray) and isinstance(from_pil, DecodedImage)
    np.testing.assert_array_equal(from_array, np.asarray(from_pil))
    np.testing.assert_array_equal(from_array, np.asarray(from_decoded))
    assert from_array.shape == (plan.height, plan.width, 3)
    assert resize_path_counts() == {"area": 3, "area from a Pillow copy": 1}
    # A Pillow filter on an array gives exactly Pillow's resize.
    np.testing.assert_array_equal(resize_to_plan(arr, plan, resample="bicubic"),
                                  np.asarray(Image.fromarray(arr).resize((plan.width, plan.height), Image.BICUBIC)))


@pytest.mark.parametrize("h,w,out", [(120, 170, (40, 24)), (60, 90, (40, 24)), (300, 200, (40, 64)),
                                     (30, 20, (40, 64))])
def test_area_resize_stays_close_to_lanczos(h, w, out):
    arr = _scene(h, w)
    got = resize_area(arr, out, (0, 0, w, h))
    ref = np.asarray(Image.fromarray(arr).resize(out, Image.LANCZOS))
    assert got.shape == ref.shape == (out[1], out[0], 3)
    assert _psnr(got, ref) > 30


def test_area_fractional_box_matches_the_whole_pixel_sampling():
    arr = _scene(120, 170)
    whole = resize_area(arr, (40, 24), (10, 6, 130, 78))
    as_floats = resize_area(arr, (40, 24), (10.0, 6.0, 130.0, 78.0))
    np.testing.assert_array_equal(whole, as_floats)
    shifted = resize_area(arr, (40, 24), (10.5, 6.5, 130.5, 78.5))  # the affine path
    ref = np.asarray(Image.fromarray(arr).resize((40, 24), Image.LANCZOS, box=(10.5, 6.5, 130.5, 78.5)))
    assert _psnr(shifted, ref) > 30
    assert not np.array_equal(shifted, whole)


def test_orientation_and_alpha_survive_decode_and_area_resize_on_every_path(monkeypatch):
    exif = Image.Exif()
    exif[0x0112] = 6
    buf = io.BytesIO()
    Image.fromarray(_scene(120, 180)).save(buf, "JPEG", quality=95, exif=exif)
    plan = _plan(180, 120)  # display size: 120 wide, 180 high
    fast = np.asarray(resize_to_plan(open_image(buf.getvalue(), pixel_limit=LIMIT).decode(), plan))
    with monkeypatch.context() as m:
        m.setattr(decode_mod, "simplejpeg", None)
        slow = np.asarray(resize_to_plan(open_image(buf.getvalue(), pixel_limit=LIMIT).decode(), plan))
    assert fast.shape == slow.shape == (plan.height, plan.width, 3)
    assert _psnr(fast, slow) > 35
    assert fast[:2, -2:, 0].mean() > 150 and fast[:2, -2:, 1].mean() < 100  # red marker now top-right
    png = _png(_rgba())
    a = np.asarray(resize_to_plan(open_image(png, pixel_limit=LIMIT).decode(background=BG), _plan(60, 90)))
    with monkeypatch.context() as m:
        m.setattr(decode_mod, "pyspng", None)
        b = np.asarray(resize_to_plan(open_image(png, pixel_limit=LIMIT).decode(background=BG), _plan(60, 90)))
    np.testing.assert_array_equal(a, b)


def test_the_pipeline_takes_the_fast_decoders_and_the_copy_free_resize(tmp_path):
    path = tmp_path / "mixed-000.tar"
    with tarfile.open(path, "w") as tar:
        for i in range(5):
            img = Image.fromarray(_scene(100 + 10 * i, 140, seed=i))
            buf = io.BytesIO()
            ext = "png" if i % 2 else "jpg"
            img.save(buf, "PNG" if ext == "png" else "JPEG", quality=90)
            for name, data in ((f"s{i}.{ext}", buf.getvalue()), (f"s{i}.cls", b"1")):
                info = tarfile.TarInfo(name)
                info.size = len(data)
                tar.addfile(info, io.BytesIO(data))
    recipe = Recipe.from_dict({"source": {"shards": str(path)}, "sizing": {"patch_size": 8, "max_tokens": 48},
                               "packing": {"seq_len": 256, "rows": 1, "max_images_per_row": 8}})
    reset_decode_path_counts()
    reset_resize_path_counts()
    images = sum(b.num_images for b in Pipeline(recipe))
    assert images == 5
    assert decode_path_counts() == {"simplejpeg": 3, "pyspng": 2}
    assert resize_path_counts() == {"area": 5}  # every resize read the decoder's array, no Pillow copy
