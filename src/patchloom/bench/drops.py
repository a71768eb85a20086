"""Benchmark of the token-drop modes: cost per image beside the per-sample chain, realised rates.

PatchSets are made once from real shards with dropping off (the baseline cost: header, decode,
resize, patchify); then every drop mode decides and applies its drop on the same PatchSets, timed
interleaved with a re-run of the baseline chain over a slice of the records. Nothing is asserted:
the numbers are for people to read.
"""

from __future__ import annotations

import statistics
import time
from typing import Any

import numpy as np

from ..image.dropping import apply_drop, decide_drop
from ..pipeline import Pipeline
from ..recipe import DropConfig, Recipe
from ..seeding import sample_rng

#: The modes compared, each at a typical setting.
DROP_MODES: dict[str, dict[str, Any]] = {
    "random 0.5": {"mode": "random", "rate": 0.5},
    "random Beta(2,5)": {"mode": "random", "beta": [2.0, 5.0]},
    "random max_keep 128": {"mode": "random", "max_keep": 128},
    "block 0.4": {"mode": "block", "rate": 0.4},
    "grid 0.75": {"mode": "grid", "rate": 0.75},
    "stripes 0.3": {"mode": "stripes", "rate": 0.3},
    "content 0.5": {"mode": "content", "rate": 0.5},
    "tube 0.5": {"mode": "tube", "rate": 0.5},
    "block 0.4 (mask)": {"mode": "block", "rate": 0.4, "output": "mask"},
}


def bench_drop_modes(recipe: Recipe, *, shards: str | list[str] | None = None, max_images: int = 200,
                     repeats: int = 3) -> dict[str, Any]:
    """Per-image cost (microseconds) and realised drop rate of each mode on the recipe's images."""
    base = recipe.replace(drop={"mode": "none", "output": "remove"}, patch_ops=[], augment=[])
    pipe = Pipeline(base, shards=shards)
    sets = []
    t0 = 0.0
    for ps in pipe.samples():
        if not sets:  # start the clock after the first image: it pays one-time imports
            t0 = time.perf_counter()
        sets.append(ps)
        if len(sets) >= max_images:
            break
    if len(sets) < 2:
        raise ValueError("need at least two images to benchmark: check the shards")
    chain_us = (time.perf_counter() - t0) / (len(sets) - 1) * 1e6
    results: dict[str, Any] = {}
    for name, spec in DROP_MODES.items():
        cfg = DropConfig(**spec)
        times, rates, targets = [], [], []
        for rep in range(repeats):
            t = time.perf_counter()
            for ps in sets:
                rng = sample_rng(recipe.seed, rep, ps.key, "drop")
                decision = decide_drop(cfg, ps.grid, ps.patches, rng)
                out = apply_drop(ps, decision, cfg.output)
                if rep == 0:
                    total = ps.num_tokens
                    dropped = int(out.masked.sum()) if cfg.output == "mask" else total - out.num_tokens
                    rates.append(dropped / total)
                    targets.append(decision.rate)
            times.append((time.perf_counter() - t) / len(sets) * 1e6)
        us = statistics.median(times)
        results[name] = {
            "us_per_image": us,
            "share_of_chain": us / chain_us,
            "realised_mean": float(np.mean(rates)),
            "realised_std": float(np.std(rates)),
            "target_mean": float(np.mean(targets)),
        }
    tokens = np.array([ps.num_tokens for ps in sets])
    return {"images": len(sets), "tokens_mean": float(tokens.mean()), "chain_us_per_image": chain_us,
            "repeats": repeats, "modes": results}


def format_drop_bench(result: dict[str, Any]) -> str:
    """Table: mode, cost per image, cost as a share of the per-sample chain, realised rate."""
    title = (f"drop modes on {result['images']} images (mean {result['tokens_mean']:.0f} tokens); "
             f"per-sample chain without dropping: {result['chain_us_per_image']:.0f} us/image")
    head = ("mode", "us/image", "vs chain", "target rate", "realised rate (mean +- sd)")
    rows = [head]
    for name, r in result["modes"].items():
        rows.append((name, f"{r['us_per_image']:.0f}", f"{100 * r['share_of_chain']:.1f} %",
                     f"{r['target_mean']:.3f}", f"{r['realised_mean']:.3f} +- {r['realised_std']:.3f}"))
    widths = [max(len(row[i]) for row in rows) for i in range(len(head))]
    lines = [title, "-" * len(title)]
    for row in rows:
        lines.append("  " + "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths))))
    return "\n".join(lines)
