"""Two benchmarks of the pipeline at scale: torch DataLoader worker scaling, and a memory soak.

`bench_workers` times `DataLoader(PatchloomDataset(...), num_workers=w)` for each w over the same
shards, with persistent workers, and reports images/s of a warm epoch (after one untimed epoch
that pays for starting the workers) and of the cold first epoch, plus each w's ratio to w = 0.
An epoch is the shard list repeated until it holds at least `epoch_images` images: every epoch pays
once for filling the workers' pipes and for the last worker's tail, which on a 300-image epoch
(a third of a second) is a fifth of the time but on a real epoch is nothing.

`bench_soak` streams a long synthetic stream (the recipe's shards listed over and over, so the
stream is as long as asked without as much disk) through one Pipeline and samples the process's resident
memory as it goes; a pipeline that keeps nothing per sample stays flat once its buffers are full.
Numbers are for people to read; nothing here asserts a speed.
"""

from __future__ import annotations

import gc
import statistics
import sys
import time
from typing import Any

from tqdm import tqdm

from ..recipe import Recipe
from ..read import expand_shards

__all__ = ["bench_soak", "bench_workers", "current_rss_mib", "format_soak", "format_workers"]


def current_rss_mib() -> float | None:
    """Resident memory of this process now (not the high-water mark), in MiB; None if unknown."""
    try:
        with open("/proc/self/statm", encoding="ascii") as f:
            pages = int(f.read().split()[1])
    except (OSError, ValueError, IndexError):
        return None
    import os

    return pages * os.sysconf("SC_PAGE_SIZE") / (1 << 20)


