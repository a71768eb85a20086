"""The benchmark corpus: made-up photo-like JPEGs with the size mix of images scraped from the web.

Speed claims depend on what is decoded, so the benchmark has its own corpus instead of the demo
archive (whose odd formats and tiny thumbnails are there to test correctness). The mix follows
common practice for web image sets: most images around half a megapixel (mean about 500x430),
one in ten a large camera image of 2 to 15 megapixels, aspect ratios from 1:3 to 3:1, baseline
JPEG at quality 80 to 92 with 4:2:0 chroma, a few progressive. The scenes are the demo's drawn
shorelines, facades and panoramas (patchloom.demo.scenes): nothing real is depicted.
"""

from __future__ import annotations

import io
import json
import math
import sys
import tarfile
from collections.abc import Callable
from pathlib import Path

import numpy as np
from PIL import Image
from tqdm import tqdm

from ..demo.scenes import draw_facade, draw_panorama, draw_shoreline

__all__ = ["PHOTO_RECIPE", "make_photo_shards", "photo_shard_pattern", "photo_size"]

_STEM = "photos-"
_MTIME = 1_700_000_000
_SCENES = (draw_shoreline, draw_facade, draw_panorama)

#: The recipe of `patchloom bench ... --corpus photos`: 196 tokens at patch 16 (the token count of a 224x224
#: square, so the baseline and the pipeline hand the model the same number of tokens per image).
PHOTO_RECIPE = {
    "seed": 0,
    "source": {"shuffle_buffer": 64, "label_key": "cls"},
    "sizing": {"patch_size": 16, "max_tokens": 196, "min_tokens": 16, "mode": "budget",
               "max_aspect": 8.0, "aspect_rule": "crop"},
    "packing": {"seq_len": 1024, "rows": 8, "max_images_per_row": 16},
}


def photo_size(rng: np.random.Generator, large_share: float = 0.1) -> tuple[int, int]:
    """(height, width) of one corpus image: web-sized, or 2-15 Mpx with probability `large_share`;
    aspect ratio log-uniform in 1:3..3:1."""
    aspect = math.exp(rng.uniform(math.log(1 / 3), math.log(3)))  # width / height
    if rng.random() < large_share:
        area = math.exp(rng.uniform(math.log(2e6), math.log(15e6)))
    else:
        area = float(np.clip(rng.lognormal(math.log(200_000), 0.35), 40_000, 1_000_000))
    w = max(16, round(math.sqrt(area * aspect)))
    h = max(16, round(math.sqrt(area / aspect)))
    return h, w


def _photo(rng: np.random.Generator, large_share: float) -> tuple[bytes, dict]:
    h, w = photo_size(rng, large_share)
    kind = int(rng.integers(len(_SCENES)))
    arr = _SCENES[kind](h, w, rng)
    buf = io.BytesIO()
    quality = int(rng.integers(80, 93))
    progressive = bool(rng.random() < 0.1)
    Image.fromarray(arr).save(buf, "JPEG", quality=quality, subsampling=2, progressive=progressive)
    return buf.getvalue(), {"width": w, "height": h, "scene": _SCENES[kind].__name__.removeprefix("draw_"),
                            "quality": quality, "progressive": progressive, "label": kind}


def _add(tar: tarfile.TarFile, name: str, data: bytes) -> None:
    info = tarfile.TarInfo(name)
    info.size, info.mtime, info.mode = len(data), _MTIME, 0o644
    tar.addfile(info, io.BytesIO(data))


def write_sample_shards(paths: list[Path], images: int, sample: Callable[[int, int], tuple[str, list]], *,
                        desc: str, progress: bool) -> None:
    """Spread `images` samples over the shards at `paths` (the first ones one more when they do not divide):
    `sample(shard, i)` gives (key, [(extension, bytes), ...]) in member order. Each shard is written
    under a .tmp name and renamed when complete, with fixed member times, so it is byte-reproducible."""
    shards = len(paths)
    with tqdm(total=images, desc=desc, unit="img", file=sys.stderr, disable=not progress, leave=False) as bar:
        for s, path in enumerate(paths):
            tmp = path.with_name(path.name + ".tmp")
            count = images // shards + (1 if s < images % shards else 0)
            with tarfile.open(tmp, "w", format=tarfile.USTAR_FORMAT) as tar:
                for i in range(count):
                    key, members = sample(s, i)
                    for ext, data in members:
                        _add(tar, f"{key}.{ext}", data)
                    bar.update(1)
            tmp.replace(path)


def photo_shard_pattern(out_dir: str | Path, shards: int = 4) -> str:
    """Brace pattern of the corpus shards in `out_dir`."""
    return str(Path(out_dir) / f"{_STEM}{{{0:06d}..{shards - 1:06d}}}.tar")


def corpus_is_current(stamp: Path, spec: dict, paths: list[Path]) -> bool:
    """True when a corpus folder already holds every shard, made from the same spec (its stamp file)."""
    if not (stamp.is_file() and all(p.is_file() for p in paths)):
        return False
    try:
        return json.loads(stamp.read_text(encoding="utf-8")).get("spec") == spec
    except (OSError, ValueError):
        return False


def make_photo_shards(out_dir: str | Path, *, images: int = 300, shards: int = 4, seed: int = 0,
                      large_share: float = 0.1, progress: bool = True) -> list[Path]:
    """Write `images` JPEGs into `shards` tar shards in `out_dir` (deterministic); return their paths.

    `large_share` is the share of 2-15 Mpx camera-sized images. Existing complete shards made
    with the same (images, shards, seed, large_share) are kept: a `corpus.json`
    beside them records what was made. Each sample is `{key}.jpg`, `{key}.cls`, `{key}.json`.
    """
    if images < shards or shards < 1:
        raise ValueError(f"need images >= shards >= 1 (got images={images}, shards={shards})")
    if not 0 <= large_share <= 1:
        raise ValueError(f"large_share must be in 0..1 (got {large_share})")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    spec = {"images": images, "shards": shards, "seed": seed, "large_share": large_share}
    paths = [out / f"{_STEM}{s:06d}.tar" for s in range(shards)]
    stamp = out / "corpus.json"
    if corpus_is_current(stamp, spec, paths):
        return paths
    rng = np.random.default_rng([seed, 0x9B07])
    sizes: list[int] = []

    def sample(s: int, i: int) -> tuple[str, list]:
        data, meta = _photo(rng, large_share)
        sizes.append(meta["width"] * meta["height"])
        return f"photo-{s:03d}-{i:05d}", [("cls", str(meta["label"]).encode()), ("jpg", data),
                                           ("json", json.dumps(meta, sort_keys=True).encode())]

    write_sample_shards(paths, images, sample, desc="benchmark photos", progress=progress)
    px = np.asarray(sizes, np.float64)
    stamp.write_text(json.dumps({"spec": spec, "mean_megapixels": round(float(px.mean()) / 1e6, 3),
                                 "median_megapixels": round(float(np.median(px)) / 1e6, 3),
                                 "large_share": round(float((px >= 2e6).mean()), 3)}, indent=2) + "\n",
                     encoding="utf-8")
    return paths
