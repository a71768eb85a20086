"""Benchmark of clips beside images: clips/s (and frames/s) and images/s through the same recipe, in one
process, interleaved. The clips are the demo clips (made on first use, needs the video extra); the
images are the corpus's shards. Numbers for people to read; nothing is asserted."""

from __future__ import annotations

import statistics
import time
from pathlib import Path
from typing import Any

from ..image.patches import PatchSet
from ..pipeline import Pipeline
from ..recipe import Recipe

#: What a corpus recipe without video settings gets for this benchmark (the demo clip recipe's).
CLIP_SETTINGS: dict[str, dict[str, Any]] = {
    "source": {"video_keys": ["mp4", "webm", "mkv"]},
    "sizing": {"temporal_patch": 2},
    "video": {"fps": 4.0, "max_frames": 8, "max_tokens": 512},
}


def clip_recipe(recipe: Recipe) -> Recipe:
    """The recipe as it is when it reads clips, else with CLIP_SETTINGS added (a per-slice budget that
    still holds min_tokens, and max_tokens within seq_len)."""
    if recipe.source.video_keys:
        return recipe
    video = dict(CLIP_SETTINGS["video"])
    video["max_tokens"] = min(video["max_tokens"], recipe.packing.seq_len)
    return recipe.replace(source=CLIP_SETTINGS["source"], sizing=CLIP_SETTINGS["sizing"], video=video)


def _pass(recipe: Recipe, shards: str | list[str] | None, max_records: int | None) -> dict[str, float]:
    counts = {"samples": 0, "clips": 0, "frames": 0, "tokens": 0}

    def seen(ps: PatchSet) -> None:
        counts["samples"] += 1
        counts["tokens"] += ps.num_tokens
        clip = ps.meta.get("clip")
        if clip is not None:
            counts["clips"] += 1
            counts["frames"] += len(clip["frames"])

    t0 = time.perf_counter()
    for _ in Pipeline(recipe, shards=shards, on_sample=seen, max_records=max_records):
        pass
    return {**counts, "seconds": time.perf_counter() - t0}


def bench_clips(recipe: Recipe, *, shards: str | list[str] | None, clips: str | Path, repeats: int = 3,
                max_images: int = 200) -> dict[str, Any]:
    """Time the recipe (clip_recipe) over the clip shard `clips` and over `shards` (images, at most
    max_images), `repeats` times each, interleaved; medians of clips/s, frames/s and images/s."""
    r = clip_recipe(recipe)
    _pass(r, str(clips), 2)  # one-time imports (PyAV, decoders) out of the way
    clip_runs, image_runs = [], []
    for _ in range(repeats):
        clip_runs.append(_pass(r, str(clips), None))
        image_runs.append(_pass(r, shards, max_images))
    c, i = clip_runs[0], image_runs[0]
    clips_s = statistics.median(x["clips"] / x["seconds"] for x in clip_runs)
    images_s = statistics.median((x["samples"] - x["clips"]) / x["seconds"] for x in image_runs)
    return {
        "fingerprint": r.fingerprint(),
        "clips": c["clips"],
        "frames_per_clip": c["frames"] / max(1, c["clips"]),
        "tokens_per_clip": c["tokens"] / max(1, c["clips"]),
        "images": i["samples"] - i["clips"],
        "tokens_per_image": i["tokens"] / max(1, i["samples"]),
        "clips_per_s": clips_s,
        "frames_per_s": statistics.median(x["frames"] / x["seconds"] for x in clip_runs),
        "images_per_s": images_s,
        "image_per_clip": images_s / clips_s if clips_s else None,
        "repeats": repeats,
    }


def format_clips_bench(r: dict[str, Any]) -> str:
    ratio = f"{r['image_per_clip']:.1f}" if r["image_per_clip"] is not None else "n/a"
    return "\n".join([
        f"clips beside images, one recipe ({r['fingerprint'][:12]}), median of {r['repeats']} interleaved runs",
        f"  clips   {r['clips_per_s']:8.1f} /s  ({r['frames_per_s']:.0f} frames/s; {r['clips']} clips, "
        f"{r['frames_per_clip']:.1f} frames and {r['tokens_per_clip']:.0f} tokens each)",
        f"  images  {r['images_per_s']:8.1f} /s  ({r['images']} images, {r['tokens_per_image']:.0f} tokens each)",
        f"  one clip costs as much as {ratio} images",
    ])
