"""One sample, from raw record or pixels to PatchSet: the per-image chain of stages.

A record goes read -> select -> [text] -> header -> sizing (crop + size plan) -> decode -> resize ->
[augment after resize] -> patches -> [drop] -> patch_ops or output. With augmentation before
sizing the order is header -> decode -> augment -> sizing, since geometry changes the size first.
Pixels (`image_to_patches`) start at [augment] -> sizing.

`chain_for(recipe)` builds each path once per recipe (cached by fingerprint) as a tuple of named
`Stage`s, leaving out the stages the recipe does not use; `run_stages` runs them in one loop that
times them (`timings=`), records intermediates (`trace=`) and names the failing stage in a
SampleError (shard, key, stage, cause).

A sample with several images (source.images_per_sample: all, `process_sample`) runs the sample
stages (read, select, text) once, then the per-image stages for each image member in order, each
planned under the sample's cap (`sample_cap`: min(max_tokens, seq_len // n)).

With source.video_keys, a sample with a video member is a clip: after the sample stages it runs
`Chain.clip` (clip.py: scan, frames, sizing, decode, [augment], tubelets; then drop and output).
With a temporal recipe (Recipe.temporal) every PatchSet has `times`; with sizing.temporal_patch
t > 1 an image's tokens repeat its patch t times (one slice of t identical frames).

Every random draw comes from `sample_rng(seed, epoch, key, stage)`, so a sample's tokens depend
only on (recipe, epoch, key); image i > 0 of a sample draws under `stage#i` (`image_stage`). With no geometric augmentation before sizing, the plan is made from
the header alone and the decoder may skip detail the plan discards (reduced JPEG decode).
"""

from __future__ import annotations

import dataclasses
import json
import re
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from PIL import Image

from ..errors import PatchloomError
from ..extras import MissingExtraError
from ..seeding import sample_rng
from .clip import clip_stages, find_video
from .decode import OpenedImage, open_image, to_rgb, upright
from .dropping import DropDecision, apply_drop, decide_drop
from .patches import PatchSet, grid_coords, normalize, patchify, window_order
from .patchops import apply_patch_ops
from .sizing import SizePlan, draw_crop, plan_size, resize_to_plan, usable_tokens

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
    text: str = ""
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
    members: list[tuple[str, bytes]] = field(default_factory=list)  # images_per_sample all: every image
    image_index: int = 0  # which image of the sample (its stage seeds include it when > 0)
    cap: int | None = None  # the per-image budget cap of a multi-image sample (see _select_all)
    clip: bool = False  # the sample has a source.video_keys member: the clip stages (clip.py) run
    video: Any = None  # a clip's ClipIndex (image/video.py)
    picks: np.ndarray | None = None  # a clip's chosen frame indices, in order
    frames: np.ndarray | None = None  # a clip's frames [F, H, W, 3] after resize (and augment)


