"""Benchmark: the pipeline beside a plain square-resize baseline, in one process, over the same shards.

The baseline is what most image loaders do today: read the same tar records (patchloom.read, in
shard order, no shuffle), decode every image fully with Pillow and `convert("RGB")`, squash it to a
square of `patch_size * isqrt(max_tokens)` pixels with the recipe's resample filter, patchify it with
numpy and stack fixed-count batches. The candidate is a full iteration of `Pipeline(recipe, shards)`.

Runs are interleaved (baseline, pipeline, baseline, pipeline, ...) so that slow phases of a noisy
machine hit both sides alike, and each side reports the median over its runs. No timing is asserted
anywhere: the numbers are for people to read.
"""

from __future__ import annotations

import gc
import io
import math
import statistics
import sys
import time
from collections.abc import Iterator
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from PIL import Image
from tqdm import tqdm

from ..packing.packer import Packer
from ..image.patches import normalize, patchify
from ..pipeline import Pipeline
from ..image.chain import SampleError, parse_label, process_record
from ..recipe import Recipe
from ..image.sizing import RESAMPLE_FILTERS
from ..read import ShardTask, expand_shards, read_tasks, shard_order

try:  # not on Windows; the memory column is then left empty
    import resource
except ImportError:  # pragma: no cover - platform dependent
    resource = None  # type: ignore[assignment]

__all__ = [
    "RunResult",
    "SquareBaseline",
    "baseline_batch_images",
    "baseline_side",
    "format_bench",
    "run_bench",
    "square_patches",
    "stage_profile",
    "time_baseline",
    "time_pipeline",
    "warm_cache",
]

#: Stages in the order the per-sample chain runs them, as `process_record(timings=...)` names them.
STAGES = ("read", "header", "sizing", "decode", "resize", "augment", "patches", "drop", "patch_ops", "output",
          "pack")

SIDES = ("baseline", "pipeline")


# --------------------------------------------------------------------------------------------
# The baseline: pure functions plus one small iterable
# --------------------------------------------------------------------------------------------


def baseline_side(recipe: Recipe) -> int:
    """Pixel side of the baseline's square: patch_size * isqrt(max_tokens) (224 for 196 tokens at 16)."""
    return recipe.sizing.patch_size * max(1, math.isqrt(recipe.sizing.max_tokens))


