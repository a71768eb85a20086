"""One sample, from raw record or pixels to PatchSet: the per-image chain of stages.

A record goes read -> select -> header -> sizing (crop + size plan) -> decode -> resize ->
[augment after resize] -> patches -> [drop] -> patch_ops or output. With augmentation before
sizing the order is header -> decode -> augment -> sizing, since geometry changes the size first.
Pixels (`image_to_patches`) start at [augment] -> sizing.

`chain_for(recipe)` builds each path once per recipe (cached by fingerprint) as a tuple of named
`Stage`s, leaving out the stages the recipe does not use; `run_stages` runs them in one loop that
times them (`timings=`), records intermediates (`trace=`) and names the failing stage in a
SampleError (shard, key, stage, cause).

Every random draw comes from `sample_rng(seed, epoch, key, stage)`, so a sample's tokens depend
only on (recipe, epoch, key). With no geometric augmentation before sizing, the plan is made from
the header alone and the decoder may skip detail the plan discards (reduced JPEG decode).
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from PIL import Image

from ..errors import PatchloomError
from ..seeding import sample_rng
from .decode import OpenedImage, open_image, to_rgb, upright
from .dropping import DropDecision, apply_drop, decide_drop
from .patches import PatchSet, grid_coords, normalize, patchify
from .patchops import apply_patch_ops
from .sizing import SizePlan, draw_crop, plan_size, resize_to_plan

if TYPE_CHECKING:
    from ..read import Record
    from ..recipe.schema import Recipe


class SampleError(PatchloomError, RuntimeError):
    """One sample failed; the message names the shard, the key, the stage and the cause."""

    def __init__(self, shard: str = "", key: str = "", stage: str = "", cause: str = "", *,
                 message: str | None = None) -> None:
        # `message` alone rebuilds the error from its text (as torch does when a DataLoader worker
        # raised it), so the main process sees the same message.
        super().__init__(message if message is not None else f"shard {shard}, key {key!r}, stage {stage}: {cause}")
        self.shard, self.key, self.stage, self.cause = shard, key, stage, cause


class SkipRatioError(PatchloomError, RuntimeError):
    """Too many samples were skipped: a broken shard list should not train quietly on part of the data."""


@dataclass(slots=True, eq=False)
class Work:
    """One sample on its way through the chain: what the stages read and write."""

    recipe: Recipe
    seed: int
    epoch: int
    key: str
    rec: Record | None = None
    label: int | None = None
    meta: dict[str, Any] = field(default_factory=dict)
    member: str = ""
    data: bytes = b""
    opened: OpenedImage | None = None
    original: Image.Image | None = None  # as decoded, before any augmentation
    image: Image.Image | None = None  # what the plan is made for and resize reads
    plan: SizePlan | None = None
    pixels: np.ndarray | None = None  # HxWx3 uint8 after resize (and augment after resize)
    decision: DropDecision | None = None
    ps: PatchSet | None = None


#: trace key -> the Work field it shows (keys as `process_record(trace=...)` documents them).
TRACE_FIELDS = {"original": "original", "decoded": "image", "plan": "plan", "resized": "pixels",
                "augmented": "pixels", "drop": "decision", "patchset": "ps"}


@dataclass(frozen=True, slots=True)
class Stage:
    """One named step of the chain: `run(work)` reads and writes Work fields.

    `name` is the word a SampleError uses; `timing` the key its seconds go under in `timings`
    (None: not timed); `traces` the trace keys recorded after it runs."""

    name: str
    run: Callable[[Work], None]
    timing: str | None
    traces: tuple[str, ...] = ()


def run_stages(stages: tuple[Stage, ...], work: Work, *, trace: dict[str, Any] | None = None,
               timings: dict[str, float] | None = None, shard: str | None = None) -> PatchSet:
    """Run the stages in order and return the PatchSet they made.

    With `shard` (the record path) any failure becomes a SampleError naming the shard, the key and
    the stage; without it (the pixel path) the error comes through unchanged. A failing stage's
    time still counts in `timings`."""
    stage = None
    t0 = 0.0
    try:
        for stage in stages:
            if timings is not None and stage.timing is not None:
                t0 = time.perf_counter()
                stage.run(work)
                timings[stage.timing] = timings.get(stage.timing, 0.0) + time.perf_counter() - t0
            else:
                stage.run(work)
            if trace is not None:
                for name in stage.traces:
                    trace[name] = getattr(work, TRACE_FIELDS[name])
    except Exception as exc:
        if timings is not None and stage is not None and stage.timing is not None:
            timings[stage.timing] = timings.get(stage.timing, 0.0) + time.perf_counter() - t0
        if shard is None or isinstance(exc, SampleError):
            raise
        raise SampleError(shard, work.key, stage.name if stage else "select", f"{type(exc).__name__}: {exc}") from exc
    return work.ps  # type: ignore[return-value]  # every chain ends with a stage that sets it


def _seed32(seed: int, epoch: int, key: str, stage: str) -> int:
    """A 32-bit seed for libraries that take an integer (albumentations), from the RNG rule."""
    return int(sample_rng(seed, epoch, key, stage).integers(0, 2**31 - 1))


def find_image(rec: Record, image_keys: list[str]) -> tuple[str, bytes]:
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
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise ValueError(f"label member {ext!r} is not UTF-8 text (first bytes {raw[:8].hex(' ')})") from None
    if json_field:
        value = json.loads(text).get(json_field)
    else:
        value = text.strip()
    if value is None or value == "":
        return None
    try:
        return int(value)
    except (TypeError, ValueError):
        raise ValueError(f"label {label_key!r} must be an integer (got {value!r})") from None


def plan_for(height: int, width: int, recipe: Recipe, *, seed: int, epoch: int, key: str) -> SizePlan:
    """Random crop (if any) then the size plan, both drawn from the sample's own generators."""
    region = None
    if recipe.crop.mode != "none":
        region = draw_crop(height, width, recipe.crop, sample_rng(seed, epoch, key, "crop"))
    rng = sample_rng(seed, epoch, key, "sizing") if recipe.sizing.mode == "sampled" else None
    return plan_size(height, width, recipe.sizing, rng, region=region)


