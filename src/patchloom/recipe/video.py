"""The `video` section of a recipe (which frames of a clip become tokens) and the checks that tie it to
the sizing and packing sections. Kept beside schema.py, which holds the other sections."""

from __future__ import annotations

from typing import TYPE_CHECKING, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictFloat, StrictInt, model_validator

from ..image.sizing import usable_tokens
from .messages import ProblemAt

if TYPE_CHECKING:
    from .schema import Recipe


class VideoConfig(BaseModel):
    """Which frames of a clip (a sample with a `source.video_keys` member) become tokens.

    `frames: N` takes N frames (default: max_frames); `fps: F` takes frames F per second, at most
    max_frames (rounded down to whole temporal slices). `sampling: random` (training) draws where the
    frames start, per sample; `uniform` (evaluation) spreads `frames` evenly over the whole clip, or
    centres the `fps` window in it: no randomness. A clip's tokens (slices x grid) stay within
    max_tokens (default: sizing.max_tokens); see patchloom.image.clip for the frames/resolution rule."""

    # as every section: unknown keys are errors, NaN and infinities refused
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)

    frames: StrictInt | None = Field(default=None, ge=1, le=1024)
    fps: StrictFloat | None = Field(default=None, gt=0.0, le=1000.0)
    max_frames: StrictInt = Field(default=16, ge=1, le=1024)
    sampling: Literal["random", "uniform"] = "random"
    max_tokens: StrictInt | None = Field(default=None, ge=1)

    @model_validator(mode="after")
    def _one_count(self) -> VideoConfig:
        if self.frames is not None and self.fps is not None:
            raise ValueError("give video.frames (a fixed count) or video.fps (with video.max_frames), not both")
        return self

    @property
    def most_frames(self) -> int:
        """The most frames a clip can give: frames, or max_frames."""
        return self.frames if self.frames is not None else self.max_frames


def check_video(recipe: Recipe) -> None:
    """Whole temporal slices, and a clip budget that leaves each slice of the longest clip at least
    min_tokens (in whole grid_multiple windows)."""
    video, sizing = recipe.video, recipe.sizing
    t = sizing.temporal_patch
    if video.max_tokens is not None and video.max_tokens > recipe.packing.seq_len:
        raise ProblemAt(("video", "max_tokens"), f"video.max_tokens must be <= packing.seq_len (got "
                        f"{video.max_tokens} > {recipe.packing.seq_len}): a clip bigger than a row could never be "
                        "packed")
    if not recipe.source.video_keys:
        return
    key = "frames" if video.frames is not None else "max_frames"
    if video.frames is not None and video.frames % t:
        raise ProblemAt(("video", key), f"video.frames must be a multiple of sizing.temporal_patch={t} (whole "
                        f"temporal slices; got {video.frames})")
    if video.most_frames < t:
        raise ProblemAt(("video", key), f"video.{key} must be at least sizing.temporal_patch={t} (one temporal "
                        f"slice; got {video.most_frames})")
    slices = video.most_frames // t
    budget = video.max_tokens if video.max_tokens is not None else sizing.max_tokens
    need = max(sizing.min_tokens, sizing.grid_multiple ** 2)
    if usable_tokens(sizing, budget // slices) < need:
        raise ProblemAt(("video", key), f"a clip of {video.most_frames} frames makes {slices} slices of "
                        f"{budget // slices} tokens each (budget {budget} // {slices}), under the {need} a slice "
                        f"needs (sizing.min_tokens); lower video.{key}, raise sizing.temporal_patch or the clip "
                        "budget (video.max_tokens, else sizing.max_tokens)")