#: trace key -> the Work field it shows (keys as `process_record(trace=...)` documents them).
TRACE_FIELDS = {"original": "original", "decoded": "image", "plan": "plan", "resized": "pixels",
                "augmented": "pixels", "drop": "decision", "patchset": "ps", "frames": "frames"}


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
    the stage; without it (the pixel path) the error comes through unchanged, as does a missing
    extra (not the sample's fault: skipping would drop every such sample). A failing stage's
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
        if shard is None or isinstance(exc, (SampleError, MissingExtraError)):
            raise
        raise SampleError(shard, work.key, stage.name if stage else "select", f"{type(exc).__name__}: {exc}") from exc
    return work.ps  # type: ignore[return-value]  # every chain ends with a stage that sets it


def _seed32(seed: int, epoch: int, key: str, stage: str) -> int:
    """A 32-bit seed for libraries that take an integer (albumentations), from the RNG rule."""
    return int(sample_rng(seed, epoch, key, stage).integers(0, 2**31 - 1))


def image_stage(stage: str, image: int) -> str:
    """The stage name a sample's image `image` seeds from: the stage itself for the first image (so a
    one-image sample draws as it always did), `stage#i` for image i > 0 of a multi-image sample."""
    return stage if image == 0 else f"{stage}#{image}"


def _rng(w: Work, stage: str) -> np.random.Generator:
    """The generator of one stage for this Work's image (sample_rng with image_stage)."""
    return sample_rng(w.seed, w.epoch, w.key, image_stage(stage, w.image_index))


#: A member name's final extension and the part before it, e.g. "0.jpg" -> ("0", "jpg").
_NUMBER = re.compile(r"[0-9]+")


def find_images(rec: Record, image_keys: list[str]) -> list[tuple[str, bytes]]:
    """Every member whose extension ends in one of image_keys (`jpg`, `0.jpg`, `1.png`, ...), in the
    numeric order of the part before that extension (`2` before `10`); members without a number
    there sort first (by name), and equal numbers by name."""
    found = []
    longest_first = sorted(image_keys, key=len, reverse=True)  # `1.left.jpg` is image 1 of `left.jpg`, not of `jpg`
    for ext, data in rec.members.items():
        for k in longest_first:
            if ext == k or ext.endswith("." + k):
                head = ext[: -len(k) - 1] if ext != k else ""
                number = int(head) if _NUMBER.fullmatch(head) else None
                found.append(((number is not None, number or 0, ext), ext, data))
                break
    if not found:
        raise ValueError(
            f"no image member: looked for extensions ending in {', '.join(image_keys)}; found "
            f"{', '.join(sorted(rec.members)) or 'nothing'} (set source.image_keys to the extensions your shards use)"
        )
    return [(ext, data) for _, ext, data in sorted(found, key=lambda t: t[0])]


def find_image(rec: Record, image_keys: list[str]) -> tuple[str, bytes]:
    for ext in image_keys:
        if ext in rec.members:
            return ext, rec.members[ext]
    raise ValueError(
        f"no image member: looked for {', '.join(image_keys)}; found {', '.join(sorted(rec.members)) or 'nothing'} "
        "(set source.image_keys to the extensions your shards use)"
    )


def member_value(rec: Record, member_key: str, what: str) -> Any:
    """The value a `source.*_key` names: `ext` (the member's UTF-8 text) or `ext:field` (a field of
    the JSON member `ext`). None when the member or the field is absent. `what` names the key in
    errors (e.g. "label", "text"). The one parser of label_key and text_key."""
    ext, _, json_field = member_key.partition(":")
    if ext not in rec.members:
        return None
    raw = rec.members[ext]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ValueError(
            f"{what} member {ext!r} is not UTF-8 text (byte {exc.start}: {raw[exc.start:exc.start + 8].hex(' ')}); "
            f"re-encode it as UTF-8 or change source.{what}_key"
        ) from None
    if not json_field:
        return text
    data = json.loads(text)
    if not isinstance(data, dict):
        raise ValueError(f"{what} member {ext!r} is JSON but not an object, so it has no field {json_field!r}")
    return data.get(json_field)


def parse_label(rec: Record, label_key: str | None) -> int | None:
    """Label from a member: `cls` (integer text) or `json:field` (a field of a JSON member)."""
    if label_key is None:
        return None
    value = member_value(rec, label_key, "label")
    if isinstance(value, str):
        value = value.strip()
    if value is None or value == "":
        return None
    try:
        return int(value)
    except (TypeError, ValueError):
        raise ValueError(f"label {label_key!r} must be an integer (got {value!r})") from None


def parse_text(rec: Record, text_key: str | None) -> str:
    """The sample's text from `txt` (the whole member) or `json:field` (a string field); "" when the
    recipe names none or the sample lacks it. Undecodable bytes or a non-string field raise."""
    if text_key is None:
        return ""
    value = member_value(rec, text_key, "text")
    if value is None:
        return ""
    if not isinstance(value, str):
        raise ValueError(f"text {text_key!r} must be a JSON string (got {type(value).__name__} "
                         f"{json.dumps(value)[:40]}); change source.text_key to a string field")
    return value


def plan_for(height: int, width: int, recipe: Recipe, *, seed: int, epoch: int, key: str, image: int = 0,
             cap: int | None = None) -> SizePlan:
    """Random crop (if any) then the size plan, both drawn from the sample's own generators (those
    of its image `image`); `cap` limits the budget (an image of a multi-image sample)."""
    region = None
    if recipe.crop.mode != "none":
        region = draw_crop(height, width, recipe.crop, sample_rng(seed, epoch, key, image_stage("crop", image)))
    rng = sample_rng(seed, epoch, key, image_stage("sizing", image)) if recipe.sizing.mode == "sampled" else None
    return plan_size(height, width, recipe.sizing, rng, region=region, cap=cap)


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


def _size_guard(w: Work) -> None:
    source = w.recipe.source
    size = sum(len(v) for v in w.rec.members.values())
    if size > source.max_sample_bytes:
        raise ValueError(
            f"sample is {size} bytes, over source.max_sample_bytes={source.max_sample_bytes}; "
            "raise it in the recipe if such samples are expected"
        )


def _select(w: Work) -> None:
    """The size guard, the image member and the label."""
    rec, source = w.rec, w.recipe.source
    _size_guard(w)
    w.member, w.data = find_image(rec, source.image_keys)
    w.label = parse_label(rec, source.label_key)


def sample_cap(recipe: Recipe, n: int) -> int | None:
    """The budget cap of each image of an n-image sample: min(max_tokens, seq_len // n), so the
    sample always fits one row (None for one image: the budget stays as it is). Raises ValueError,
    the skip reason, for a sample with more images than a row holds or one whose images cannot get
    min_tokens (in whole grid_multiple windows) under the cap."""
    sizing, packing = recipe.sizing, recipe.packing
    if n > packing.max_images_per_row:
        raise ValueError(f"sample has {n} images, more than packing.max_images_per_row={packing.max_images_per_row} "
                         "(all of a sample's images go into one row); raise it or split such samples")
    if n == 1:
        return None
    cap = min(sizing.max_tokens, packing.seq_len // n)
    m = sizing.grid_multiple
    need = max(sizing.min_tokens, m * m)
    if usable_tokens(sizing, cap) < need:
        raise ValueError(f"sample has {n} images, too many to fit one row even at sizing.min_tokens: each may take "
                         f"min(max_tokens, seq_len // {n}) = {cap} tokens, under the {need} it needs"
                         + (f" in whole {m}x{m} windows" if m > 1 else "")
                         + "; raise packing.seq_len or lower sizing.min_tokens")
    return cap


def _select_all(w: Work) -> None:
    """images_per_sample all: the size guard, every image member (in order), the budget cap and the label."""
    rec, source = w.rec, w.recipe.source
    _size_guard(w)
    w.members = find_images(rec, source.image_keys)
    w.cap = sample_cap(w.recipe, len(w.members))
    w.label = parse_label(rec, source.label_key)


def _select_clip_or(select: Callable[[Work], None]) -> Callable[[Work], None]:
    """With source.video_keys: a sample with a video member is a clip (the size guard, that member,
    the label); any other sample goes to `select` (the image path)."""
    def select_clip_or_image(w: Work) -> None:
        found = find_video(w.rec, w.recipe.source.video_keys)
        if found is None:
            select(w)
            return
        _size_guard(w)
        w.member, w.data = found
        w.clip = True
        w.label = parse_label(w.rec, w.recipe.source.label_key)

    return select_clip_or_image


def _text(w: Work) -> None:
    """The sample's text (source.text_key); its own stage, so a bad caption is named as such."""
    w.text = parse_text(w.rec, w.recipe.source.text_key)


def _header(w: Work) -> None:
    """Open the image and read its header (format, mode, display size) under the decode guards."""
    dec = w.recipe.decode
    w.opened = opened = open_image(w.data, pixel_limit=dec.pixel_limit, memory_limit=dec.memory_limit)
    w.meta = {"shard": w.rec.url, "index": w.rec.index, "member": w.member, "format": opened.format,
              "mode": opened.mode, "size": [opened.height, opened.width]}
    if w.members:  # an image of a sample read with images_per_sample all
        w.meta.update(image=w.image_index, images=len(w.members))


def _decode_full(w: Work) -> None:
    """Decode every pixel (augmentation before sizing needs them to make the plan)."""
    w.original = w.image = w.opened.decode(background=w.recipe.decode.background)


def _decode_for_plan(w: Work) -> None:
    """Decode for the plan made from the header, skipping detail it discards when allowed."""
    dec = w.recipe.decode
    hint = reduce_hint(w.opened, w.plan) if dec.reduced_jpeg else None
    w.original = w.image = w.opened.decode(background=dec.background, reduce_to=hint)


def _plan_from_header(w: Work) -> None:
    w.plan = plan_for(w.opened.height, w.opened.width, w.recipe, seed=w.seed, epoch=w.epoch, key=w.key,
                      image=w.image_index, cap=w.cap)


def _plan_from_pixels(w: Work) -> None:
    w.plan = plan_for(w.image.height, w.image.width, w.recipe, seed=w.seed, epoch=w.epoch, key=w.key,
                      image=w.image_index, cap=w.cap)


def _augment_before(aug: Any) -> Callable[[Work], None]:
    def augment_before(w: Work) -> None:
        seed = _seed32(w.seed, w.epoch, w.key, image_stage("augment-before", w.image_index))
        w.image = Image.fromarray(aug.before_sizing(np.asarray(w.image), seed))

    return augment_before


def _augment_after(aug: Any) -> Callable[[Work], None]:
    def augment_after(w: Work) -> None:
        w.pixels = aug.after_resize(w.pixels, _seed32(w.seed, w.epoch, w.key, image_stage("augment-after", w.image_index)))

    return augment_after


def _resize(w: Work) -> None:
    r = w.recipe
    w.pixels = np.asarray(resize_to_plan(w.image, w.plan, resample=r.sizing.resample,
                                         background=r.decode.background))


def _patches(w: Work) -> None:
    plan = w.plan
    grid = (plan.grid_h, plan.grid_w)
    patches = patchify(w.pixels, plan.patch_size)
    t = w.recipe.sizing.temporal_patch
    if t > 1:  # a still image in a tubelet recipe: t identical frames, one temporal slice
        patches = np.tile(patches, (1, t))
    times = np.zeros(patches.shape[0], np.int32) if w.recipe.temporal else None
    w.ps = PatchSet(patches, grid_coords(*grid), grid, w.key, w.label,
                    {**w.meta, "plan": plan.to_dict()}, text=w.text, times=times)


def _windows(w: Work) -> None:
    """output.token_order windows: the tokens of each grid_multiple x grid_multiple window made
    contiguous (windows in raster order, raster inside each); coords travel with their tokens."""
    ps = w.ps
    order = window_order(*ps.grid, w.recipe.sizing.grid_multiple)
    ps.patches, ps.coords = ps.patches[order], ps.coords[order]


def _drop(w: Work) -> None:
    drop = w.recipe.drop
    w.decision = decide_drop(drop, w.ps.grid, w.ps.patches, _rng(w, "drop"), coords=w.ps.coords,
                             window=w.recipe.sizing.grid_multiple, times=w.ps.times, slices=w.ps.frames)
    w.ps = apply_drop(w.ps, w.decision, drop.output)


def _patch_ops(w: Work) -> None:
    """The recipe's patch ops, then the output dtype (standardized values skip mean/std)."""
    ps, out = w.ps, w.recipe.output
    extra = [ps.coords] + ([ps.masked] if ps.masked is not None else []) + ([ps.times] if ps.times is not None else [])
    values, extra, standardized = apply_patch_ops(ps.patches, w.recipe.patch_ops,
                                                  _rng(w, "patch_ops"), extra=extra)
    ps.coords = extra.pop(0)
    if ps.masked is not None:
        ps.masked = extra.pop(0)
    if ps.times is not None:
        ps.times = extra.pop(0)
    ps.patches = values.astype(out.dtype) if standardized else normalize(values, out.mean, out.std, out.dtype)


def _output(w: Work) -> None:
    out = w.recipe.output
    w.ps.patches = normalize(w.ps.patches, out.mean, out.std, out.dtype)


# ---------------------------------------------------------------------------------------------
# the chains, built once per recipe


@dataclass(frozen=True, slots=True)
class Chain:
    """A recipe's stages: `record` for raw records (process_record), `pixels` for decoded images.
    `record` is `sample` (read, select, text: once per sample) then `image` (once per image)."""

    record: tuple[Stage, ...]
    pixels: tuple[Stage, ...]
    sample: tuple[Stage, ...] = ()
    image: tuple[Stage, ...] = ()
    clip: tuple[Stage, ...] = ()  # a clip's stages after `sample` (only with source.video_keys)


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
    if recipe.output.token_order == "windows" and recipe.sizing.grid_multiple > 1:
        tail.append(Stage("patches", _windows, "patches"))
    if recipe.drop.mode != "none":
        tail.append(Stage("drop", _drop, "drop", ("drop",)))
    if recipe.patch_ops:
        tail.append(Stage("patch_ops", _patch_ops, "patch_ops", ("patchset",)))
    else:
        tail.append(Stage("output", _output, "output", ("patchset",)))
    select = _select_all if recipe.source.images_per_sample == "all" else _select
    if recipe.source.video_keys:
        select = _select_clip_or(select)
    head = [Stage("read", _check_read, None), Stage("select", select, None)]
    if recipe.source.text_key is not None:
        head.append(Stage("text", _text, None))
    per_sample = len(head)
    head.append(Stage("decode", _header, "header"))
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
    clip: list[Stage] = []
    if recipe.source.video_keys:
        # the clip's own stages up to its tubelets (windows ordered per slice there), then drop and output
        clip = [Stage(*spec) for spec in clip_stages(aug)]
        clip += [s for s in tail if s.name in ("drop", "patch_ops", "output")]
    return Chain(tuple(head + tail), tuple(pixels + tail), tuple(head[:per_sample]), tuple(head[per_sample:] + tail),
                 tuple(clip))


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
                timings: dict[str, float] | None = None, text: str = "") -> PatchSet:
    """Decoded RGB image -> PatchSet (augment before sizing, plan from the pixels, then the rest).

    Errors come through as they are (no SampleError: there is no shard). `trace` and `timings` as
    in process_record; `text` travels with the tokens."""
    work = Work(recipe, seed, epoch, key, label=label, text=text, meta=meta, original=image, image=image)
    return run_stages(chain_for(recipe).pixels, work, trace=trace, timings=timings)


def process_record(rec: Record, recipe: Recipe, epoch: int, *, trace: dict[str, Any] | None = None,
                   timings: dict[str, float] | None = None, image: int = 0) -> PatchSet:
    """One raw record -> PatchSet, raising SampleError naming shard, key and stage on failure.

    `trace`, when given, receives the intermediates: original, decoded, plan, resized, augmented,
    drop (a DropDecision) and patchset. `timings`, when given, accumulates seconds per stage
    (header, sizing, decode, resize, augment, patches, drop, patch_ops, output). With
    images_per_sample all, `image` picks which of the sample's images (as process_sample makes it)."""
    chain = chain_for(recipe)
    work = Work(recipe, recipe.seed, epoch, rec.key, rec=rec)
    if recipe.source.images_per_sample == "one" and image != 0:
        raise IndexError(f"with source.images_per_sample one a sample has one image, no image {image}")
    if recipe.source.images_per_sample == "one" and not chain.clip:
        return run_stages(chain.record, work, trace=trace, timings=timings, shard=rec.url)
    run_stages(chain.sample, work, timings=timings, shard=rec.url)
    if work.clip or recipe.source.images_per_sample == "one":
        if work.clip and image != 0:
            raise IndexError(f"sample {rec.key!r} is a clip, one PatchSet: no image {image}")
        return run_stages(chain.clip if work.clip else chain.image, work, trace=trace, timings=timings, shard=rec.url)
    if not 0 <= image < len(work.members):
        raise IndexError(f"sample {rec.key!r} has {len(work.members)} images, no image {image}")
    return _one_image(chain, work, image, trace=trace, timings=timings)


def process_sample(rec: Record, recipe: Recipe, epoch: int, *, timings: dict[str, float] | None = None
                   ) -> list[PatchSet]:
    """One raw record -> the PatchSets of its images: one for a clip (source.video_keys) or with
    images_per_sample one; with all,
    every image member in order, each planned under the sample's cap (see sample_cap) and drawn
    with its own seeds (image_stage). A failure of any image fails the sample (SampleError)."""
    chain = chain_for(recipe)
    if recipe.source.images_per_sample == "one" and not chain.clip:
        return [process_record(rec, recipe, epoch, timings=timings)]
    work = Work(recipe, recipe.seed, epoch, rec.key, rec=rec)
    run_stages(chain.sample, work, timings=timings, shard=rec.url)
    if work.clip:  # a clip is one PatchSet of tubelets (one segment)
        return [run_stages(chain.clip, work, timings=timings, shard=rec.url)]
    if recipe.source.images_per_sample == "one":
        return [run_stages(chain.image, work, timings=timings, shard=rec.url)]
    return [_one_image(chain, work, i, timings=timings) for i in range(len(work.members))]


def _one_image(chain: Chain, sample: Work, i: int, *, trace: dict[str, Any] | None = None,
               timings: dict[str, float] | None = None) -> PatchSet:
    """Image i of a sample whose sample stages ran: its own Work, the per-image stages, and a
    SampleError that names the image member."""
    member, data = sample.members[i]
    work = dataclasses.replace(sample, member=member, data=data, image_index=i, meta={})
    try:
        return run_stages(chain.image, work, trace=trace, timings=timings, shard=sample.rec.url)
    except SampleError as err:
        raise SampleError(err.shard, err.key, err.stage, f"{err.cause} (image {i}: {member})") from err


def image_to_patches(image: np.ndarray | Image.Image, recipe: Recipe, seed: int | None = None,
                     key: str = "", *, epoch: int = 0, label: int | None = None, text: str = "") -> PatchSet:
    """One image (HxWx3 uint8 array or PIL image) -> PatchSet under the recipe, without shards.

    `seed` plays the role of the recipe's seed for this call's random draws (None: the recipe's),
    so the same (seed, epoch, key) gives the same tokens as the pipeline would. A PIL image is first
    turned upright by its EXIF orientation, as images read from shards are. `label` and `text` are
    carried on the PatchSet (what `pack()` writes into `labels` and `texts`).
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
    return from_pixels(pil, recipe, seed=seed, epoch=epoch, key=key, label=label, text=text,
                       meta={"size": [pil.height, pil.width]})