def reduce_hint(opened: OpenedImage, plan: SizePlan) -> tuple[int, int]:
    """Full-image size at which the plan's crop would already be its resized content size."""
    left, top, right, bottom = plan.crop
    return (
        max(1, round(opened.width * plan.content_w / (right - left))),
        max(1, round(opened.height * plan.content_h / (bottom - top))),
    )


# ---------------------------------------------------------------------------------------------
# the stages: each reads and writes fields of one Work


def _check_read(w: Work) -> None:
    """A record the reader could not finish (the shard broke off inside it) is not processed."""
    if w.rec.error is not None:
        raise ValueError(w.rec.error)


def _select(w: Work) -> None:
    """The size guard, the image member and the label."""
    rec, source = w.rec, w.recipe.source
    size = sum(len(v) for v in rec.members.values())
    if size > source.max_sample_bytes:
        raise ValueError(
            f"sample is {size} bytes, over source.max_sample_bytes={source.max_sample_bytes}; "
            "raise it in the recipe if such samples are expected"
        )
    w.member, w.data = find_image(rec, source.image_keys)
    w.label = parse_label(rec, source.label_key)


def _header(w: Work) -> None:
    """Open the image and read its header (format, mode, display size) under the decode guards."""
    dec = w.recipe.decode
    w.opened = opened = open_image(w.data, pixel_limit=dec.pixel_limit, memory_limit=dec.memory_limit)
    w.meta = {"shard": w.rec.url, "index": w.rec.index, "member": w.member, "format": opened.format,
              "mode": opened.mode, "size": [opened.height, opened.width]}


def _decode_full(w: Work) -> None:
    """Decode every pixel (augmentation before sizing needs them to make the plan)."""
    w.original = w.image = w.opened.decode(background=w.recipe.decode.background)


def _decode_for_plan(w: Work) -> None:
    """Decode for the plan made from the header, skipping detail it discards when allowed."""
    dec = w.recipe.decode
    hint = reduce_hint(w.opened, w.plan) if dec.reduced_jpeg else None
    w.original = w.image = w.opened.decode(background=dec.background, reduce_to=hint)


