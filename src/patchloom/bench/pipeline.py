"""Benchmark: the pipeline beside a plain square-resize baseline and its own kernels, in one process,
over the same shards.

The baseline is what most image loaders do today: read the same tar records (patchloom.read, in
shard order, no shuffle), decode every image fully with Pillow and `convert("RGB")`, squash it to a
square of `patch_size * isqrt(max_tokens)` pixels with Pillow's **bilinear** filter, patchify it
with numpy and stack fixed-count batches. A second baseline line does the same with bicubic.

"Kernels alone" is the pipeline's own decode, resize and patchify calls for the same images, in a
bare loop over bytes already in memory: the decoder and DCT scale the pipeline picks (libjpeg-turbo,
libspng or Pillow), the recipe's resample filter to the same size plan, and patchify. Its plans and
decoder choices are made beforehand, untimed, so pipeline / kernels is what everything around the
kernels costs (reading, headers, planning, seeding, packing, the ledger).

The candidate is a full iteration of `Pipeline(recipe, shards)`. Runs are interleaved (baseline,
bicubic baseline, kernels, pipeline, baseline, ...) so that slow phases of a noisy machine hit
every side alike; each side reports the median over its runs, and each ratio is also given per
run (`ratio_runs`), from sides timed back to back. No timing is asserted anywhere.
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

from ..image.chain import SampleError, find_image, parse_label, plan_for, process_record, reduce_hint
from ..image.decode import DecodedImage, FastDecode, fast_rgb, open_image, orient_pixels
from ..image.patches import normalize, patchify
from ..image.sizing import RESAMPLE_FILTERS, SizePlan, resize_to_plan
from ..packing.packer import Packer
from ..pipeline import Pipeline
from ..read import ShardTask, expand_shards, read_tasks, shard_order
from ..recipe import Recipe

try:  # not on Windows; the memory column is then left empty
    import resource
except ImportError:  # pragma: no cover - platform dependent
    resource = None  # type: ignore[assignment]

__all__ = [
    "KernelJob",
    "RATIOS",
    "RunResult",
    "SquareBaseline",
    "baseline_batch_images",
    "baseline_side",
    "format_bench",
    "format_corpus_ratios",
    "kernel_jobs",
    "kernel_patches",
    "ratio_range",
    "run_bench",
    "square_patches",
    "stage_profile",
    "time_baseline",
    "time_bicubic_baseline",
    "time_kernels",
    "time_pipeline",
    "warm_cache",
]

#: Stages in the order the per-sample chain runs them, as `process_record(timings=...)` names them.
STAGES = ("read", "header", "sizing", "decode", "resize", "augment", "patches", "drop", "patch_ops", "output",
          "pack")

SIDES = ("baseline", "baseline_bicubic", "kernels", "pipeline")

#: The baseline's resample filter (what a plain loader uses), and the second baseline line's.
BASELINE_RESAMPLE = "bilinear"
BICUBIC_RESAMPLE = "bicubic"


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


def square_patches(data: bytes, *, side: int, patch_size: int, resample: str = BASELINE_RESAMPLE) -> np.ndarray:
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
    Normalisation to the recipe's output dtype is applied once per stacked batch. `resample` is a
    Pillow filter name (bilinear by default, as plain loaders use).
    """

    def __init__(self, recipe: Recipe, shards: list[str], *, max_images: int | None = None,
                 resample: str = BASELINE_RESAMPLE) -> None:
        if not isinstance(RESAMPLE_FILTERS.get(resample), Image.Resampling):
            raise ValueError(f"the square baseline uses a Pillow filter (got {resample!r})")
        self.recipe = recipe
        self.shards = shards
        self.max_images = max_images
        self.resample = resample
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
                                         resample=self.resample)
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
# Kernels alone: the pipeline's decode, resize and patchify calls in a bare loop
# --------------------------------------------------------------------------------------------


@dataclass(slots=True)
class KernelJob:
    """One image's kernel calls, decided beforehand (untimed) as the pipeline decides them."""

    data: bytes
    plan: SizePlan
    call: FastDecode | None  # the fast decoder call, or None: Pillow (open and decode, as the pipeline does)
    orientation: int
    hint: tuple[int, int] | None  # the reduce_to the pipeline passes (for the Pillow path)


def kernel_jobs(recipe: Recipe, urls: list[str], max_images: int | None = None) -> list[KernelJob]:
    """The images of `urls` in shard order with their size plans and decoder calls (samples the pipeline
    would skip are left out). Reads every record; nothing here is timed."""
    r = recipe
    order = shard_order(urls, seed=r.seed, epoch=0, shuffle=r.source.shuffle_shards)
    jobs: list[KernelJob] = []
    for rec in read_tasks([ShardTask(u) for u in order], allow_shell=False):
        if max_images is not None and len(jobs) >= max_images:
            break
        try:
            _ext, data = find_image(rec, r.source.image_keys)
            opened = open_image(data, pixel_limit=r.decode.pixel_limit, memory_limit=r.decode.memory_limit)
            plan = plan_for(opened.height, opened.width, r, seed=r.seed, epoch=0, key=rec.key)
            hint = reduce_hint(opened, plan) if r.decode.reduced_jpeg else None
            call = opened.fast_decode(opened.decode_scale(hint))
            opened.decode(background=r.decode.background, reduce_to=hint)  # the pipeline would not skip it
        except Exception:  # noqa: BLE001 - what the pipeline skips, the kernels leave out
            continue
        jobs.append(KernelJob(data, plan, call, opened.orientation, hint))
    return jobs


