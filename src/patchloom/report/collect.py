"""One streaming pass of the training pipeline, watched: statistics over every image, a seeded
reservoir of raw records to trace, and a couple of packed batches to draw.

The pass *is* `Pipeline` iteration (reader, shuffle buffer, `process_record`, `Packer`): the report
only listens, through the Pipeline's observers `on_record` and `on_sample`, to the records the
reader yields and the PatchSets the per-sample chain makes. Which records get traced is a
reservoir sample over the reader's records drawn from `stream_rng(seed, epoch, "report")`, so the
choice does not depend on timing and needs no second pass over the shards. The traced records are then run through `process_record` again with a
`trace` dict, and their tokens are checked against the ones the pass produced.
"""

from __future__ import annotations

import hashlib
import sys
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..packing.batch import PackedBatch
from ..image.patches import PatchSet
from ..pipeline import Pipeline
from ..recipe.schema import Recipe
from ..image.chain import SampleError, process_record
from ..seeding import stream_rng
from ..read import Record
from ..summary import RunStats


@dataclass(slots=True, frozen=True)
class ImageFacts:
    """What the report keeps about every image the per-sample chain made (small, no pixels)."""

    key: str
    shard: str
    height: int  # source size as read from the file (after EXIF orientation)
    width: int
    grid_h: int
    grid_w: int
    tokens: int  # tokens sent to the packer (after dropping)
    aspect_error: float  # |log| of grid aspect over (cropped) source aspect
    scale: float  # resize factor along the long side of the crop (> 1: upscaled)
    drop_rate: float  # realised share of grid cells dropped or masked
    target_rate: float  # the drop rate drawn for it (0 without dropping)

    @property
    def aspect_before(self) -> float:
        return self.width / self.height if self.height else float("nan")

    @property
    def aspect_after(self) -> float:
        return self.grid_w / self.grid_h

    @property
    def name(self) -> str:
        return f"{self.key} ({self.shard.rsplit('/', 1)[-1]})" if self.shard else self.key


def image_facts(ps: PatchSet) -> ImageFacts:
    """ImageFacts of one PatchSet, from what the chain wrote into its meta (plan, drop, size)."""
    meta = ps.meta
    plan = meta.get("plan", {})
    gh, gw = (int(v) for v in ps.grid)
    size = meta.get("size") or [0, 0]
    drop = meta.get("drop")
    if drop:
        total = max(1, int(drop["total"]))
        realised, target = 1.0 - int(drop["kept"]) / total, float(drop["rate"])
    else:
        realised, target = 0.0, 0.0
    return ImageFacts(
        key=ps.key, shard=str(meta.get("shard", "")), height=int(size[0]), width=int(size[1]),
        grid_h=gh, grid_w=gw, tokens=ps.num_tokens, aspect_error=float(plan.get("aspect_error", 0.0)),
        scale=float(plan.get("scale", 1.0)), drop_rate=realised, target_rate=target,
    )


def digest(ps: PatchSet) -> str:
    """Content hash of a PatchSet's tokens (values, coords, masked flags, grid)."""
    h = hashlib.blake2b(digest_size=16)
    h.update(np.ascontiguousarray(ps.patches).tobytes())
    h.update(np.ascontiguousarray(ps.coords).tobytes())
    h.update(repr((tuple(ps.grid), str(ps.patches.dtype))).encode())
    if ps.masked is not None:
        h.update(np.ascontiguousarray(ps.masked).tobytes())
    return h.hexdigest()


class Reservoir:
    """Uniform sample of k items from a stream of unknown length (one pass, seeded Generator)."""

    def __init__(self, k: int, rng: np.random.Generator) -> None:
        self.k = max(0, int(k))
        self.rng = rng
        self.seen = 0
        self.items: list[tuple[int, Any]] = []  # (stream position, item)

    def offer(self, item: Any) -> tuple[bool, Any]:
        """Consider one item: (whether it is in the sample now, the item it displaced or None)."""
        i = self.seen
        self.seen += 1
        if self.k == 0:
            return False, None
        if len(self.items) < self.k:
            self.items.append((i, item))
            return True, None
        j = int(self.rng.integers(0, i + 1))
        if j < self.k:
            evicted = self.items[j][1]
            self.items[j] = (i, item)
            return True, evicted
        return False, None

    def sample(self) -> list[tuple[int, Any]]:
        """The chosen items in stream order."""
        return sorted(self.items, key=lambda t: t[0])


@dataclass(slots=True, eq=False)
class Traced:
    """One reservoir-chosen record, run through process_record again with a trace."""

    position: int  # its place in the reader's stream
    key: str
    shard: str
    index: int
    trace: dict[str, Any] = field(default_factory=dict)
    error: SampleError | None = None
    stream_digest: str | None = None  # digest of the PatchSet the pass made for it
    trace_digest: str | None = None

    @property
    def ok(self) -> bool:
        return self.error is None and "patchset" in self.trace

    @property
    def matches_stream(self) -> bool | None:
        if self.stream_digest is None or self.trace_digest is None:
            return None
        return self.stream_digest == self.trace_digest