def _plan_from_header(w: Work) -> None:
    w.plan = plan_for(w.opened.height, w.opened.width, w.recipe, seed=w.seed, epoch=w.epoch, key=w.key)


def _plan_from_pixels(w: Work) -> None:
    w.plan = plan_for(w.image.height, w.image.width, w.recipe, seed=w.seed, epoch=w.epoch, key=w.key)


def _augment_before(aug: Any) -> Callable[[Work], None]:
    def augment_before(w: Work) -> None:
        seed = _seed32(w.seed, w.epoch, w.key, "augment-before")
        w.image = Image.fromarray(aug.before_sizing(np.asarray(w.image), seed))

    return augment_before


def _augment_after(aug: Any) -> Callable[[Work], None]:
    def augment_after(w: Work) -> None:
        w.pixels = aug.after_resize(w.pixels, _seed32(w.seed, w.epoch, w.key, "augment-after"))

    return augment_after


def _resize(w: Work) -> None:
    r = w.recipe
    w.pixels = np.asarray(resize_to_plan(w.image, w.plan, resample=r.sizing.resample,
                                         background=r.decode.background))


def _patches(w: Work) -> None:
    plan = w.plan
    grid = (plan.grid_h, plan.grid_w)
    w.ps = PatchSet(patchify(w.pixels, plan.patch_size), grid_coords(*grid), grid, w.key, w.label,
                    {**w.meta, "plan": plan.to_dict()})


def _drop(w: Work) -> None:
    drop = w.recipe.drop
    w.decision = decide_drop(drop, w.ps.grid, w.ps.patches, sample_rng(w.seed, w.epoch, w.key, "drop"))
    w.ps = apply_drop(w.ps, w.decision, drop.output)


def _patch_ops(w: Work) -> None:
    """The recipe's patch ops, then the output dtype (standardized values skip mean/std)."""
    ps, out = w.ps, w.recipe.output
    extra = [ps.coords] + ([ps.masked] if ps.masked is not None else [])
    values, extra, standardized = apply_patch_ops(ps.patches, w.recipe.patch_ops,
                                                  sample_rng(w.seed, w.epoch, w.key, "patch_ops"), extra=extra)
    ps.coords = extra[0]
    if ps.masked is not None:
        ps.masked = extra[1]
    ps.patches = values.astype(out.dtype) if standardized else normalize(values, out.mean, out.std, out.dtype)


def _output(w: Work) -> None:
    out = w.recipe.output
    w.ps.patches = normalize(w.ps.patches, out.mean, out.std, out.dtype)


# ---------------------------------------------------------------------------------------------
# the chains, built once per recipe


@dataclass(frozen=True, slots=True)
class Chain:
    """A recipe's stages: `record` for raw records (process_record), `pixels` for decoded images."""

    record: tuple[Stage, ...]
    pixels: tuple[Stage, ...]


def build_chain(recipe: Recipe) -> Chain:
    """The recipe's stages, leaving out what it does not use (no augment, drop or patch-op stage
    unless the recipe asks for one)."""
    aug = None
    if recipe.augment:
        from .augment import augmenter_for  # imports albumentations only when a recipe uses it

        aug = augmenter_for(recipe.augment)
    before = aug is not None and aug.has_before
    after = aug is not None and aug.has_after
    planned = ("decoded", "plan")  # what resize will read, recorded once both are known
    tail = [Stage("resize", _resize, "resize", ("resized",) if after else ("resized", "augmented"))]
    if after:
        tail.append(Stage("augment", _augment_after(aug), "augment", ("augmented",)))
    tail.append(Stage("patches", _patches, "patches"))
    if recipe.drop.mode != "none":
        tail.append(Stage("drop", _drop, "drop", ("drop",)))
    if recipe.patch_ops:
        tail.append(Stage("patch_ops", _patch_ops, "patch_ops", ("patchset",)))
    else:
        tail.append(Stage("output", _output, "output", ("patchset",)))
    head = [Stage("read", _check_read, None), Stage("select", _select, None), Stage("decode", _header, "header")]
    if before:
        # Geometry changes the size first, so the plan needs the full decoded pixels.
        head += [Stage("decode", _decode_full, "decode", ("original",)),
                 Stage("augment", _augment_before(aug), "augment"),
                 Stage("sizing", _plan_from_pixels, "sizing", planned)]
        pixels = [Stage("augment", _augment_before(aug), "augment"),
                  Stage("sizing", _plan_from_pixels, "sizing", ("original", *planned))]
    else:
        head += [Stage("sizing", _plan_from_header, "sizing"),
                 Stage("decode", _decode_for_plan, "decode", ("original", *planned))]
        pixels = [Stage("sizing", _plan_from_pixels, "sizing", ("original", *planned))]
    return Chain(tuple(head + tail), tuple(pixels + tail))


