"""The recipe `patchloom demo` runs, and `patchloom pack demo` and `patchloom bench ... --corpus demo` use."""

from __future__ import annotations

from typing import Any

__all__ = ["DEMO_CLIP_RECIPE", "DEMO_RECIPE"]

#: Native aspect ratio under a 256-token budget, shuffled, packed into 4 rows of 1024 tokens.
DEMO_RECIPE: dict[str, Any] = {
    "seed": 0,
    "source": {"shuffle_buffer": 64, "label_key": "cls"},
    "sizing": {"patch_size": 16, "max_tokens": 256, "min_tokens": 16, "mode": "budget",
               "max_aspect": 8.0, "aspect_rule": "crop"},
    "packing": {"seq_len": 1024, "rows": 4, "max_images_per_row": 16, "lookahead": 32},
}

#: `patchloom demo --clips`: the demo recipe with the demo clips beside the images: clips at 4 frames a
#: second (at most 8), tubelets of 2 frames, 512 tokens a clip (4 slices of up to 128).
DEMO_CLIP_RECIPE: dict[str, Any] = {
    **DEMO_RECIPE,
    "source": {**DEMO_RECIPE["source"], "video_keys": ["mp4", "webm", "mkv"]},
    "sizing": {**DEMO_RECIPE["sizing"], "temporal_patch": 2},
    "video": {"fps": 4.0, "max_frames": 8, "max_tokens": 512},
}
