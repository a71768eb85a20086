"""Pipeline: compose the stages from a Recipe into an iterator of PackedBatch.

record -> header -> size plan -> decoded pixels -> resized -> patches -> Packer -> batches.
Each sample's random draws come from its own generator (seed, epoch, key, stage), so its tokens do
not depend on worker count, order or resume point.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from PIL import Image

from .batch import PackedBatch
from .decode import OpenedImage, open_image, to_rgb
from .packing import Packer
from .patches import PatchSet, grid_coords, normalize, patchify
from .recipe import Recipe
from .seeding import sample_rng, stream_rng
from .sizing import SizePlan, plan_size, resize_to_plan
from .sources import Record, ShuffleBuffer, expand_shards, read_tasks, reader_tasks


class SampleError(RuntimeError):
    """One sample failed; the message names the shard, the key, the stage and the cause."""

    def __init__(self, shard: str, key: str, stage: str, cause: str) -> None:
        super().__init__(f"shard {shard}, key {key!r}, stage {stage}: {cause}")
        self.shard, self.key, self.stage, self.cause = shard, key, stage, cause


@dataclass(slots=True)
class Skip:
    """A sample (or the rest of a shard) that was not emitted, and why."""

    shard: str
    key: str
    stage: str
    reason: str


@dataclass(slots=True)
class Ledger:
    """Counts of samples read, emitted and skipped; read == emitted + skipped + in_buffer."""

    read: int = 0
    emitted: int = 0
    skipped: list[Skip] = field(default_factory=list)
    shard_errors: list[Skip] = field(default_factory=list)

    @property
    def in_buffer(self) -> int:
        return self.read - self.emitted - len(self.skipped)

    def reasons(self) -> dict[str, int]:
        """Skipped samples counted by stage and the gist of their cause."""
        return dict(Counter(f"{s.stage}: {_gist(s.reason)}" for s in self.skipped))

    def examples(self, per_reason: int = 2) -> dict[str, list[str]]:
        """A few `key (shard)` examples for each reason, so a user can go and look."""
        out: dict[str, list[str]] = {}
        for s in self.skipped:
            names = out.setdefault(f"{s.stage}: {_gist(s.reason)}", [])
            if len(names) < per_reason:
                names.append(f"{s.key} ({s.shard.rsplit('/', 1)[-1]})")
        return out

    def to_dict(self) -> dict[str, Any]:
        return {
            "read": self.read,
            "emitted": self.emitted,
            "skipped": len(self.skipped),
            "in_buffer": self.in_buffer,
            "skip_reasons": self.reasons(),
            "skip_examples": self.examples(),
            "shard_errors": [s.shard + ": " + s.reason for s in self.shard_errors],
        }


def _gist(reason: str) -> str:
    """'DecodeError: truncated image data (OSError: ...); ...' -> 'truncated image data'."""
    head, sep, rest = reason.partition(": ")
    text = rest if sep and head.isidentifier() else reason
    for stop in (" (", "; ", ": "):
        text = text.split(stop, 1)[0]
    return text.strip()[:80]


def _find_image(rec: Record, image_keys: list[str]) -> tuple[str, bytes]:
    for ext in image_keys:
        if ext in rec.members:
            return ext, rec.members[ext]
    raise ValueError(
        f"no image member: looked for {', '.join(image_keys)}; found {', '.join(sorted(rec.members)) or 'nothing'} "
        "(set source.image_keys to the extensions your shards use)"
    )


def parse_label(rec: Record, label_key: str | None) -> int | None:
    """Label from a member: `cls` (integer text) or `json:field` (a field of a JSON member)."""
    if label_key is None:
        return None
    ext, _, json_field = label_key.partition(":")
    if ext not in rec.members:
        return None
    raw = rec.members[ext]
    if json_field:
        value = json.loads(raw.decode("utf-8")).get(json_field)
    else:
        value = raw.decode("utf-8").strip()
    if value is None or value == "":
        return None
    try:
        return int(value)
    except (TypeError, ValueError):
        raise ValueError(f"label {label_key!r} must be an integer (got {value!r})") from None


def _reduce_hint(opened: OpenedImage, plan: SizePlan) -> tuple[int, int]:
    """Full-image size at which the plan's crop would already be its resized content size."""
    left, top, right, bottom = plan.crop
    return (
        max(1, round(opened.width * plan.content_w / (right - left))),
        max(1, round(opened.height * plan.content_h / (bottom - top))),
    )