_CACHE_MAX = 16
_chains: dict[str, Chain] = {}  # by recipe fingerprint
_recent: dict[int, tuple[Recipe, Chain]] = {}  # by id(recipe): skips the fingerprint for a recipe seen before
_lock = threading.Lock()


def chain_for(recipe: Recipe) -> Chain:
    """The recipe's Chain, built on first use and cached by the recipe's fingerprint."""
    seen = _recent.get(id(recipe))
    if seen is not None and seen[0] is recipe:
        return seen[1]
    fingerprint = recipe.fingerprint()
    chain = _chains.get(fingerprint)
    if chain is None:
        chain = build_chain(recipe)
    with _lock:
        chain = _chains.setdefault(fingerprint, chain)
        while len(_chains) > _CACHE_MAX:
            _chains.pop(next(iter(_chains)))
        _recent[id(recipe)] = (recipe, chain)  # holds the recipe, so its id is not reused meanwhile
        while len(_recent) > _CACHE_MAX:
            _recent.pop(next(iter(_recent)))
    return chain


# ---------------------------------------------------------------------------------------------
# entry points


def from_pixels(image: Image.Image, recipe: Recipe, *, seed: int, epoch: int, key: str, label: int | None,
                meta: dict[str, Any], trace: dict[str, Any] | None = None,
                timings: dict[str, float] | None = None) -> PatchSet:
    """Decoded RGB image -> PatchSet (augment before sizing, plan from the pixels, then the rest).

    Errors come through as they are (no SampleError: there is no shard). `trace` and `timings` as
    in process_record."""
    work = Work(recipe, seed, epoch, key, label=label, meta=meta, original=image, image=image)
    return run_stages(chain_for(recipe).pixels, work, trace=trace, timings=timings)


def process_record(rec: Record, recipe: Recipe, epoch: int, *, trace: dict[str, Any] | None = None,
                   timings: dict[str, float] | None = None) -> PatchSet:
    """One raw record -> PatchSet, raising SampleError naming shard, key and stage on failure.

    `trace`, when given, receives the intermediates: original, decoded, plan, resized, augmented,
    drop (a DropDecision) and patchset. `timings`, when given, accumulates seconds per stage
    (header, sizing, decode, resize, augment, patches, drop, patch_ops, output)."""
    work = Work(recipe, recipe.seed, epoch, rec.key, rec=rec)
    return run_stages(chain_for(recipe).record, work, trace=trace, timings=timings, shard=rec.url)


def image_to_patches(image: np.ndarray | Image.Image, recipe: Recipe, seed: int | None = None,
                     key: str = "", *, epoch: int = 0, label: int | None = None) -> PatchSet:
    """One image (HxWx3 uint8 array or PIL image) -> PatchSet under the recipe, without shards.

    `seed` plays the role of the recipe's seed for this call's random draws (None: the recipe's),
    so the same (seed, epoch, key) gives the same tokens as the pipeline would. A PIL image is first
    turned upright by its EXIF orientation, as images read from shards are.
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
        pil = upright(image)  # the EXIF orientation rule of the shard path
    else:
        raise TypeError(f"image must be a numpy array or a PIL image (got {type(image).__name__})")
    pil = to_rgb(pil, background=recipe.decode.background)
    seed = recipe.seed if seed is None else seed
    return from_pixels(pil, recipe, seed=seed, epoch=epoch, key=key, label=label,
                       meta={"size": [pil.height, pil.width]})
