"""Packing efficiency: padding share per algorithm and look-ahead buffer, on budget-sized images.

Token counts come from real size plans (`plan_size`, header-only math) for images with log-uniform
aspect ratios; only packing runs, so this measures the packer alone. The final flush is left out
(it is an end-of-epoch effect, not a steady-state one). Numbers for people to read.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from ..packing.assign import ALGORITHMS
from ..packing.packer import Packer
from ..image.patches import PatchSet
from ..recipe import Recipe
from ..image.sizing import plan_size


def token_counts(recipe: Recipe, n: int, *, seed: int = 0, aspect: tuple[float, float] = (1 / 3, 3.0)) -> np.ndarray:
    """Tokens per image for n images of log-uniform aspect (h/w) and random size, under the recipe."""
    rng = np.random.default_rng(seed)
    h_over_w = np.exp(rng.uniform(np.log(aspect[0]), np.log(aspect[1]), size=n))
    area = rng.uniform(200_000, 2_000_000, size=n)
    heights = np.maximum(1, np.sqrt(area * h_over_w)).astype(int)
    widths = np.maximum(1, np.sqrt(area / h_over_w)).astype(int)
    out = np.empty(n, dtype=np.int64)
    for i, (h, w) in enumerate(zip(heights, widths)):
        plan_rng = np.random.default_rng([seed, i]) if recipe.sizing.mode == "sampled" else None
        out[i] = plan_size(int(h), int(w), recipe.sizing, plan_rng).tokens
    return out


def bench_packing(recipe: Recipe, *, images: int = 20_000, buffers: tuple[int, ...] = (16, 64, 256, 1024),
                  seed: int = 0) -> dict[str, Any]:
    """Padding % and packing cost per image for every algorithm x buffer size."""
    p = recipe.packing
    tokens = token_counts(recipe, images, seed=seed)
    tiny = np.zeros((1, 1), np.uint8)
    rows = []
    for algorithm in ALGORITHMS:
        for buffer in buffers:
            packer = Packer(seq_len=p.seq_len, rows=p.rows, max_images_per_row=p.max_images_per_row,
                            buffer=buffer, algorithm=algorithm)
            real = slots = 0
            t = time.perf_counter()
            for i, n in enumerate(tokens):
                # One-value patches: the arrays are tiny so the cost measured is the packing itself.
                ps = PatchSet(np.broadcast_to(tiny, (int(n), 1)), np.zeros((int(n), 2), np.int32), (1, int(n)), str(i))
                for batch in packer.push(ps):
                    real += batch.num_tokens
                    slots += batch.segment_ids.size
            us = (time.perf_counter() - t) / images * 1e6
            rows.append({"algorithm": algorithm, "buffer": buffer, "padding_pct": 100 * (1 - real / max(1, slots)),
                         "us_per_image": us})
    return {"images": images, "tokens_mean": float(tokens.mean()), "seq_len": p.seq_len, "rows": p.rows,
            "results": rows}


def format_packing_bench(r: dict[str, Any]) -> str:
    """Table: algorithm, look-ahead size (the recipe's packing.lookahead), padding %, cost per image."""
    lines = [f"packing {r['images']} budget-sized images (mean {r['tokens_mean']:.0f} tokens) into "
             f"{r['rows']} x {r['seq_len']} batches; final flush excluded",
             f"  {'algorithm':<13} {'lookahead':>9} {'padding':>9} {'us/image':>9}"]
    for row in r["results"]:
        lines.append(f"  {row['algorithm']:<13} {row['buffer']:>9} {row['padding_pct']:>8.2f}% "
                     f"{row['us_per_image']:>9.1f}")
    return "\n".join(lines)