def pixels_to_patchset(image: Image.Image, plan: SizePlan, recipe: Recipe, *, key: str,
                       label: int | None, meta: dict[str, Any]) -> PatchSet:
    """Resize an RGB image to its plan and cut it into a PatchSet (the shared tail of every path)."""
    resized = resize_to_plan(image, plan, resample=recipe.sizing.resample, background=recipe.decode.background)
    patches = patchify(np.asarray(resized), plan.patch_size)
    out = recipe.output
    patches = normalize(patches, out.mean, out.std, out.dtype)
    meta = {**meta, "plan": plan.to_dict()}
    return PatchSet(patches, grid_coords(plan.grid_h, plan.grid_w), (plan.grid_h, plan.grid_w), key, label, meta)


def _sizing_rng(recipe: Recipe, seed: int, epoch: int, key: str) -> np.random.Generator | None:
    return sample_rng(seed, epoch, key, "sizing") if recipe.sizing.mode == "sampled" else None


def process_record(rec: Record, recipe: Recipe, epoch: int) -> PatchSet:
    """One raw record -> PatchSet, raising SampleError naming shard, key and stage on failure."""
    stage = "select"
    try:
        ext, data = _find_image(rec, recipe.source.image_keys)
        label = parse_label(rec, recipe.source.label_key)
        stage = "decode"
        opened = open_image(data, pixel_limit=recipe.decode.pixel_limit)
        stage = "sizing"
        plan = plan_size(opened.height, opened.width, recipe.sizing, _sizing_rng(recipe, recipe.seed, epoch, rec.key))
        stage = "decode"
        hint = _reduce_hint(opened, plan) if recipe.decode.reduced_jpeg else None
        image = opened.decode(background=recipe.decode.background, reduce_to=hint)
        stage = "patches"
        meta = {"shard": rec.url, "index": rec.index, "member": ext, "format": opened.format,
                "mode": opened.mode, "size": [opened.height, opened.width]}
        return pixels_to_patchset(image, plan, recipe, key=rec.key, label=label, meta=meta)
    except SampleError:
        raise
    except Exception as exc:
        raise SampleError(rec.url, rec.key, stage, f"{type(exc).__name__}: {exc}") from exc


def image_to_patches(image: np.ndarray | Image.Image, recipe: Recipe, seed: int | None = None,
                     key: str = "", *, epoch: int = 0, label: int | None = None) -> PatchSet:
    """One image (HxWx3 uint8 array or PIL image) -> PatchSet under the recipe, without shards.

    `seed` plays the role of the recipe's seed for this call's random draws (None: the recipe's),
    so the same (seed, epoch, key) gives the same tokens as the pipeline would.
    """
    if isinstance(image, np.ndarray):
        if image.ndim == 2:
            image = np.repeat(image[:, :, None], 3, axis=2)
        if image.ndim != 3 or image.shape[2] not in (3, 4) or image.dtype != np.uint8:
            raise ValueError(
                f"image must be an HxWx3 uint8 array (got shape {image.shape}, dtype {image.dtype})"
            )
        pil = Image.fromarray(image)
    elif isinstance(image, Image.Image):
        pil = image
    else:
        raise TypeError(f"image must be a numpy array or a PIL image (got {type(image).__name__})")
    pil = to_rgb(pil, background=recipe.decode.background)
    seed = recipe.seed if seed is None else seed
    plan = plan_size(pil.height, pil.width, recipe.sizing, _sizing_rng(recipe, seed, epoch, key))
    meta = {"size": [pil.height, pil.width]}
    return pixels_to_patchset(pil, plan, recipe, key=key, label=label, meta=meta)


