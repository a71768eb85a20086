"""Quality of the fast path: PSNR of the pipeline's resized pixels against full decode + Lanczos.

The reference for each image is what a careful offline tool would make: a full-resolution decode
(Pillow, no DCT scaling) resized to the same size plan with a Lanczos filter. The pipeline's own
pixels come from the path it really takes (scaled decode at >= 2x the plan where allowed, then the
recipe's resample filter). A second column keeps the decode full and uses the recipe's filter, so
the loss from the reduced decode and the loss from the filter can be told apart.
"""

from __future__ import annotations

import math
import statistics
from typing import Any

import numpy as np

from ..image.decode import decode_path_counts, open_image, reset_decode_path_counts
from ..recipe import Recipe
from ..image.chain import find_image, plan_for, reduce_hint
from ..image.sizing import SizePlan, resize_to_plan
from ..read import ShardTask, expand_shards, read_tasks

__all__ = ["decode_quality", "format_quality", "psnr"]


def psnr(a: np.ndarray, b: np.ndarray) -> float:
    """Peak signal-to-noise ratio of two uint8 images in dB (inf when identical)."""
    if a.shape != b.shape:
        raise ValueError(f"images differ in shape: {a.shape} vs {b.shape}")
    mse = float(np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2))
    return math.inf if mse == 0 else 10.0 * math.log10(255.0**2 / mse)


def _content(arr: np.ndarray, plan: SizePlan) -> np.ndarray:
    """The image part of a planned array (padding, which is the same on every path, left out)."""
    return arr[plan.pad_top:plan.pad_top + plan.content_h, plan.pad_left:plan.pad_left + plan.content_w]


def decode_quality(recipe: Recipe, *, shards: str | list[str] | None = None, max_images: int = 300) -> dict[str, Any]:
    """Mean, p5 and minimum PSNR of the pipeline's resize against full decode + Lanczos.

    Only the sizing and decode stages run (no augmentation), on the first `max_images` samples in
    shard order (every format; only JPEGs can decode reduced); samples that fail to decode are left
    out and counted.
    """
    urls = expand_shards(shards if shards is not None else recipe.source.shards, allow_shell=False)
    limit, bg, resample = recipe.decode.pixel_limit, recipe.decode.background, recipe.sizing.resample
    fast_vs_ref: list[float] = []
    full_vs_ref: list[float] = []
    reduced_vs_ref: list[float] = []
    failed = 0
    reset_decode_path_counts()
    for rec in read_tasks([ShardTask(u) for u in urls], allow_shell=False):
        if len(fast_vs_ref) >= max_images:
            break
        try:
            _ext, data = find_image(rec, recipe.source.image_keys)
            opened = open_image(data, pixel_limit=limit, memory_limit=recipe.decode.memory_limit)
            plan = plan_for(opened.height, opened.width, recipe, seed=recipe.seed, epoch=0, key=rec.key)
            hint = reduce_hint(opened, plan) if recipe.decode.reduced_jpeg else None
            image = opened.decode(background=bg, reduce_to=hint)
            full = open_image(data, pixel_limit=limit, memory_limit=recipe.decode.memory_limit).decode(background=bg)
        except Exception:  # noqa: BLE001 - a broken sample is counted, not measured
            failed += 1
            continue
        ours = np.asarray(resize_to_plan(image, plan, resample=resample, background=bg))
        ref = np.asarray(resize_to_plan(full, plan, resample="lanczos", background=bg))
        same_filter = np.asarray(resize_to_plan(full, plan, resample=resample, background=bg))
        fast_vs_ref.append(psnr(_content(ours, plan), _content(ref, plan)))
        full_vs_ref.append(psnr(_content(same_filter, plan), _content(ref, plan)))
        if image.size != full.size:
            reduced_vs_ref.append(fast_vs_ref[-1])
    return {
        "images": len(fast_vs_ref),
        "reduced_decodes": len(reduced_vs_ref),
        "failed": failed,
        "resample": resample,
        "decode_paths": decode_path_counts(),
        "pipeline": _stats(fast_vs_ref),
        "reduced_only": _stats(reduced_vs_ref),
        "full_decode_same_filter": _stats(full_vs_ref),
    }


def _stats(values: list[float]) -> dict[str, float]:
    if not values:
        return {"mean_db": math.nan, "p5_db": math.nan, "min_db": math.nan}
    finite = [min(v, 99.0) for v in values]  # identical images count as 99 dB in the mean
    return {"mean_db": statistics.fmean(finite), "p5_db": float(np.percentile(finite, 5)), "min_db": min(finite)}


def format_quality(result: dict[str, Any]) -> str:
    """Two lines: the pipeline's PSNR and the full-decode-same-filter PSNR against the reference."""
    p, f, r = result["pipeline"], result["full_decode_same_filter"], result["reduced_only"]
    paths = ", ".join(f"{k} {v}" for k, v in sorted(result["decode_paths"].items()))
    return "\n".join([
        f"quality vs full decode + Lanczos ({result['images']} images, {result['reduced_decodes']} decoded reduced, "
        f"{result['resample']} resize; decode paths: {paths or 'none'}):",
        f"  pipeline path:                mean {p['mean_db']:.1f} dB, p5 {p['p5_db']:.1f} dB, min {p['min_db']:.1f} dB",
        f"  reduced decodes alone:        mean {r['mean_db']:.1f} dB, p5 {r['p5_db']:.1f} dB, min {r['min_db']:.1f} dB",
        f"  full decode, same filter:     mean {f['mean_db']:.1f} dB, p5 {f['p5_db']:.1f} dB, min {f['min_db']:.1f} dB",
    ])
