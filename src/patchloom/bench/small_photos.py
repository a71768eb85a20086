"""The second benchmark corpus, `photos-small`: real photographs at everyday sizes, a fifth of them PNG.

The `photos` corpus is drawn scenes with one large camera image in ten, where decoding in the DCT
pays most. Training sets of photos are mostly small: a short side of a few hundred pixels. This
corpus re-cuts the real sample photographs that scikit-image ships (`skimage.data`: astronaut,
coffee, chelsea, rocket, immunohistochemistry, hubble_deep_field, retina, the stereo motorcycle
pair, and a few grey ones) into crops of common camera aspects, rescaled (Lanczos) to a short side
of 150 to 900 px (median about 360), mirrored at random. 80 % are written as baseline JPEG
(quality 75 to 95, mostly 4:2:0, a few progressive or grey), 20 % as PNG (a tenth of those with an
opaque alpha channel, as exported files often have). Made on first use (a few seconds) and reused.
"""

from __future__ import annotations

import io
import json
import math
from pathlib import Path

import numpy as np
from PIL import Image

from .photos import corpus_is_current, write_sample_shards

__all__ = ["SMALL_RGB_SOURCES", "SMALL_GREY_SOURCES", "make_small_photo_shards", "small_photo_shard_pattern",
           "small_photo_size"]

_STEM = "photos-small-"

#: scikit-image sample photographs the corpus is cut from (colour, then grey).
SMALL_RGB_SOURCES = ("astronaut", "coffee", "chelsea", "rocket", "immunohistochemistry", "hubble_deep_field",
                     "retina", "motorcycle_left", "motorcycle_right")
SMALL_GREY_SOURCES = ("camera", "coins", "moon", "brick", "grass", "gravel")

#: Long side / short side of the crops, with their shares: the usual camera and web aspects.
_ASPECTS = ((4 / 3, 0.45), (3 / 2, 0.25), (1.0, 0.10), (16 / 9, 0.10), (2.0, 0.10))

#: At most this upscale from a source crop (larger targets take a larger source).
_MAX_UPSCALE = 1.6


def _load_sources() -> dict[str, np.ndarray]:
    """The sample photos as uint8 arrays (HxWx3 or HxW), from the scikit-image package itself."""
    try:
        from skimage import data as skdata
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError("the photos-small benchmark corpus is cut from scikit-image's sample photos: "
                          "pip install scikit-image (or patchloom[test])") from exc
    out: dict[str, np.ndarray] = {}
    for name in SMALL_RGB_SOURCES + SMALL_GREY_SOURCES:
        if name.startswith("motorcycle_"):
            left, right, _ = skdata.stereo_motorcycle()
            out["motorcycle_left"], out["motorcycle_right"] = left, right
        elif name not in out:
            out[name] = np.asarray(getattr(skdata, name)(), dtype=np.uint8)
    return out


def small_photo_size(rng: np.random.Generator) -> tuple[int, int]:
    """(height, width) of one corpus image: short side 150..900 px (median about 360), a camera or web
    aspect, portrait one time in four."""
    if rng.random() < 0.6:
        short = rng.lognormal(math.log(360), 0.2)
    else:
        short = math.exp(rng.uniform(math.log(150), math.log(900)))
    short = int(round(min(900.0, max(150.0, short))))
    ratios = np.array([a for a, _ in _ASPECTS])
    shares = np.array([s for _, s in _ASPECTS])
    long_ = int(round(short * float(rng.choice(ratios, p=shares / shares.sum()))))
    return (long_, short) if rng.random() < 0.25 else (short, long_)


def _cut(src: np.ndarray, h: int, w: int, rng: np.random.Generator) -> np.ndarray:
    """A random crop of `src` with the aspect of h x w (60 to 100 % of the largest such crop), resized
    to h x w with Lanczos and mirrored half the time."""
    sh, sw = src.shape[:2]
    fit = min(sh / h, sw / w)  # largest crop of this aspect: (h * fit) x (w * fit)
    share = rng.uniform(0.6, 1.0)
    ch, cw = max(1, int(h * fit * share)), max(1, int(w * fit * share))
    top, left = int(rng.integers(0, sh - ch + 1)), int(rng.integers(0, sw - cw + 1))
    crop = Image.fromarray(np.ascontiguousarray(src[top:top + ch, left:left + cw]))
    out = crop.resize((w, h), Image.Resampling.LANCZOS)
    return np.asarray(out.transpose(Image.Transpose.FLIP_LEFT_RIGHT) if rng.random() < 0.5 else out)


