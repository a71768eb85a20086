"""Benchmark of resume: what state_dict() costs per call, how big the state is, and how long a
resumed pipeline takes to produce its first batch, beside the uninterrupted run's time per batch.
Numbers for people to read; nothing is asserted."""

from __future__ import annotations

import json
import statistics
import time
from typing import Any

from ..pipeline import Pipeline
from ..recipe import Recipe


def bench_resume(recipe: Recipe, *, shards: str | list[str] | None = None, points: int = 5) -> dict[str, Any]:
    """Save at `points` evenly spaced batches of one epoch, then resume from each and time it."""
    warm = Pipeline(recipe, shards=shards)
    next(iter(warm), None)  # one-time imports out of the way
    pipe = Pipeline(recipe, shards=shards)
    t0 = time.perf_counter()
    batches = list(pipe)
    full = time.perf_counter() - t0
    n = len(batches)
    if n < 2:
        raise ValueError("need an epoch of at least two batches to measure resume")
    marks = sorted({max(1, round(i * (n - 1) / max(1, points - 1))) for i in range(points)})
    states, save_us = {}, []
    pipe = Pipeline(recipe, shards=shards)
    for i, _ in enumerate(pipe, 1):
        if i in marks:
            t = time.perf_counter()
            state = pipe.state_dict()
            save_us.append((time.perf_counter() - t) * 1e6)
            states[i] = json.dumps(state)
    resume_s = []
    for i, text in states.items():
        fresh = Pipeline(recipe, shards=shards)
        t = time.perf_counter()
        fresh.load_state_dict(json.loads(text))
        next(iter(fresh), None)
        resume_s.append(time.perf_counter() - t)
    per_batch = full / n
    return {
        "batches": n,
        "seconds_per_batch": per_batch,
        "state_dict_us": statistics.median(save_us),
        "state_bytes_max": max(len(s) for s in states.values()),
        "resume_first_batch_s": statistics.median(resume_s),
        "resume_vs_batch": statistics.median(resume_s) / per_batch,
        "replay_would_cost_s": statistics.median([per_batch * i for i in states]),
        "positions": sorted(states),
    }


def format_resume_bench(r: dict[str, Any]) -> str:
    lines = [f"resume over an epoch of {r['batches']} batches ({1000 * r['seconds_per_batch']:.0f} ms per batch)",
             f"  state_dict()                     {r['state_dict_us']:.0f} us per call",
             f"  state size                       {r['state_bytes_max']:,} bytes at most (JSON)",
             f"  load + first batch after resume  {1000 * r['resume_first_batch_s']:.0f} ms "
             f"({r['resume_vs_batch']:.2f}x one uninterrupted batch)",
             f"  replaying up to those points     {1000 * r['replay_would_cost_s']:.0f} ms (median), avoided"]
    return "\n".join(lines)
