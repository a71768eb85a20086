"""Reduced JPEG decoding keeps the picture: PSNR against full decode + Lanczos on real photographs.

Sources: the sample photographs scikit-image ships in `skimage.data` (astronaut, coffee, rocket,
immunohistochemistry; bundled with the package), encoded here as quality-90 baseline JPEGs. The
reference is a full-resolution decode resized with Lanczos to the same size plan, the usual
offline standard (common practice). PSNR = 10 log10(255^2 / MSE) on 8-bit RGB (the textbook
definition, e.g. Gonzalez & Woods, Digital Image Processing). The thresholds are the project's
quality target, 39 dB mean, and 35 dB for any single photo (from memory: differences above about
35-40 dB are hard to see in natural images). Measured when written: 40.4, 43.2, 41.4, 42.0 dB.
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

skdata = pytest.importorskip("skimage.data")

from patchloom import Recipe  # noqa: E402
from patchloom.bench.quality import psnr  # noqa: E402
from patchloom.image.decode import decode_path_counts, open_image, reset_decode_path_counts  # noqa: E402
from patchloom.image.chain import plan_for, reduce_hint  # noqa: E402
from patchloom.image.sizing import resize_to_plan  # noqa: E402

PHOTOS = ["astronaut", "coffee", "rocket", "immunohistochemistry"]

# A small budget, so that these sub-megapixel photos are large enough to decode at 1/2 scale while
# staying at least twice the plan: 48 tokens at patch 16 is about 110 px on the long side.
RECIPE = Recipe.from_dict({"sizing": {"patch_size": 16, "max_tokens": 48, "mode": "budget"}})


def _jpeg(name: str) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(getattr(skdata, name)()).save(buf, "JPEG", quality=90)
    return buf.getvalue()


def _pair(data: bytes) -> tuple[np.ndarray, np.ndarray, bool]:
    opened = open_image(data, pixel_limit=10**8)
    plan = plan_for(opened.height, opened.width, RECIPE, seed=0, epoch=0, key="k")
    image = opened.decode(reduce_to=reduce_hint(opened, plan))
    full = open_image(data, pixel_limit=10**8).decode()
    ours = np.asarray(resize_to_plan(image, plan, resample=RECIPE.sizing.resample))
    ref = np.asarray(resize_to_plan(full, plan, resample="lanczos"))
    return ours, ref, image.size != full.size


def test_reduced_decode_of_real_photos_stays_above_39_db() -> None:
    reset_decode_path_counts()
    scores, reduced = [], 0
    for name in PHOTOS:
        ours, ref, was_reduced = _pair(_jpeg(name))
        reduced += was_reduced
        scores.append(psnr(ours, ref))
    assert reduced == len(PHOTOS)  # every photo really took the reduced path
    assert decode_path_counts().get("simplejpeg", 0) == 2 * len(PHOTOS)
    assert float(np.mean(scores)) >= 39.0, scores
    assert min(scores) >= 35.0, scores


def test_decoding_reduced_to_1x_the_plan_would_lose_detail() -> None:
    """The 2x margin is needed: a 1/8 decode (below 2x) of the same photo scores clearly lower."""
    data = _jpeg("astronaut")  # 512 x 512
    opened = open_image(data, pixel_limit=10**8)
    plan = plan_for(opened.height, opened.width, RECIPE, seed=0, epoch=0, key="k")
    full = open_image(data, pixel_limit=10**8).decode()
    ref = np.asarray(resize_to_plan(full, plan, resample="lanczos"))
    ours, _, _ = _pair(data)
    tiny = Image.open(io.BytesIO(data))
    tiny.draft("RGB", (512 // 8, 512 // 8))  # 64 px: below the ~110 px plan; upscaled back
    low = np.asarray(resize_to_plan(tiny.convert("RGB").resize(full.size, Image.BICUBIC), plan,
                                    resample=RECIPE.sizing.resample))
    assert psnr(low, ref) < psnr(ours, ref) - 3.0