def bench_workers(recipe: Recipe, *, shards: str | list[str] | None = None, workers: tuple[int, ...] = (0, 1, 2),
                  epochs: int = 4, progress: bool = False, pool_slots: int | None = None,
                  epoch_images: int = 0) -> dict[str, Any]:
    """Images/s through a torch DataLoader for each worker count (warm epochs and the cold first one).

    `epoch_images`: repeat the shard list until an epoch holds at least this many images (0: once).
    `pool_slots`: the dataset's reusable shared-memory batch slots per worker (None: its default;
    0: a new shared segment per batch, torch's own way), to measure what the hand-over costs."""
    from torch.utils.data import DataLoader

    from ..adapters.torch import PatchloomDataset

    if epochs < 2:
        raise ValueError(f"epochs must be >= 2 (one cold, at least one warm; got {epochs})")
    urls = expand_shards(shards if shards is not None else recipe.source.shards, allow_shell=False)
    passes = 1
    if epoch_images > 0:
        per_pass = _count_samples(urls)
        if per_pass == 0:
            raise ValueError("the shards hold no samples to time")
        passes = max(1, -(-epoch_images // per_pass))
        urls = [u for _ in range(passes) for u in urls]
    rows = []
    for w in workers:
        ds = PatchloomDataset(recipe, urls, as_tensors=True,
                              **({} if pool_slots is None else {"pool_slots": pool_slots}))
        loader = DataLoader(ds, batch_size=None, num_workers=w, persistent_workers=w > 0)
        rates, images, cold = [], 0, 0.0
        for epoch in range(epochs):
            ds.set_epoch(epoch)
            gc.collect()
            n = 0
            t0 = time.perf_counter()
            with tqdm(desc=f"workers={w} epoch {epoch}", unit=" img", file=sys.stderr, disable=not progress,
                      leave=False) as bar:
                for batch in loader:
                    k = int((batch["grids"][..., 0] > 0).sum())
                    n += k
                    bar.update(k)
            dt = time.perf_counter() - t0
            if epoch == 0:
                cold = n / dt if dt > 0 else 0.0
            else:
                rates.append(n / dt if dt > 0 else 0.0)
            images = n
        del loader
        rows.append({"workers": w, "images": images, "cold_images_per_s": cold,
                     "images_per_s": statistics.median(rates)})
    base = next((r["images_per_s"] for r in rows if r["workers"] == 0), None)
    for r in rows:
        r["ratio_to_0"] = r["images_per_s"] / base if base else float("nan")
    return {"shards": len(urls), "shard_passes": passes, "epochs": epochs, "pool_slots": pool_slots, "results": rows}


def format_workers(result: dict[str, Any]) -> str:
    slots = result.get("pool_slots")
    hand = "default batch slots" if slots is None else f"{slots} batch slots a worker"
    passes = result.get("shard_passes", 1)
    listed = f"{result['shards']} shards" + (f" = the corpus listed {passes} times" if passes > 1 else "")
    lines = [f"DataLoader worker scaling ({listed}, persistent workers, {hand}, "
             f"median of {result['epochs'] - 1} warm epoch(s); cold = first epoch with worker start)",
             f"  {'workers':>7} {'images':>7} {'images/s':>9} {'cold img/s':>11} {'vs 0 workers':>13}"]
    for r in result["results"]:
        lines.append(f"  {r['workers']:>7} {r['images']:>7} {r['images_per_s']:>9.1f} {r['cold_images_per_s']:>11.1f} "
                     f"{r['ratio_to_0']:>12.2f}x")
    return "\n".join(lines)


def bench_soak(recipe: Recipe, *, shards: str | list[str] | None = None, images: int = 100_000,
               samples: int = 20, progress: bool = False) -> dict[str, Any]:
    """Stream about `images` images through one Pipeline; resident memory sampled `samples` times.

    The shard list is repeated as often as needed to reach `images`; every repeat is decoded,
    sized, patched and packed afresh (keys repeat, which only matters to the random draws). Growth is the last sample minus the one taken after the first tenth of the stream
    (once shuffle and packing buffers are full).
    """
    from ..pipeline import Pipeline

    urls = expand_shards(shards if shards is not None else recipe.source.shards, allow_shell=False)
    per_pass = _count_samples(urls)
    if per_pass == 0:
        raise ValueError("the shards hold no samples to stream")
    repeats = max(1, -(-images // per_pass))
    stream = [u for _ in range(repeats) for u in urls]
    pipe = Pipeline(recipe, shards=stream)
    every = max(1, images // samples)
    trace: list[tuple[int, float]] = []
    seen = next_mark = 0
    t0 = time.perf_counter()
    with tqdm(total=images, desc="soak", unit=" img", file=sys.stderr, disable=not progress, leave=False) as bar:
        for batch in pipe:
            seen += batch.num_images
            bar.update(batch.num_images)
            if seen >= next_mark:
                rss = current_rss_mib()
                if rss is not None:
                    trace.append((seen, rss))
                next_mark += every
            if seen >= images:
                break
    elapsed = time.perf_counter() - t0
    settled = [m for n, m in trace if n >= images // 10] or [m for _, m in trace]
    return {"images": seen, "shard_passes": repeats, "seconds": elapsed,
            "images_per_s": seen / elapsed if elapsed > 0 else 0.0,
            "rss_trace_mib": trace,
            "rss_settled_mib": settled[0] if settled else None,
            "rss_end_mib": trace[-1][1] if trace else None,
            "rss_max_mib": max((m for _, m in trace), default=None),
            "growth_mib": (settled[-1] - settled[0]) if settled else None,
            "ledger_skipped": len(pipe.ledger.skipped)}


def _count_samples(urls: list[str]) -> int:
    from ..read import ShardTask, read_tasks

    return sum(1 for _ in read_tasks([ShardTask(u) for u in urls], allow_shell=False))


def format_soak(result: dict[str, Any]) -> str:
    trace = result["rss_trace_mib"]
    points = "  ".join(f"{n / 1000:.1f}k:{m:.0f}" for n, m in trace[:: max(1, len(trace) // 8)])
    return "\n".join([
        f"memory soak: {result['images']:,} images ({result['shard_passes']} passes over the shards) "
        f"in {result['seconds']:.0f} s, {result['images_per_s']:.0f} images/s",
        f"  resident MiB after the first tenth {result['rss_settled_mib']:.0f}, at the end {result['rss_end_mib']:.0f}, "
        f"max {result['rss_max_mib']:.0f}; growth {result['growth_mib']:+.1f} MiB",
        f"  trace (images:MiB): {points}",
    ])