def kernel_patches(job: KernelJob, recipe: Recipe) -> np.ndarray:
    """One image through the pipeline's kernels: decode (same decoder and scale), resize (the recipe's
    filter, same plan), patchify."""
    dec = recipe.decode
    pixels = fast_rgb(job.call, job.data, dec.background) if job.call is not None else None
    if pixels is not None:
        image: Any = DecodedImage(orient_pixels(pixels, job.orientation))
    else:
        image = open_image(job.data, pixel_limit=dec.pixel_limit, memory_limit=dec.memory_limit).decode(
            background=dec.background, reduce_to=job.hint)
    out = resize_to_plan(image, job.plan, resample=recipe.sizing.resample, background=dec.background)
    return patchify(np.asarray(out), job.plan.patch_size)


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


def time_baseline(recipe: Recipe, urls: list[str], max_images: int | None, bar: tqdm, *,
                  resample: str = BASELINE_RESAMPLE) -> RunResult:
    """One timed pass of the square-resize baseline over `urls` (stops after `max_images`)."""
    base = SquareBaseline(recipe, urls, max_images=max_images, resample=resample)
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


def time_bicubic_baseline(recipe: Recipe, urls: list[str], max_images: int | None, bar: tqdm) -> RunResult:
    """One timed pass of the square baseline with Pillow's bicubic filter instead of bilinear."""
    res = time_baseline(recipe, urls, max_images, bar, resample=BICUBIC_RESAMPLE)
    res.side = "baseline_bicubic"
    return res


def time_kernels(recipe: Recipe, jobs: list[KernelJob], max_images: int | None, bar: tqdm) -> RunResult:
    """One timed pass of the kernels alone over `jobs` (bytes in memory, plans made): no batches."""
    res = RunResult("kernels")
    todo = jobs if max_images is None else jobs[:max_images]
    t0, c0 = time.perf_counter(), time.process_time()
    for job in todo:
        kernel_patches(job, recipe)
        res.images += 1
        res.tokens += job.plan.tokens
        bar.update(1)
    res.seconds, res.cpu_seconds = time.perf_counter() - t0, time.process_time() - c0
    res.slots = res.tokens
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
    """Time the bilinear baseline, the bicubic baseline, the kernels alone and the pipeline `repeats`
    times each, interleaved; return a JSON-able dict.

    `shards` overrides the recipe's; `max_images` stops each run after the batch that reaches it.
    After the timed runs, one untimed pass measures per-stage microseconds (`stages`) and, with
    `quality_check`, the PSNR of the pipeline's pixels against full decode + Lanczos (`quality`).
    The dict holds each side's runs and medians, `ratio` from the medians (pipeline / baseline for
    images/s, useful (non-padding) tokens/s and images per CPU second; pipeline / bicubic baseline;
    kernels / baseline; pipeline / kernels) and `ratio_runs`, the images/s ratios of each repeat.
    """
    if repeats < 1:
        raise ValueError(f"repeats must be >= 1 (got {repeats})")
    if max_images is not None and max_images < 1:
        raise ValueError(f"max_images must be >= 1 (got {max_images})")
    src = recipe.source
    urls = expand_shards(shards if shards is not None else src.shards, allow_shell=False)
    warm_cache(recipe, urls)
    jobs = kernel_jobs(recipe, urls, max_images)
    runs: dict[str, list[RunResult]] = {side: [] for side in SIDES}
    timers = {"baseline": time_baseline, "baseline_bicubic": time_bicubic_baseline,
              "kernels": lambda r, u, m, bar: time_kernels(r, jobs, m, bar), "pipeline": time_pipeline}
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
    ips = {side: med[side]["images_per_s"] for side in SIDES}
    return {
        "stages": stages,
        "quality": quality,
        "recipe": recipe.fingerprint(),
        "resample": recipe.sizing.resample,
        "shards": len(urls),
        "repeats": repeats,
        "max_images": max_images,
        "baseline_square": baseline_side(recipe),
        "baseline_batch_images": baseline_batch_images(recipe),
        "pipeline_batch": [recipe.packing.rows, recipe.packing.seq_len],
        "output_dtype": recipe.output.dtype,
        **{side: {"median": med[side], "runs": [r.to_dict() for r in runs[side]]} for side in SIDES},
        "ratio": {
            "images_per_s": _ratio(ips["pipeline"], ips["baseline"]),
            "useful_tokens_per_s": _ratio(med["pipeline"]["useful_tokens_per_s"],
                                          med["baseline"]["useful_tokens_per_s"]),
            # the same images/s ratio from process CPU time, which a busy machine disturbs less
            "images_per_cpu_s": _ratio(med["pipeline"]["images_per_cpu_s"], med["baseline"]["images_per_cpu_s"]),
            "vs_bicubic_baseline": _ratio(ips["pipeline"], ips["baseline_bicubic"]),
            "kernels_vs_baseline": _ratio(ips["kernels"], ips["baseline"]),
            "pipeline_vs_kernels": _ratio(ips["pipeline"], ips["kernels"]),
            **{f"{name}_cpu": _ratio(med[a]["images_per_cpu_s"], med[b]["images_per_cpu_s"])
               for name, (a, b) in RATIOS.items()},
        },
        "ratio_runs": [_run_ratios({side: runs[side][i] for side in SIDES}) for i in range(repeats)],
        "peak_rss_mib": _peak_rss_mib(),
    }


