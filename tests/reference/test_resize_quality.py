"""PSNR floors of the default resize on real photographs.

Source: scikit-image sample data (`skimage.data`, bundled with the package: astronaut, coffee,
chelsea, rocket, immunohistochemistry, hubble_deep_field, retina and the stereo motorcycle pair).
Each photo is written as a quality-90 JPEG and as a PNG and taken the pipeline's way under the
default recipe at 196 tokens (header plan, the decoder and DCT scale the pipeline picks, the default
`area` resize); the reference is a full Pillow decode resized to the same plan with Lanczos.
"""

from __future__ import annotations

import io
import statistics

import numpy as np
import pytest
from PIL import Image

skdata = pytest.importorskip("skimage.data")

from patchloom import Recipe  # noqa: E402
from patchloom.bench.quality import psnr  # noqa: E402
from patchloom.image.chain import plan_for, reduce_hint  # noqa: E402
from patchloom.image.decode import decode_path_counts, open_image, reset_decode_path_counts  # noqa: E402
from patchloom.image.sizing import resize_to_plan  # noqa: E402

LIMIT = 64_000_000


def _photos() -> dict[str, np.ndarray]:
    photos = {name: getattr(skdata, name)() for name in ("astronaut", "coffee", "chelsea", "rocket",
                                                          "immunohistochemistry", "hubble_deep_field", "retina")}
    photos["motorcycle_left"], photos["motorcycle_right"], _ = skdata.stereo_motorcycle()
    return photos


@pytest.fixture(scope="module")
def encoded() -> dict[str, bytes]:
    out = {}
    for name, arr in _photos().items():
        for fmt in ("JPEG", "PNG"):
            buf = io.BytesIO()
            Image.fromarray(arr).save(buf, fmt, **({"quality": 90} if fmt == "JPEG" else {}))
            out[f"{name}.{fmt.lower()}"] = buf.getvalue()
    return out


def _recipe(resample: str | None = None) -> Recipe:
    sizing = {"patch_size": 16, "max_tokens": 196, "min_tokens": 16}
    return Recipe.from_dict({"sizing": sizing if resample is None else {**sizing, "resample": resample}})


def _scores(encoded: dict[str, bytes], recipe: Recipe) -> dict[str, float]:
    """PSNR of the pipeline's path against full decode + Lanczos, per photo and format."""
    out = {}
    for key, data in encoded.items():
        opened = open_image(data, pixel_limit=LIMIT)
        plan = plan_for(opened.height, opened.width, recipe, seed=0, epoch=0, key=key)
        ours = np.asarray(resize_to_plan(opened.decode(reduce_to=reduce_hint(opened, plan)), plan,
                                         resample=recipe.sizing.resample))
        with Image.open(io.BytesIO(data)) as im:  # the reference: Pillow, full size
            full = im.convert("RGB")
        ref = np.asarray(resize_to_plan(full, plan, resample="lanczos"))
        out[key] = psnr(ours, ref)
    return out


def test_photos_are_the_sample_images():
    """Source: scikit-image sample data (the shapes the bundled photos have)."""
    photos = _photos()
    assert photos["coffee"].shape == (400, 600, 3) and photos["retina"].shape == (1411, 1411, 3)
    assert photos["motorcycle_left"].shape == (500, 741, 3)


def test_default_area_resize_keeps_40_db_on_real_photos(encoded):
    recipe = _recipe()
    assert recipe.sizing.resample == "area"
    reset_decode_path_counts()
    scores = _scores(encoded, recipe)
    assert decode_path_counts() == {"simplejpeg": 9, "pyspng": 9}  # the fast decoders were measured
    assert statistics.fmean(scores.values()) >= 40.0, scores
    assert min(scores.values()) >= 34.0, scores  # no single photo breaks down


def test_area_sits_between_bilinear_and_bicubic(encoded):
    area = statistics.fmean(_scores(encoded, _recipe()).values())
    bilinear = statistics.fmean(_scores(encoded, _recipe("bilinear")).values())
    bicubic = statistics.fmean(_scores(encoded, _recipe("bicubic")).values())
    assert bilinear < area < bicubic, (bilinear, area, bicubic)
    nearest = statistics.fmean(_scores(encoded, _recipe("nearest")).values())
    assert nearest < 36.0  # the floor is a real bar: an aliasing filter falls well under it
