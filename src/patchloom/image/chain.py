"""One sample, from raw record or pixels to PatchSet: the per-image chain of stages.

header -> [augment before sizing] -> crop + size plan -> decode -> resize -> [augment after resize]
-> patchify -> drop -> patch ops -> output dtype.

Every random draw comes from `sample_rng(seed, epoch, key, stage)`, so a sample's tokens depend
only on (recipe, epoch, key). With no geometric augmentation before sizing, the plan is made from
the header alone and the decoder may skip detail the plan discards (reduced JPEG decode).
"""

from __future__ import annotations

import json
import time
from typing import Any

import numpy as np
from PIL import Image

from ..errors import PatchloomError
from .decode import OpenedImage, open_image, to_rgb, upright
from .patches import PatchSet, grid_coords, normalize, patchify
from ..recipe.schema import Recipe
from ..seeding import sample_rng
from .sizing import SizePlan, draw_crop, plan_size, resize_to_plan
from ..read.shards import Record


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


class _Stage:
    """Which stage is running, so one wrapper can name it when anything fails.

    With a `times` dict it also adds each stage's wall time (seconds) under its label, for the
    benchmark's per-stage breakdown; without one, entering a stage costs one attribute write.
    """

    __slots__ = ("name", "times", "_label", "_t0")

    def __init__(self, times: dict[str, float] | None = None) -> None:
        self.name = "select"
        self.times = times
        self._label: str | None = None
        self._t0 = 0.0

    def enter(self, name: str, label: str | None = None) -> None:
        """Start stage `name` (the word errors use); `label` names it in the timings if different."""
        self.name = name
        if self.times is not None:
            now = time.perf_counter()
            if self._label is not None:
                self.times[self._label] = self.times.get(self._label, 0.0) + now - self._t0
            self._label, self._t0 = label or name, now

    def stop(self) -> None:
        """Close the running stage's timing."""
        if self.times is not None and self._label is not None:
            self.times[self._label] = self.times.get(self._label, 0.0) + time.perf_counter() - self._t0
            self._label = None


def _seed32(seed: int, epoch: int, key: str, stage: str) -> int:
    """A 32-bit seed for libraries that take an integer (albumentations), from the RNG rule."""
    return int(sample_rng(seed, epoch, key, stage).integers(0, 2**31 - 1))


def _augmenter(recipe: Recipe):
    if not recipe.augment:
        return None
    from .augment import augmenter_for  # imports albumentations only when a recipe uses it

    return augmenter_for(recipe.augment)


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


def _reduce_hint(opened: OpenedImage, plan: SizePlan) -> tuple[int, int]:
    """Full-image size at which the plan's crop would already be its resized content size."""
    left, top, right, bottom = plan.crop
    return (
        max(1, round(opened.width * plan.content_w / (right - left))),
        max(1, round(opened.height * plan.content_h / (bottom - top))),
    )


def finish(image: Image.Image, plan: SizePlan, recipe: Recipe, *, seed: int, epoch: int, key: str,
           label: int | None, meta: dict[str, Any], stage: _Stage | None = None,
           trace: dict[str, Any] | None = None) -> PatchSet:
    """Resize to the plan, augment after resize, patchify, drop, patch ops, output dtype.

    `trace`, when given, receives each intermediate (for the inspection report: same code path)."""
    stage = stage or _Stage()
    if trace is not None:
        trace["decoded"], trace["plan"] = image, plan
    stage.enter("resize")
    resized = np.asarray(resize_to_plan(image, plan, resample=recipe.sizing.resample,
                                        background=recipe.decode.background))
    if trace is not None:
        trace["resized"] = resized
    aug = _augmenter(recipe)
    if aug is not None and aug.has_after:
        stage.enter("augment")
        resized = aug.after_resize(resized, _seed32(seed, epoch, key, "augment-after"))
    if trace is not None:
        trace["augmented"] = resized
    stage.enter("patches")
    grid = (plan.grid_h, plan.grid_w)
    ps = PatchSet(patchify(resized, plan.patch_size), grid_coords(*grid), grid, key, label,
                  {**meta, "plan": plan.to_dict()})
    if recipe.drop.mode != "none":
        stage.enter("drop")
        from .dropping import apply_drop, decide_drop

        decision = decide_drop(recipe.drop, grid, ps.patches, sample_rng(seed, epoch, key, "drop"))
        ps = apply_drop(ps, decision, recipe.drop.apply)
        if trace is not None:
            trace["drop"] = decision
    out = recipe.output
    if recipe.patch_ops:
        stage.enter("patch_ops")
        from .patchops import apply_patch_ops

        extra = [ps.coords] + ([ps.masked] if ps.masked is not None else [])
        values, extra, standardized = apply_patch_ops(ps.patches, recipe.patch_ops,
                                                      sample_rng(seed, epoch, key, "patch_ops"), extra=extra)
        ps.coords = extra[0]
        if ps.masked is not None:
            ps.masked = extra[1]
        ps.patches = values.astype(out.dtype) if standardized else normalize(values, out.mean, out.std, out.dtype)
    else:
        stage.enter("output")
        ps.patches = normalize(ps.patches, out.mean, out.std, out.dtype)
    if trace is not None:
        trace["patchset"] = ps
    return ps