#: The images/s ratios reported per run and in the summary: name -> (numerator side, denominator side).
RATIOS = {"images_per_s": ("pipeline", "baseline"), "vs_bicubic_baseline": ("pipeline", "baseline_bicubic"),
          "kernels_vs_baseline": ("kernels", "baseline"), "pipeline_vs_kernels": ("pipeline", "kernels")}


def _run_ratios(run: dict[str, RunResult]) -> dict[str, float]:
    """The images/s ratios of one repeat (its sides were timed back to back), by wall time and, as
    `<name>_cpu`, by process CPU time (which other work on a shared machine disturbs less)."""
    out = {name: _ratio(run[a].images_per_s, run[b].images_per_s) for name, (a, b) in RATIOS.items()}
    out.update({f"{name}_cpu": _ratio(run[a].images_per_cpu_s, run[b].images_per_cpu_s)
                for name, (a, b) in RATIOS.items()})
    return out


def ratio_range(result: dict, name: str) -> tuple[float, float]:
    """(lowest, highest) of one images/s ratio over the repeats of a run_bench result."""
    values = [r[name] for r in result["ratio_runs"]]
    return min(values), max(values)


def format_bench(result: dict) -> str:
    """A small table of every side's medians, the per-run rates, the stage profile and the ratio lines
    (from the medians, with the range over the runs)."""
    side_px = result["baseline_square"]
    rows_, seq = result["pipeline_batch"]
    names = {
        "baseline": f"baseline (bilinear square {side_px}x{side_px}, {result['baseline_batch_images']} img/batch)",
        "baseline_bicubic": "baseline, bicubic",
        "kernels": f"kernels alone (decode, {result.get('resample', '?')} resize, patchify)",
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
        per = stages["us_per_image"]
        lines.append(f"  outside decode and resize: {total - per.get('decode', 0.0) - per.get('resize', 0.0):,.0f} "
                     f"us/image; packing share of the chain: {100 * per.get('pack', 0.0) / total:.2f} %")
    if result.get("quality"):
        from .quality import format_quality

        lines += ["  " + line for line in format_quality(result["quality"]).splitlines()]
    ratio = result["ratio"]
    lines.append(f"  by CPU time: {ratio['images_per_cpu_s']:.2f}x images/s")
    for name, label in (("vs_bicubic_baseline", "pipeline / bicubic baseline"),
                        ("kernels_vs_baseline", "kernels alone / baseline"),
                        ("pipeline_vs_kernels", "pipeline / kernels alone (1 - overhead)")):
        lo, hi = ratio_range(result, name)
        clo, chi = ratio_range(result, f"{name}_cpu")
        lines.append(f"  {label}: {ratio[name]:.2f}x images/s (runs {lo:.2f} to {hi:.2f}); by CPU time "
                     f"{ratio[name + '_cpu']:.2f}x (runs {clo:.2f} to {chi:.2f})")
    lo, hi = ratio_range(result, "images_per_s")
    lines.append(f"pipeline / baseline: {ratio['images_per_s']:.2f}x images/s, "
                 f"{ratio['useful_tokens_per_s']:.2f}x useful tokens/s (runs {lo:.2f} to {hi:.2f}x images/s)")
    return "\n".join(lines)



def format_corpus_ratios(results: dict[str, dict]) -> str:
    """Per corpus, its images/s ratios by wall time and by CPU time (medians, range over the runs)."""
    head = ("corpus", "pipeline / baseline", "pipeline / bicubic", "kernels / baseline", "pipeline / kernels")
    lines = ["ratios per corpus (images/s; median of the runs, range over the runs in brackets)"]
    for clock, suffix in (("wall time", ""), ("CPU time", "_cpu")):
        rows = [head]
        for name, r in results.items():
            cells = [f"{name} ({clock})"]
            for key in RATIOS:
                lo, hi = ratio_range(r, key + suffix)
                cells.append(f"{r['ratio'][key + suffix]:.2f}x ({lo:.2f}-{hi:.2f})")
            rows.append(tuple(cells))
        widths = [max(len(row[i]) for row in rows) for i in range(len(head))]
        lines += ["  " + "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(row, widths)))
                  for row in (rows if suffix == "" else rows[1:])]
    return "\n".join(lines)
