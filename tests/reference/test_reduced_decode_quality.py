"""Reduced JPEG decoding keeps the picture: PSNR against full decode + Lanczos on real photographs.

Sources: the sample photographs scikit-image ships in `skimage.data` (astronaut, coffee, rocket,
immunohistochemistry; bundled with the package), encoded here as quality-90 baseline JPEGs. The
reference is made without patchloom: Pillow decodes the whole JPEG and resizes it with Lanczos to
the plan's size, the usual offline standard (common practice). PSNR = 10 log10(255^2 / MSE) on
8-bit RGB, computed here (the textbook definition, e.g. Gonzalez & Woods, Digital Image
Processing). The floors come from outside the measurement:

- From memory (common practice in image and video coding): 40 dB PSNR on 8-bit images is the
  usual mark of visually lossless quality, so the mean over the photos must reach 40 dB.
- From memory: differences above about 35 dB are hard to see in natural images, so no photo may
  score below 35 dB.
"""

from __future__ import annotations

import io
import math

import numpy as np
import pytest
from PIL import Image

skdata = pytest.importorskip("skimage.data")

from patchloom import Recipe  # noqa: E402
from patchloom.image.decode import decode_path_counts, open_image, reset_decode_path_counts  # noqa: E402
from patchloom.image.chain import plan_for, reduce_hint  # noqa: E402
from patchloom.image.sizing import resize_to_plan  # noqa: E402

PHOTOS = ["astronaut", "coffee", "rocket", "immunohistochemistry"]

# A small budget, so that these sub-megapixel photos are large enough to decode at 1/2 scale while
# staying at least twice the plan: 48 tokens at patch 16 is about 110 px on the long side.
RECIPE = Recipe.from_dict({"sizing": {"patch_size": 16, "max_tokens": 48, "mode": "budget", "resample": "bicubic"}})


def psnr(a: np.ndarray, b: np.ndarray) -> float:
    """10 log10(255^2 / MSE) over every value of two uint8 arrays of one shape."""
    assert a.shape == b.shape and a.dtype == b.dtype == np.uint8
    mse = np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2)
    return float("inf") if mse == 0 else 10 * math.log10(255.0**2 / mse)


def pillow_full(data: bytes, size: tuple[int, int], resample: Image.Resampling) -> np.ndarray:
    """Pillow alone: decode the whole JPEG, resize it to `size` (width, height) with `resample`."""
    with Image.open(io.BytesIO(data)) as im:
        return np.asarray(im.convert("RGB").resize(size, resample))


def _jpeg(name: str) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(getattr(skdata, name)()).save(buf, "JPEG", quality=90)
    return buf.getvalue()


def _pair(data: bytes) -> tuple[np.ndarray, np.ndarray, bool]:
    """(patchloom's pixels, the Lanczos reference, whether patchloom decoded at reduced scale)."""
    opened = open_image(data, pixel_limit=10**8)
    full_size = (opened.width, opened.height)
    plan = plan_for(opened.height, opened.width, RECIPE, seed=0, epoch=0, key="k")
    assert plan.crop == (0, 0, *full_size) and (plan.content_h, plan.content_w) == (plan.height, plan.width)
    image = opened.decode(reduce_to=reduce_hint(opened, plan))
    ours = np.asarray(resize_to_plan(image, plan, resample=RECIPE.sizing.resample))
    size = (plan.width, plan.height)
    ref = pillow_full(data, size, Image.Resampling.LANCZOS)
    return ours, ref, image.size != full_size


def test_reduced_decode_of_real_photos_stays_visually_lossless() -> None:
    reset_decode_path_counts()
    scores, reduced = [], 0
    for name in PHOTOS:
        ours, ref, was_reduced = _pair(_jpeg(name))
        reduced += was_reduced
        scores.append(psnr(ours, ref))
    assert reduced == len(PHOTOS)  # every photo really took the reduced path
    assert decode_path_counts().get("simplejpeg", 0) == len(PHOTOS)  # one (reduced) decode each, ours
    assert float(np.mean(scores)) >= 40.0, scores
    assert min(scores) >= 35.0, scores


def test_decoding_reduced_to_1x_the_plan_would_lose_detail() -> None:
    """The 2x margin is needed: a 1/8 decode (below 2x) of the same photo scores clearly lower."""
    data = _jpeg("astronaut")  # 512 x 512
    ours, ref, _ = _pair(data)
    tiny = Image.open(io.BytesIO(data))
    tiny.draft("RGB", (512 // 8, 512 // 8))  # 64 px: below the ~110 px plan
    low = np.asarray(tiny.convert("RGB").resize((ref.shape[1], ref.shape[0]), Image.Resampling.BICUBIC))
    assert psnr(low, ref) < psnr(ours, ref) - 3.0