def from_pixels(image: Image.Image, recipe: Recipe, *, seed: int, epoch: int, key: str, label: int | None,
                meta: dict[str, Any], stage: _Stage | None = None,
                trace: dict[str, Any] | None = None) -> PatchSet:
    """Decoded RGB image -> PatchSet (augment before sizing, plan from the pixels, finish)."""
    stage = stage or _Stage()
    if trace is not None:
        trace["original"] = image
    aug = _augmenter(recipe)
    if aug is not None and aug.has_before:
        stage.enter("augment")
        image = Image.fromarray(aug.before_sizing(np.asarray(image), _seed32(seed, epoch, key, "augment-before")))
    stage.enter("sizing")
    plan = plan_for(image.height, image.width, recipe, seed=seed, epoch=epoch, key=key)
    return finish(image, plan, recipe, seed=seed, epoch=epoch, key=key, label=label, meta=meta, stage=stage,
                  trace=trace)


def process_record(rec: Record, recipe: Recipe, epoch: int, *, trace: dict[str, Any] | None = None,
                   timings: dict[str, float] | None = None) -> PatchSet:
    """One raw record -> PatchSet, raising SampleError naming shard, key and stage on failure.

    `trace`, when given, receives the intermediates: original, decoded, plan, resized, augmented,
    drop (a DropDecision) and patchset. `timings`, when given, accumulates seconds per stage
    (header, sizing, decode, resize, augment, patches, drop, patch_ops, output)."""
    stage = _Stage(timings)
    seed, key = recipe.seed, rec.key
    try:
        if rec.error is not None:
            stage.enter("read")
            raise ValueError(rec.error)
        size = sum(len(v) for v in rec.members.values())
        if size > recipe.source.max_sample_bytes:
            raise ValueError(
                f"sample is {size} bytes, over source.max_sample_bytes={recipe.source.max_sample_bytes}; "
                "raise it in the recipe if such samples are expected"
            )
        ext, data = find_image(rec, recipe.source.image_keys)
        label = parse_label(rec, recipe.source.label_key)
        stage.enter("decode", "header")
        opened = open_image(data, pixel_limit=recipe.decode.pixel_limit, memory_limit=recipe.decode.memory_limit)
        meta = {"shard": rec.url, "index": rec.index, "member": ext, "format": opened.format,
                "mode": opened.mode, "size": [opened.height, opened.width]}
        bg = recipe.decode.background
        aug = _augmenter(recipe)
        if aug is not None and aug.has_before:
            # Geometry changes the size first, so the plan needs the full decoded pixels.
            image = opened.decode(background=bg)
            return from_pixels(image, recipe, seed=seed, epoch=epoch, key=key, label=label, meta=meta, stage=stage,
                               trace=trace)
        stage.enter("sizing")
        plan = plan_for(opened.height, opened.width, recipe, seed=seed, epoch=epoch, key=key)
        stage.enter("decode")
        hint = _reduce_hint(opened, plan) if recipe.decode.reduced_jpeg else None
        image = opened.decode(background=bg, reduce_to=hint)
        if trace is not None:
            trace["original"] = image
        return finish(image, plan, recipe, seed=seed, epoch=epoch, key=key, label=label, meta=meta, stage=stage,
                      trace=trace)
    except SampleError:
        raise
    except Exception as exc:
        raise SampleError(rec.url, rec.key, stage.name, f"{type(exc).__name__}: {exc}") from exc
    finally:
        stage.stop()


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
