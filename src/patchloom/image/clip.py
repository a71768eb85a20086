"""One clip, from its video member to a PatchSet of tubelets: the clip stages of the per-sample chain.

A sample with a `source.video_keys` member is a clip. Its stages (chain.py wraps them as named Stages):
video (scan the packets: ClipIndex) -> frames (choose_frames, drawn from the sample's `frames`
generator) -> sizing (one crop and one size plan for every frame) -> decode (only the chosen frames,
each resized as soon as it is decoded) -> [augment: one draw for the whole clip] -> patches
(tubelets) -> the image chain's drop and output stages.

The budget rule (frames against resolution): a clip of F frames at temporal_patch t makes S = F / t
slices; the clip's budget (video.max_tokens, else sizing.max_tokens) is shared evenly, so each slice
is planned like an image under `budget // S` tokens (`slice_budget`), keeping the clip's aspect ratio
under the sizing mode. Frames are never dropped to buy resolution: more frames mean a smaller grid, and
the recipe is refused when its longest clip would leave a slice under sizing.min_tokens. In fps mode a
shorter clip has fewer frames, so its slices get more tokens each.

Memory: frames are at most decode.pixel_limit pixels each (judged from the stream header, checked on
every decoded frame), and the frames held at once (one full frame plus the resized ones, or every full
frame when augmentation must run before sizing) must fit decode.memory_limit.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np
from PIL import Image

from ..seeding import sample_rng
from .patches import PatchSet, grid_coords, slice_times, tubeletify, window_order
from .sizing import SizePlan, draw_crop, plan_size, resize_to_plan
from .video import choose_frames, clip_memory, decode_frames, scan_clip

if TYPE_CHECKING:
    from ..read import Record
    from ..recipe.schema import Recipe
    from .chain import Work

#: A clip stage as chain.py registers it: (name, run, timing key, trace keys).
StageSpec = tuple[str, Callable[["Work"], None], str | None, tuple[str, ...]]


def find_video(rec: Record, video_keys: list[str]) -> tuple[str, bytes] | None:
    """The sample's video member: the first of video_keys it has (None: an image sample)."""
    for ext in video_keys:
        if ext in rec.members:
            return ext, rec.members[ext]
    return None


def clip_budget(recipe: Recipe) -> int:
    """Most tokens one clip may take: video.max_tokens, else sizing.max_tokens."""
    v = recipe.video.max_tokens
    return v if v is not None else recipe.sizing.max_tokens


def slice_budget(recipe: Recipe, slices: int) -> int:
    """Tokens each of a clip's `slices` temporal slices may take: the clip budget shared evenly."""
    return clip_budget(recipe) // max(1, slices)


def clip_plan(height: int, width: int, recipe: Recipe, slices: int, *, seed: int, epoch: int, key: str) -> SizePlan:
    """One crop and size plan for every frame of a clip of `slices` slices (the sample's `crop` and
    `sizing` generators, as for an image), under slice_budget."""
    region = None
    if recipe.crop.mode != "none":
        region = draw_crop(height, width, recipe.crop, sample_rng(seed, epoch, key, "crop"))
    rng = sample_rng(seed, epoch, key, "sizing") if recipe.sizing.mode == "sampled" else None
    return plan_size(height, width, recipe.sizing, rng, region=region, cap=slice_budget(recipe, slices))


def _check_memory(w: Work, held: int, what: str) -> None:
    limit = w.recipe.decode.memory_limit
    if held > limit:
        raise ValueError(f"the clip would hold {held} bytes of frames ({what}), over decode.memory_limit={limit}; "
                         "take fewer frames (video.frames / video.max_frames) or raise the limit")


# ---------------------------------------------------------------------------------------------
# the stages


def _scan(w: Work) -> None:
    """Read the clip's packets: frame count, timestamps, keyframes, frame size (no decoding)."""
    w.video = index = scan_clip(w.data, pixel_limit=w.recipe.decode.pixel_limit)
    w.meta = {"shard": w.rec.url, "index": w.rec.index, "member": w.member, "format": index.container,
              "mode": index.codec, "size": [index.height, index.width]}


def _choose(w: Work) -> None:
    """Which frames: fixed count or fps, drawn (training) or evenly spaced (evaluation)."""
    r = w.recipe
    rng = sample_rng(w.seed, w.epoch, w.key, "frames") if r.video.sampling == "random" else None
    w.picks = choose_frames(w.video.seconds, r.video, r.sizing.temporal_patch, rng)


def _slices(w: Work) -> int:
    return int(w.picks.size) // w.recipe.sizing.temporal_patch


def _plan_from_header(w: Work) -> None:
    index = w.video
    w.plan = clip_plan(index.height, index.width, w.recipe, _slices(w), seed=w.seed, epoch=w.epoch, key=w.key)
    _check_memory(w, clip_memory(1, index.height, index.width) + clip_memory(w.picks.size, w.plan.height, w.plan.width),
                  f"one {index.width}x{index.height} frame and {w.picks.size} resized to "
                  f"{w.plan.width}x{w.plan.height}")