def baseline_batch_images(recipe: Recipe) -> int:
    """Images per baseline batch: as many as fill the token slots of one pipeline batch.

    A pipeline batch has rows * seq_len token slots; the baseline batch holds
    max(1, rows * seq_len // tokens_per_image) images, so both sides hand the training loop
    arrays of (nearly) the same size and neither gains from smaller batches.
    """
    p = recipe.packing
    tokens = max(1, math.isqrt(recipe.sizing.max_tokens)) ** 2
    return max(1, p.rows * p.seq_len // tokens)


def square_patches(data: bytes, *, side: int, patch_size: int, resample: str = "bicubic") -> np.ndarray:
    """Encoded bytes -> [T, patch*patch*3] uint8: full Pillow decode, RGB, square resize, patchify."""
    with Image.open(io.BytesIO(data)) as im:
        rgb = im.convert("RGB")
    square = rgb.resize((side, side), RESAMPLE_FILTERS[resample])
    return patchify(np.asarray(square), patch_size)


class SquareBaseline:
    """Iterable of (patches [n, T, D], labels [n]) batches made the plain square-resize way.

    Shards are read in the pipeline's epoch-0 shard order (so a `max_images` run covers the same
    shards on both sides), each shard's samples in tar order: no sample shuffle.

    Every batch has the same n = baseline_batch_images(recipe); the last one is zero-padded (labels
    -1) so shapes stay static, and that padding counts as padding. Samples that fail (no image
    member, undecodable bytes) are counted in `skipped`, as a plain try/except loader would.
    Normalisation to the recipe's output dtype is applied once per stacked batch.
    """

    def __init__(self, recipe: Recipe, shards: list[str], *, max_images: int | None = None) -> None:
        self.recipe = recipe
        self.shards = shards
        self.max_images = max_images
        self.side = baseline_side(recipe)
        self.batch_images = baseline_batch_images(recipe)
        self.images = 0
        self.skipped = 0

    @property
    def tokens_per_image(self) -> int:
        return (self.side // self.recipe.sizing.patch_size) ** 2

    def _images(self) -> Iterator[tuple[np.ndarray, int]]:
        r = self.recipe
        order = shard_order(self.shards, seed=r.seed, epoch=0, shuffle=r.source.shuffle_shards)
        tasks = [ShardTask(url) for url in order]
        for rec in read_tasks(tasks, allow_shell=False):
            data = next((rec.members[ext] for ext in r.source.image_keys if ext in rec.members), None)
            if data is None:
                self.skipped += 1
                continue
            try:
                label = parse_label(rec, r.source.label_key)
                patches = square_patches(data, side=self.side, patch_size=r.sizing.patch_size,
                                         resample=r.sizing.resample)
            except Exception:  # the plain loader's blanket skip
                self.skipped += 1
                continue
            yield patches, -1 if label is None else label

    def __iter__(self) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        self.images = self.skipped = 0
        n, t = self.batch_images, self.tokens_per_image
        d = self.recipe.sizing.patch_size ** 2 * 3
        out = self.recipe.output
        buf = np.zeros((n, t, d), np.uint8)
        labels = np.full(n, -1, np.int64)
        fill = 0
        for patches, label in self._images():
            buf[fill], labels[fill] = patches, label
            fill += 1
            self.images += 1
            done = self.max_images is not None and self.images >= self.max_images
            if fill == n or done:
                buf[fill:], labels[fill:] = 0, -1
                yield normalize(buf.reshape(n * t, d), out.mean, out.std, out.dtype).reshape(n, t, d), labels.copy()
                buf = np.zeros((n, t, d), np.uint8)
                fill = 0
            if done:
                return
        if fill:
            yield normalize(buf.reshape(n * t, d), out.mean, out.std, out.dtype).reshape(n, t, d), labels.copy()


# --------------------------------------------------------------------------------------------
# Timed runs
# --------------------------------------------------------------------------------------------


@dataclass(slots=True)
class RunResult:
    """One timed pass of one side: what it delivered and how long it took."""

    side: str
    images: int = 0
    skipped: int = 0
    batches: int = 0
    tokens: int = 0  # real (non-padding) tokens delivered
    slots: int = 0  # all token slots delivered, padding included
    last_tokens: int = 0  # the final batch's share of tokens and slots (an end-of-stream effect)
    last_slots: int = 0
    seconds: float = 0.0
    cpu_seconds: float = 0.0
    peak_rss_mib: float | None = None  # process high-water mark after the run

    @property
    def images_per_s(self) -> float:
        return self.images / self.seconds if self.seconds > 0 else 0.0

    @property
    def images_per_cpu_s(self) -> float:
        return self.images / self.cpu_seconds if self.cpu_seconds > 0 else 0.0

    @property
    def useful_tokens_per_s(self) -> float:
        return self.tokens / self.seconds if self.seconds > 0 else 0.0

    @property
    def tokens_per_image(self) -> float:
        return self.tokens / self.images if self.images else 0.0

    @property
    def padding_pct(self) -> float:
        return 100.0 * (1 - self.tokens / self.slots) if self.slots else 0.0

    @property
    def steady_padding_pct(self) -> float:
        """Padding without the final batch, whose part-empty rows say how the stream ended, not how
        well the batches are filled (on a long epoch that one batch is a vanishing share)."""
        slots = self.slots - self.last_slots
        return 100.0 * (1 - (self.tokens - self.last_tokens) / slots) if slots > 0 else self.padding_pct

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d.update(images_per_s=self.images_per_s, images_per_cpu_s=self.images_per_cpu_s,
                 useful_tokens_per_s=self.useful_tokens_per_s,
                 tokens_per_image=self.tokens_per_image, padding_pct=self.padding_pct,
                 steady_padding_pct=self.steady_padding_pct)
        return d


def _peak_rss_mib() -> float | None:
    """Process-wide peak resident memory so far (ru_maxrss), in MiB; None where unavailable."""
    if resource is None:
        return None
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak / (1 << 20) if sys.platform == "darwin" else peak / 1024  # bytes on macOS, KiB elsewhere


def time_baseline(recipe: Recipe, urls: list[str], max_images: int | None, bar: tqdm) -> RunResult:
    """One timed pass of the square-resize baseline over `urls` (stops after `max_images`)."""
    base = SquareBaseline(recipe, urls, max_images=max_images)
    res = RunResult("baseline")
    t0, c0 = time.perf_counter(), time.process_time()
    before = 0
    for patches, _labels in base:
        res.batches += 1
        res.slots += patches.shape[0] * patches.shape[1]
        res.last_slots = patches.shape[0] * patches.shape[1]
        res.last_tokens = (base.images - before) * base.tokens_per_image  # images this batch brought
        before = base.images
        bar.update(base.images - bar.n)
    res.seconds, res.cpu_seconds = time.perf_counter() - t0, time.process_time() - c0
    res.images, res.skipped = base.images, base.skipped
    res.tokens = base.images * base.tokens_per_image  # every image fills its square; padding is batch tail
    return res


def time_pipeline(recipe: Recipe, urls: list[str], max_images: int | None, bar: tqdm) -> RunResult:
    """One timed pass of `Pipeline(recipe, urls)` (stops after the batch that reaches `max_images`)."""
    pipe = Pipeline(recipe, shards=urls)
    res = RunResult("pipeline")
    t0, c0 = time.perf_counter(), time.process_time()
    for batch in pipe:
        res.batches += 1
        res.images += batch.num_images
        res.tokens += batch.num_tokens
        res.slots += batch.segment_ids.size
        res.last_tokens, res.last_slots = batch.num_tokens, batch.segment_ids.size
        bar.update(batch.num_images)
        if max_images is not None and res.images >= max_images:
            break
    res.seconds, res.cpu_seconds = time.perf_counter() - t0, time.process_time() - c0
    res.skipped = len(pipe.ledger.skipped)
    return res


def warm_cache(recipe: Recipe, urls: list[str]) -> None:
    """Read every record once, untimed, so neither side pays for a cold file cache or for the
    one-time imports of the first shard read."""
    for _ in read_tasks([ShardTask(u) for u in urls], allow_shell=False):
        pass


def stage_profile(recipe: Recipe, urls: list[str], max_images: int | None = None) -> dict[str, Any]:
    """Mean microseconds per image spent in each stage, from one pass in shard order.

    Reading the tar records, each stage of `process_record` (through its `timings` hook) and the
    packer's push/flush are timed separately; stages a recipe does not use are left out. The sum
    is a little below a full pipeline run's time per image, which also shuffles and keeps a ledger.
    """
    times: dict[str, float] = {}
    p = recipe.packing
    packer = Packer(seq_len=p.seq_len, rows=p.rows, max_images_per_row=p.max_images_per_row, buffer=p.lookahead,
                    algorithm=p.algorithm)
    images = 0
    records = read_tasks([ShardTask(u) for u in urls], allow_shell=False)
    t = time.perf_counter()
    for rec in records:
        times["read"] = times.get("read", 0.0) + time.perf_counter() - t
        try:
            ps = process_record(rec, recipe, 0, timings=times)
        except SampleError:
            t = time.perf_counter()
            continue
        t = time.perf_counter()
        packer.push(ps)
        images += 1
        now = time.perf_counter()
        times["pack"] = times.get("pack", 0.0) + now - t
        t = now
        if max_images is not None and images >= max_images:
            break
    t = time.perf_counter()
    for _ in packer.flush():
        pass
    times["pack"] = times.get("pack", 0.0) + time.perf_counter() - t
    per = {k: 1e6 * times[k] / max(1, images) for k in STAGES if k in times}
    return {"images": images, "us_per_image": per, "total_us": sum(per.values())}


def _summary(runs: list[RunResult]) -> dict[str, Any]:
    """Medians of the rates over the runs; counts from the first run (they do not vary)."""
    first = runs[0]
    return {
        "images": first.images,
        "skipped": first.skipped,
        "batches": first.batches,
        "tokens_per_image": first.tokens_per_image,
        "padding_pct": first.padding_pct,
        "steady_padding_pct": first.steady_padding_pct,
        "images_per_s": statistics.median(r.images_per_s for r in runs),
        "useful_tokens_per_s": statistics.median(r.useful_tokens_per_s for r in runs),
        "seconds": statistics.median(r.seconds for r in runs),
        "cpu_seconds": statistics.median(r.cpu_seconds for r in runs),
        "images_per_cpu_s": statistics.median(r.images_per_cpu_s for r in runs),
    }


def _ratio(num: float, den: float) -> float:
    return num / den if den > 0 else float("nan")


def run_bench(recipe: Recipe, *, shards: str | list[str] | None = None, max_images: int | None = None,
              repeats: int = 3, progress: bool = False, quality_check: bool = True) -> dict:
    """Time the baseline and the pipeline `repeats` times each, interleaved; return a JSON-able dict.

    `shards` overrides the recipe's; `max_images` stops each run after the batch that reaches it.
    After the timed runs, one untimed pass measures per-stage microseconds (`stages`) and, with
    `quality_check`, the PSNR of the pipeline's pixels against full decode + Lanczos (`quality`).
    The dict holds each side's runs and medians and `ratio` (pipeline / baseline) for images/s and
    useful (non-padding) tokens/s.
    """
    if repeats < 1:
        raise ValueError(f"repeats must be >= 1 (got {repeats})")
    if max_images is not None and max_images < 1:
        raise ValueError(f"max_images must be >= 1 (got {max_images})")
    src = recipe.source
    urls = expand_shards(shards if shards is not None else src.shards, allow_shell=False)
    warm_cache(recipe, urls)
    runs: dict[str, list[RunResult]] = {side: [] for side in SIDES}
    timers = {"baseline": time_baseline, "pipeline": time_pipeline}
    for i in range(repeats):
        for side in SIDES:
            gc.collect()
            with tqdm(desc=f"{side} {i + 1}/{repeats}", unit=" img", file=sys.stderr, disable=not progress,
                      leave=False, dynamic_ncols=True) as bar:
                res = timers[side](recipe, urls, max_images, bar)
            res.peak_rss_mib = _peak_rss_mib()
            runs[side].append(res)
    med = {side: _summary(runs[side]) for side in SIDES}
    stages = stage_profile(recipe, urls, max_images)
    from .quality import decode_quality

    quality = decode_quality(recipe, shards=urls, max_images=max_images or 300) if quality_check else None
    return {
        "stages": stages,
        "quality": quality,
        "recipe": recipe.fingerprint(),
        "shards": len(urls),
        "repeats": repeats,
        "max_images": max_images,
        "baseline_square": baseline_side(recipe),
        "baseline_batch_images": baseline_batch_images(recipe),
        "pipeline_batch": [recipe.packing.rows, recipe.packing.seq_len],
        "output_dtype": recipe.output.dtype,
        "baseline": {"median": med["baseline"], "runs": [r.to_dict() for r in runs["baseline"]]},
        "pipeline": {"median": med["pipeline"], "runs": [r.to_dict() for r in runs["pipeline"]]},
        "ratio": {
            "images_per_s": _ratio(med["pipeline"]["images_per_s"], med["baseline"]["images_per_s"]),
            "useful_tokens_per_s": _ratio(med["pipeline"]["useful_tokens_per_s"],
                                          med["baseline"]["useful_tokens_per_s"]),
            # the same images/s ratio from process CPU time, which a busy machine disturbs less
            "images_per_cpu_s": _ratio(med["pipeline"]["images_per_cpu_s"], med["baseline"]["images_per_cpu_s"]),
        },
        "peak_rss_mib": _peak_rss_mib(),
    }


def format_bench(result: dict) -> str:
    """A small table of both sides' medians, the per-run rates, and the ratio line."""
    side_px = result["baseline_square"]
    rows_, seq = result["pipeline_batch"]
    names = {
        "baseline": f"baseline (square {side_px}x{side_px}, {result['baseline_batch_images']} img/batch)",
        "pipeline": f"pipeline ({rows_} x {seq} tokens/batch)",
    }
    head = ("", "images", "skipped", "tokens/img", "padding", "w/o last batch", "images/s", "useful tok/s",
            "median s", "cpu s")
    table = [head]
    for side in SIDES:
        m = result[side]["median"]
        table.append((names[side], f"{m['images']}", f"{m['skipped']}", f"{m['tokens_per_image']:.1f}",
                      f"{m['padding_pct']:.1f} %", f"{m['steady_padding_pct']:.1f} %", f"{m['images_per_s']:.1f}",
                      f"{m['useful_tokens_per_s']:,.0f}", f"{m['seconds']:.2f}", f"{m['cpu_seconds']:.2f}"))
    widths = [max(len(row[i]) for row in table) for i in range(len(head))]
    fmt = [(lambda s, w=w: s.ljust(w)) if i == 0 else (lambda s, w=w: s.rjust(w)) for i, w in enumerate(widths)]
    title = (f"patchloom bench  (recipe {result['recipe'][:12]}, {result['shards']} shards, "
             f"{result['repeats']} run{'s' if result['repeats'] != 1 else ''} per side interleaved, "
             f"{result['output_dtype']} output)")
    lines = [title, "-" * len(title)]
    lines += ["  " + "  ".join(f(c) for f, c in zip(fmt, row)) for row in table]
    for side in SIDES:
        rates = " ".join(f"{r['images_per_s']:.1f}" for r in result[side]["runs"])
        lines.append(f"  {side} runs, images/s: {rates}")
    if result.get("peak_rss_mib") is not None:
        lines.append(f"  process peak RSS: {result['peak_rss_mib']:.0f} MiB (both sides, one process)")
    stages = result.get("stages")
    if stages:
        total = stages["total_us"] or 1.0
        parts = "  ".join(f"{k} {v:,.0f}" for k, v in stages["us_per_image"].items())
        lines.append(f"  pipeline stages, us/image over {stages['images']} images: {parts}  (sum {total:,.0f})")
        pack = stages["us_per_image"].get("pack", 0.0)
        lines.append(f"  packing share of the chain: {100 * pack / total:.2f} %")
    if result.get("quality"):
        from .quality import format_quality

        lines += ["  " + line for line in format_quality(result["quality"]).splitlines()]
    ratio = result["ratio"]
    lines.append(f"  by CPU time: {ratio['images_per_cpu_s']:.2f}x images/s")
    lines.append(f"pipeline / baseline: {ratio['images_per_s']:.2f}x images/s, "
                 f"{ratio['useful_tokens_per_s']:.2f}x useful tokens/s")
    return "\n".join(lines)