def _encode(arr: np.ndarray, rng: np.random.Generator) -> tuple[bytes, str, dict]:
    """(bytes, extension, metadata) of one image: JPEG 80 %, PNG 20 % (a tenth of them RGBA)."""
    img = Image.fromarray(arr)
    buf = io.BytesIO()
    if rng.random() < 0.2:
        if img.mode == "RGB" and rng.random() < 0.1:
            img.putalpha(255)
        img.save(buf, "PNG")
        return buf.getvalue(), "png", {"format": "PNG", "mode": img.mode}
    quality = int(np.clip(round(rng.normal(88, 5)), 75, 95))
    subsampling = 0 if rng.random() < 0.1 else 2
    progressive = bool(rng.random() < 0.05)
    img.save(buf, "JPEG", quality=quality, subsampling=subsampling, progressive=progressive)
    return buf.getvalue(), "jpg", {"format": "JPEG", "mode": img.mode, "quality": quality,
                                   "subsampling": ["4:4:4", "4:2:2", "4:2:0"][subsampling], "progressive": progressive}


def small_photo_shard_pattern(out_dir: str | Path, shards: int = 8) -> str:
    """Brace pattern of the corpus shards in `out_dir`."""
    return str(Path(out_dir) / f"{_STEM}{{{0:06d}..{shards - 1:06d}}}.tar")


def make_small_photo_shards(out_dir: str | Path, *, images: int = 320, shards: int = 8, seed: int = 0,
                            progress: bool = True) -> list[Path]:
    """Write `images` re-cut sample photos into `shards` tar shards in `out_dir` (deterministic for a
    given scikit-image and Pillow); return their paths.

    Complete shards made with the same (images, shards, seed) are kept (`corpus.json` beside them
    records what was made). Each sample is `{key}.jpg` or `{key}.png`, `{key}.cls` (the source photo's
    number) and `{key}.json`.
    """
    if images < shards or shards < 1:
        raise ValueError(f"need images >= shards >= 1 (got images={images}, shards={shards})")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    spec = {"corpus": "photos-small", "images": images, "shards": shards, "seed": seed}
    paths = [out / f"{_STEM}{s:06d}.tar" for s in range(shards)]
    stamp = out / "corpus.json"
    if corpus_is_current(stamp, spec, paths):
        return paths
    sources = _load_sources()
    names = list(SMALL_RGB_SOURCES + SMALL_GREY_SOURCES)
    rng = np.random.default_rng([seed, 0x5A11])
    sizes, formats = [], []

    def sample(s: int, i: int) -> tuple[str, list]:
        h, w = small_photo_size(rng)
        grey = rng.random() < 0.05
        pool = SMALL_GREY_SOURCES if grey else SMALL_RGB_SOURCES
        fits = [n for n in pool if min(sources[n].shape[:2]) * _MAX_UPSCALE >= min(h, w)]
        name = str(rng.choice(fits or ["retina"]))
        data, ext, meta = _encode(_cut(sources[name], h, w, rng), rng)
        meta.update(width=w, height=h, source=name)
        sizes.append((h, w))
        formats.append(ext)
        return f"small-{s:03d}-{i:05d}", [("cls", str(names.index(name)).encode()), (ext, data),
                                           ("json", json.dumps(meta, sort_keys=True).encode())]

    write_sample_shards(paths, images, sample, desc="benchmark photos-small", progress=progress)
    short = np.asarray([min(hw) for hw in sizes], np.float64)
    stamp.write_text(json.dumps({"spec": spec, "median_short_side": float(np.median(short)),
                                 "short_side_range": [int(short.min()), int(short.max())],
                                 "png_share": round(formats.count("png") / len(formats), 3)}, indent=2) + "\n",
                     encoding="utf-8")
    return paths