@dataclass(slots=True, eq=False)
class Collected:
    """Everything the pass gathered."""

    ledger: dict[str, Any]
    run: RunStats
    images: list[ImageFacts]
    row_padding: np.ndarray  # padding share of every row of every batch
    row_images: np.ndarray  # images in every row
    rows_in_last_batch: int
    batches: list[PackedBatch]  # the first few batches, to draw
    traced: list[Traced]
    records: dict[int, Record]  # position -> record, for the traced ones (determinism panel)
    seconds: float


def collect(recipe: Recipe, *, shards=None, epoch: int = 0, samples: int = 12, seed: int | None = None,
            max_images: int | None = None, keep_batches: int = 2, progress: bool = True,
            allow_shell: bool = False) -> Collected:
    """Run the recipe's pipeline over its shards once, watching; then trace the chosen records."""
    from tqdm import tqdm

    started = time.perf_counter()
    seed = recipe.seed if seed is None else seed
    reservoir = Reservoir(samples, stream_rng(seed, epoch, "report"))
    chosen: dict[tuple[str, int], int] = {}  # (shard, index) -> stream position, while in the reservoir
    stream_digests: dict[tuple[str, int], str] = {}
    images: list[ImageFacts] = []
    bar = tqdm(desc="inspect", unit=" img", disable=not progress, file=sys.stderr, dynamic_ncols=True)

    def on_record(rec: Record) -> None:
        pos = reservoir.seen
        taken, evicted = reservoir.offer(rec)
        if evicted is not None:
            chosen.pop((evicted.url, evicted.index), None)
            stream_digests.pop((evicted.url, evicted.index), None)
        if taken:
            chosen[(rec.url, rec.index)] = pos
        bar.update(1)

    def on_sample(ps: PatchSet) -> None:
        images.append(image_facts(ps))
        ref = (str(ps.meta.get("shard", "")), int(ps.meta.get("index", -1)))
        if ref in chosen and not ps.meta.get("image"):  # a multi-image sample is traced by its first image
            stream_digests[ref] = digest(ps)

    pipe = Pipeline(recipe, shards, epoch=epoch, allow_shell=allow_shell, on_record=on_record,
                    on_sample=on_sample, max_records=max_images)
    run = RunStats()
    pads: list[np.ndarray] = []
    per_row: list[np.ndarray] = []
    kept: list[PackedBatch] = []
    last_rows = 0
    try:
        for batch in pipe:
            run.add(batch)
            seg = batch.segment_ids
            pads.append(1.0 - np.count_nonzero(seg, axis=1) / seg.shape[1])
            per_row.append((batch.segment_lengths() > 0).sum(axis=1))
            last_rows = batch.rows
            if len(kept) < keep_batches:
                kept.append(batch)
            bar.set_postfix(batches=run.batches, skipped=pipe.ledger.skipped_count, refresh=False)
    finally:
        bar.close()

    traced: list[Traced] = []
    records: dict[int, Record] = {}
    for pos, rec in reservoir.sample():
        t = Traced(pos, rec.key, rec.url, rec.index)
        try:
            ps = process_record(rec, recipe, epoch, trace=t.trace)
            t.trace_digest = digest(ps)
        except SampleError as err:
            t.error = err
        t.stream_digest = stream_digests.get((rec.url, rec.index))
        traced.append(t)
        records[pos] = rec
    return Collected(
        ledger=pipe.ledger.to_dict(), run=run, images=images,
        row_padding=np.concatenate(pads) if pads else np.zeros(0),
        row_images=np.concatenate(per_row) if per_row else np.zeros(0, np.int64),
        rows_in_last_batch=last_rows, batches=kept, traced=traced, records=records,
        seconds=time.perf_counter() - started,
    )


def determinism(rec: Record, recipe: Recipe, epoch: int, *, epochs: int = 4) -> dict[str, Any]:
    """One record under `epochs` consecutive epochs, and under `epoch` twice.

    Returns the traces (epoch -> trace), whether the repeat is pixel-identical (augmented image and
    tokens), the largest pixel difference, and how many distinct results the epochs gave."""
    traces: dict[int, dict[str, Any]] = {}
    digests: dict[int, str] = {}
    for e in range(epoch, epoch + epochs):
        t: dict[str, Any] = {}
        digests[e] = digest(process_record(rec, recipe, e, trace=t))
        traces[e] = t
    again: dict[str, Any] = {}
    repeat_digest = digest(process_record(rec, recipe, epoch, trace=again))
    a, b = traces[epoch]["augmented"], again["augmented"]
    same_shape = a.shape == b.shape
    max_diff = int(np.abs(a.astype(np.int16) - b.astype(np.int16)).max()) if same_shape else None
    return {
        "traces": traces,
        "repeat": again,
        "identical": bool(same_shape and max_diff == 0 and repeat_digest == digests[epoch]),
        "max_diff": max_diff,
        "distinct": len(set(digests.values())),
        "epochs": list(traces),
    }