class Pipeline:
    """Iterable of PackedBatch for one reader (rank, worker) over one epoch of a recipe's shards.

    `shards` overrides the recipe's. Call `set_epoch(e)` between epochs. `state_dict()` /
    `load_state_dict()` resume mid-epoch with the identical continuation.
    """

    def __init__(
        self,
        recipe: Recipe,
        shards: str | list[str] | None = None,
        rank: int = 0,
        world_size: int = 1,
        epoch: int = 0,
        *,
        worker: int = 0,
        num_workers: int = 1,
    ) -> None:
        if not isinstance(recipe, Recipe):
            raise TypeError(f"Pipeline needs a Recipe (got {type(recipe).__name__}); use Recipe.from_file(path)")
        self.recipe = recipe
        src = recipe.source
        self.shards = expand_shards(shards if shards is not None else src.shards, allow_shell=src.allow_shell)
        self.rank, self.world_size = rank, world_size
        self.worker, self.num_workers = worker, num_workers
        self.epoch = epoch
        self.ledger = Ledger()
        self._batches = 0
        self._skip_batches = 0
        self._packer: Packer | None = None
        self._shuffle: ShuffleBuffer | None = None

    def set_epoch(self, epoch: int) -> None:
        """Start a different epoch on the next iteration (new shard order, shuffles and draws)."""
        self.epoch = epoch

    @property
    def in_buffer(self) -> int:
        """Samples read but not yet emitted or skipped (shuffle buffer + packer look-ahead)."""
        held = len(self._shuffle.held) if self._shuffle else 0
        pending = len(self._packer.pending) if self._packer else 0
        return held + pending

    def _records(self) -> Iterator[Record]:
        r = self.recipe
        tasks = reader_tasks(
            self.shards, seed=r.seed, epoch=self.epoch, rank=self.rank, world_size=self.world_size,
            worker=self.worker, num_workers=self.num_workers, shuffle_shards=r.source.shuffle_shards,
        )
        on_error = self._shard_error if r.source.on_error == "skip" else None
        for rec in read_tasks(tasks, allow_shell=r.source.allow_shell, on_shard_error=on_error):
            self.ledger.read += 1
            yield rec

    def _shard_error(self, url: str, exc: Exception) -> None:
        self.ledger.shard_errors.append(Skip(url, "", "read", f"{type(exc).__name__}: {exc}"))

    def samples(self) -> Iterator[PatchSet]:
        """The PatchSets of this reader's epoch, before packing (bad samples skipped or raised)."""
        r = self.recipe
        rng = stream_rng(r.seed, self.epoch, "sample-shuffle", self.rank, self.world_size, self.worker,
                         self.num_workers)
        self._shuffle = ShuffleBuffer(r.source.shuffle_buffer, rng)
        for rec in self._shuffle(self._records()):
            try:
                yield process_record(rec, r, self.epoch)
            except SampleError as err:
                if r.source.on_error == "raise":
                    raise
                self.ledger.skipped.append(Skip(err.shard, err.key, err.stage, err.cause))

    def __iter__(self) -> Iterator[PackedBatch]:
        p = self.recipe.packing
        self.ledger = Ledger()
        self._batches = 0
        skip, self._skip_batches = self._skip_batches, 0
        self._packer = packer = Packer(
            seq_len=p.seq_len, rows=p.rows, max_images_per_row=p.max_images_per_row,
            buffer=p.buffer, algorithm=p.algorithm,
        )

        def emit(batch: PackedBatch) -> Iterator[PackedBatch]:
            self.ledger.emitted += batch.num_images
            self._batches += 1
            if self._batches > skip:
                yield batch

        for ps in self.samples():
            for batch in packer.push(ps):
                yield from emit(batch)
        for batch in packer.flush():
            yield from emit(batch)

    def state_dict(self) -> dict[str, Any]:
        """JSON-able position: epoch and batches yielded, tied to the recipe and shard list."""
        return {
            "fingerprint": self.recipe.fingerprint(),
            "shards": len(self.shards),
            "epoch": self.epoch,
            "batches": self._batches,
            "rank": self.rank,
            "world_size": self.world_size,
            "worker": self.worker,
            "num_workers": self.num_workers,
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Resume: the next iteration continues right after the saved batch.

        This version replays the epoch up to the saved point (exact, but costs the work already
        done); it refuses a state saved under another recipe or reader layout.
        """
        if state.get("fingerprint") != self.recipe.fingerprint():
            raise ValueError("this state was saved under a different recipe (fingerprints differ)")
        for name in ("shards", "rank", "world_size", "worker", "num_workers"):
            mine = len(self.shards) if name == "shards" else getattr(self, name)
            if state.get(name) != mine:
                raise ValueError(f"state was saved with {name}={state.get(name)}, this pipeline has {mine}")
        self.epoch = int(state["epoch"])
        self._skip_batches = int(state["batches"])
        self._batches = self._skip_batches