def _decode_resized(w: Work) -> None:
    """Decode the chosen frames, resizing each to the plan as it arrives."""
    r, plan = w.recipe, w.plan
    first: list[np.ndarray] = []

    def resize(pixels: np.ndarray) -> np.ndarray:
        if not first:
            first.append(pixels)
        return np.asarray(resize_to_plan(pixels, plan, resample=r.sizing.resample, background=r.decode.background))

    frames = decode_frames(w.data, w.video, w.picks, resize)
    w.original = w.image = Image.fromarray(first[0])
    w.frames = np.stack(frames)
    w.pixels = w.frames[0]


def _decode_full(w: Work) -> None:
    """Decode the chosen frames at full size (augmentation before sizing needs them)."""
    index = w.video
    _check_memory(w, clip_memory(w.picks.size, index.height, index.width),
                  f"{w.picks.size} frames of {index.width}x{index.height}")
    w.frames = np.stack(decode_frames(w.data, index, w.picks, lambda pixels: pixels))
    w.original = Image.fromarray(w.frames[0])


def _seed(w: Work, stage: str) -> int:
    return int(sample_rng(w.seed, w.epoch, w.key, stage).integers(0, 2**31 - 1))


def _augment_before(aug: Any) -> Callable[[Work], None]:
    def augment_before(w: Work) -> None:
        seed = _seed(w, "augment-before")  # one draw for the clip: every frame gets the same transform
        frames = [aug.before_sizing(f, seed) for f in w.frames]
        if len({f.shape for f in frames}) != 1:
            raise ValueError("augmentation before sizing gave the clip's frames different sizes; use transforms "
                             "whose output size does not depend on the pixels")
        w.frames = np.stack(frames)
        w.image = Image.fromarray(w.frames[0])

    return augment_before


def _plan_from_pixels(w: Work) -> None:
    h, wd = w.frames.shape[1:3]
    w.plan = clip_plan(h, wd, w.recipe, _slices(w), seed=w.seed, epoch=w.epoch, key=w.key)


def _resize_all(w: Work) -> None:
    r = w.recipe
    w.frames = np.stack([np.asarray(resize_to_plan(f, w.plan, resample=r.sizing.resample,
                                                   background=r.decode.background)) for f in w.frames])
    w.pixels = w.frames[0]


def _augment_after(aug: Any) -> Callable[[Work], None]:
    def augment_after(w: Work) -> None:
        seed = _seed(w, "augment-after")  # one draw for the clip
        w.frames = np.stack([aug.after_resize(f, seed) for f in w.frames])
        w.pixels = w.frames[0]

    return augment_after


def _tubelets(w: Work) -> None:
    """The frames as tubelets (slice-major, raster inside each slice; windows order per slice when
    output.token_order is windows), with each token's slice in `times`."""
    r, plan = w.recipe, w.plan
    t = r.sizing.temporal_patch
    gh, gw = plan.grid_h, plan.grid_w
    slices = int(w.frames.shape[0]) // t
    patches = tubeletify(w.frames, plan.patch_size, t)
    coords = np.tile(grid_coords(gh, gw), (slices, 1))
    times = slice_times(slices, gh * gw)
    if r.output.token_order == "windows" and r.sizing.grid_multiple > 1:
        one = window_order(gh, gw, r.sizing.grid_multiple)
        order = (one[None, :] + (np.arange(slices) * gh * gw)[:, None]).reshape(-1)
        patches, coords = patches[order], coords[order]
    index = w.video
    seconds = [round(float(index.seconds[i]), 6) for i in w.picks] if index.timed else None
    clip = {"frames": [int(i) for i in w.picks], "of": index.frames, "fps": round(index.fps, 6), "slices": slices,
            "temporal_patch": t, "seconds": seconds}
    w.ps = PatchSet(patches, coords, (gh, gw), w.key, w.label, {**w.meta, "plan": plan.to_dict(), "clip": clip},
                    text=w.text, times=times, frames=slices)


def clip_stages(aug: Any) -> list[StageSpec]:
    """The clip stages up to the tokens, as (name, run, timing key, trace keys); the caller adds the
    image chain's drop and output stages. `aug` is the recipe's Augmenter or None."""
    before = aug is not None and aug.has_before
    after = aug is not None and aug.has_after
    planned = ("original", "decoded", "plan", "resized")
    head: list[StageSpec] = [("video", _scan, "header", ()), ("frames", _choose, "sizing", ())]
    if before:
        head += [("decode", _decode_full, "decode", ()), ("augment", _augment_before(aug), "augment", ()),
                 ("sizing", _plan_from_pixels, "sizing", ()), ("resize", _resize_all, "resize", planned)]
    else:
        head += [("sizing", _plan_from_header, "sizing", ()), ("decode", _decode_resized, "decode", planned)]
    if after:
        head.append(("augment", _augment_after(aug), "augment", ("augmented", "frames")))
    else:
        head[-1] = (*head[-1][:3], (*head[-1][3], "augmented", "frames"))
    head.append(("patches", _tubelets, "patches", ()))
    return head
