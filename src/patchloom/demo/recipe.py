"""The recipe `patchloom demo` runs, and `patchloom pack demo` and `patchloom bench ... --corpus demo` use."""

from __future__ import annotations

from typing import Any

__all__ = ["DEMO_RECIPE"]

#: Native aspect ratio under a 256-token budget, shuffled, packed into 4 rows of 1024 tokens.
DEMO_RECIPE: dict[str, Any] = {
    "seed": 0,
    "source": {"shuffle_buffer": 64, "label_key": "cls"},
    "sizing": {"patch_size": 16, "max_tokens": 256, "min_tokens": 16, "mode": "budget",
               "max_aspect": 8.0, "aspect_rule": "crop"},
    "packing": {"seq_len": 1024, "rows": 4, "max_images_per_row": 16, "lookahead": 32},
}
