"""Recipe: the validated, fingerprinted description of one preprocessing run.

A recipe is data. It is loaded with YAML's safe loader, validated by pydantic (unknown keys are
errors), and never names code to run.
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

RESAMPLE_FILTERS = ("nearest", "box", "bilinear", "hamming", "bicubic", "lanczos")
DEFAULT_IMAGE_KEYS = ["jpg", "jpeg", "png", "webp", "gif", "bmp", "tif", "tiff"]


class RecipeError(ValueError):
    """A recipe that cannot be used; the message names the file and the key path."""


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class SourceConfig(_Section):
    """Where samples come from and how they are shuffled."""

    shards: str | list[str] | None = None
    label_key: str | None = "cls"
    image_keys: list[str] = Field(default_factory=lambda: list(DEFAULT_IMAGE_KEYS))
    shuffle_shards: bool = True
    shuffle_buffer: int = Field(default=0, ge=0)
    on_error: Literal["skip", "raise"] = "skip"


class DecodeConfig(_Section):
    """How bytes become RGB pixels."""

    pixel_limit: int = Field(default=64_000_000, ge=1)
    reduced_jpeg: bool = True  # let the JPEG decoder skip detail the size plan will discard
    background: tuple[int, int, int] = (255, 255, 255)

    @field_validator("background")
    @classmethod
    def _rgb(cls, v: tuple[int, int, int]) -> tuple[int, int, int]:
        if any(not 0 <= c <= 255 for c in v):
            raise ValueError(f"background must be three values in 0..255 (got {list(v)})")
        return v


class SampledTokens(_Section):
    """Distribution of the per-image token budget in `sampled` sizing mode."""

    range: tuple[int, int] | None = None
    choices: list[int] | None = None
    weights: list[float] | None = None

    @model_validator(mode="after")
    def _one_kind(self) -> SampledTokens:
        if (self.range is None) == (self.choices is None):
            raise ValueError("give exactly one of `range: [lo, hi]` or `choices: [...]`")
        if self.range is not None and not 1 <= self.range[0] <= self.range[1]:
            raise ValueError(f"range must be [lo, hi] with 1 <= lo <= hi (got {list(self.range)})")
        if self.choices is not None:
            if not self.choices or min(self.choices) < 1:
                raise ValueError("choices must be a non-empty list of token counts >= 1")
            if self.weights is not None and (
                len(self.weights) != len(self.choices) or min(self.weights) < 0 or sum(self.weights) <= 0
            ):
                raise ValueError("weights must be non-negative, one per choice, not all zero")
        elif self.weights is not None:
            raise ValueError("weights go with `choices`, not with `range`")
        return self

    @property
    def largest(self) -> int:
        return self.range[1] if self.range is not None else max(self.choices or [0])


class SizingConfig(_Section):
    """How each image's patch grid is chosen."""

    patch_size: int = Field(default=16, ge=1, le=1024)
    max_tokens: int = Field(default=256, ge=1)
    min_tokens: int = Field(default=1, ge=1)
    mode: Literal["budget", "native", "fixed", "sampled"] = "budget"
    max_aspect: float | None = Field(default=None, ge=1.0)
    aspect_rule: Literal["crop", "pad"] = "crop"
    resample: Literal["nearest", "box", "bilinear", "hamming", "bicubic", "lanczos"] = "bicubic"
    sampled: SampledTokens | None = None

    @model_validator(mode="after")
    def _consistent(self) -> SizingConfig:
        if self.min_tokens > self.max_tokens:
            raise ValueError(f"min_tokens must be <= max_tokens (got {self.min_tokens} > {self.max_tokens})")
        if self.mode == "fixed" and math.isqrt(self.max_tokens) ** 2 < self.min_tokens:
            raise ValueError(
                f"mode 'fixed' uses a square grid of isqrt(max_tokens)^2 = {math.isqrt(self.max_tokens) ** 2} "
                f"tokens, below min_tokens={self.min_tokens}; lower min_tokens or raise max_tokens"
            )
        if self.mode == "sampled" and self.sampled is None:
            raise ValueError("mode 'sampled' needs a `sampled:` section, e.g. {range: [64, 256]}")
        if self.sampled is not None and self.sampled.largest > self.max_tokens:
            raise ValueError(
                f"sampled budgets must be <= max_tokens (got {self.sampled.largest} > {self.max_tokens})"
            )
        return self


class CropConfig(_Section):
    """Random crop drawn from the image header before the size plan (native-resolution pretraining crop).

    `scale` is the share of the image's area kept; `ratio` multiplies the image's own aspect
    (w/h), so a panorama stays a panorama. No resize to a fixed size: the size plan follows.
    """

    mode: Literal["none", "random"] = "none"
    scale: tuple[float, float] = (0.35, 1.0)
    ratio: tuple[float, float] = (3 / 4, 4 / 3)

    @model_validator(mode="after")
    def _ranges(self) -> CropConfig:
        lo, hi = self.scale
        if not 0 < lo <= hi <= 1:
            raise ValueError(f"scale must be [lo, hi] with 0 < lo <= hi <= 1 (got {list(self.scale)})")
        lo, hi = self.ratio
        if not 0 < lo <= hi:
            raise ValueError(f"ratio must be [lo, hi] with 0 < lo <= hi (got {list(self.ratio)})")
        return self


class DropConfig(_Section):
    """Which patch tokens to remove (apply: drop) or flag (apply: mask) before packing."""

    mode: Literal["none", "random", "block", "grid", "stripes", "content"] = "none"
    apply: Literal["drop", "mask"] = "drop"
    rate: float | None = Field(default=None, ge=0.0, le=1.0)
    beta: tuple[float, float] | None = None
    max_keep: int | None = Field(default=None, ge=1)
    rate_curve: list[tuple[int, float]] | None = None
    min_keep: int = Field(default=1, ge=0)
    stride: int | None = Field(default=None, ge=1)
    block_min_area: int = Field(default=16, ge=1)
    block_aspect: tuple[float, float] = (0.3, 1 / 0.3)
    content_noise: float = Field(default=0.1, ge=0.0)

    @model_validator(mode="after")
    def _one_rate(self) -> DropConfig:
        given = [n for n in ("rate", "beta", "max_keep", "rate_curve") if getattr(self, n) is not None]
        if self.mode == "none":
            return self
        if self.mode == "grid" and self.stride is not None:
            if given:
                raise ValueError("grid mode takes either `stride` or a rate setting, not both")
            return self
        if len(given) != 1:
            raise ValueError(
                f"mode {self.mode!r} needs exactly one of rate, beta, max_keep, rate_curve (got "
                f"{', '.join(given) or 'none'})"
            )
        if self.beta is not None and min(self.beta) <= 0:
            raise ValueError(f"beta parameters must be > 0 (got {list(self.beta)})")
        if self.rate_curve is not None:
            xs = [t for t, _ in self.rate_curve]
            if not xs or xs != sorted(xs) or len(set(xs)) != len(xs):
                raise ValueError("rate_curve must be [[tokens, rate], ...] with increasing token counts")
            if any(not 0 <= r <= 1 for _, r in self.rate_curve):
                raise ValueError("rate_curve rates must be in 0..1")
        lo, hi = self.block_aspect
        if not 0 < lo <= hi:
            raise ValueError(f"block_aspect must be [lo, hi] with 0 < lo <= hi (got {list(self.block_aspect)})")
        return self


PATCH_OPS = ("standardize", "jitter", "shuffle", "noise")


class PatchOp(_Section):
    """One patch-level operation: standardize (per-patch zero mean / unit variance), jitter
    (per-patch brightness/contrast), shuffle (token order; coords travel), noise (Gaussian)."""

    name: Literal["standardize", "jitter", "shuffle", "noise"]
    p: float = Field(default=1.0, ge=0.0, le=1.0)
    brightness: float = Field(default=0.1, ge=0.0)
    contrast: float = Field(default=0.1, ge=0.0)
    sigma: float = Field(default=8.0, ge=0.0)
    eps: float = Field(default=1e-6, gt=0.0)


class PackingConfig(_Section):
    """How PatchSets are packed into fixed-shape rows."""

    seq_len: int = Field(default=1024, ge=1)
    rows: int = Field(default=8, ge=1)
    max_images_per_row: int = Field(default=16, ge=1)
    buffer: int = Field(default=64, ge=1)
    algorithm: Literal["first_fit", "best_fit", "in_order"] = "first_fit"


class EpochConfig(_Section):
    """How long one epoch is for each rank: one pass over its share (default), or an explicit
    number of batches or samples. With `equalize`, a rank whose share runs out first tops up by
    re-reading its own share (counted in the ledger), so every rank yields the same count and
    distributed training never waits on a rank that ran dry."""

    batches: int | None = Field(default=None, ge=1)
    samples: int | None = Field(default=None, ge=1)
    equalize: bool = False

    @model_validator(mode="after")
    def _one_unit(self) -> EpochConfig:
        if self.batches is not None and self.samples is not None:
            raise ValueError("give epoch.batches or epoch.samples, not both")
        if self.equalize and self.batches is None and self.samples is None:
            raise ValueError("equalize needs the epoch length: set epoch.batches (or epoch.samples) per rank")
        return self


class OutputConfig(_Section):
    """dtype of the patch array and the normalisation for float outputs."""

    dtype: Literal["uint8", "float32", "float16"] = "uint8"
    mean: tuple[float, float, float] = (0.5, 0.5, 0.5)
    std: tuple[float, float, float] = (0.5, 0.5, 0.5)

    @field_validator("std")
    @classmethod
    def _positive(cls, v: tuple[float, float, float]) -> tuple[float, float, float]:
        if min(v) <= 0:
            raise ValueError(f"std values must be > 0 (got {list(v)})")
        return v


class Recipe(_Section):
    """A whole preprocessing run. Build with `from_file`, `from_dict`, or keyword arguments."""

    version: Literal[1] = 1
    seed: int = 0
    source: SourceConfig = Field(default_factory=SourceConfig)
    decode: DecodeConfig = Field(default_factory=DecodeConfig)
    crop: CropConfig = Field(default_factory=CropConfig)
    sizing: SizingConfig = Field(default_factory=SizingConfig)
    augment: list[dict[str, Any]] = Field(default_factory=list)
    patch_ops: list[PatchOp] = Field(default_factory=list)
    drop: DropConfig = Field(default_factory=DropConfig)
    packing: PackingConfig = Field(default_factory=PackingConfig)
    epoch: EpochConfig = Field(default_factory=EpochConfig)
    output: OutputConfig = Field(default_factory=OutputConfig)

    @field_validator("augment")
    @classmethod
    def _augment_builds(cls, v: list[dict[str, Any]]) -> list[dict[str, Any]]:
        if v:
            from .augment import validate_augment  # imports albumentations only when used

            validate_augment(v)
        return v

    @model_validator(mode="after")
    def _fits_rows(self) -> Recipe:
        if self.sizing.max_tokens > self.packing.seq_len:
            raise ValueError(
                f"sizing.max_tokens must be <= packing.seq_len (got {self.sizing.max_tokens} > "
                f"{self.packing.seq_len}): an image bigger than a row could never be packed"
            )
        names = [op.name for op in self.patch_ops]
        if "standardize" in names:
            if self.output.dtype == "uint8":
                raise ValueError("patch_ops standardize makes float patches: set output.dtype to float32 or float16")
            i = names.index("standardize")
            if self.patch_ops[i].p != 1.0:
                raise ValueError("patch_ops standardize must have p: 1 (every image on the same scale)")
            if any(n in ("jitter", "noise", "standardize") for n in names[i + 1 :]):
                raise ValueError("patch_ops standardize must come after jitter and noise (only shuffle may follow)")
        return self

    @classmethod
    def from_dict(cls, data: dict[str, Any] | None, *, origin: str = "<dict>") -> Recipe:
        """Validate a (possibly partial) dict; missing keys take their defaults."""
        if data is None:
            data = {}
        if not isinstance(data, dict):
            raise RecipeError(f"{origin}: a recipe must be a mapping of sections, got {type(data).__name__}")
        try:
            return cls.model_validate(data)
        except ValidationError as exc:
            raise RecipeError(_explain(exc, origin)) from None

    @classmethod
    def from_file(cls, path: str | Path) -> Recipe:
        """Load a YAML recipe with the safe loader and validate it."""
        path = Path(path)
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise RecipeError(f"cannot read recipe {path}: {exc.strerror}") from None
        try:
            data = yaml.safe_load(text)
        except yaml.YAMLError as exc:
            raise RecipeError(f"{path}: not valid YAML: {exc}") from None
        return cls.from_dict(data, origin=str(path))

    def to_dict(self) -> dict[str, Any]:
        """The fully resolved recipe, defaults filled in, as plain JSON-able data."""
        return self.model_dump(mode="json")

    def to_yaml(self) -> str:
        return yaml.safe_dump(self.to_dict(), sort_keys=False)

    def fingerprint(self) -> str:
        """Hex digest of the canonical resolved form: same settings, same fingerprint."""
        canonical = json.dumps(self.to_dict(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(canonical.encode("utf-8")).hexdigest()

    def replace(self, **sections: dict[str, Any]) -> Recipe:
        """A copy with some sections' keys overridden, validated again."""
        data = self.to_dict()
        for name, values in sections.items():
            if isinstance(values, dict) and isinstance(data.get(name), dict):
                data[name].update(values)
            else:
                data[name] = values
        return Recipe.from_dict(data)


def _explain(exc: ValidationError, origin: str) -> str:
    lines = [f"{origin}: invalid recipe"]
    for err in exc.errors():
        loc = ".".join(str(p) for p in err["loc"]) or "(top level)"
        msg = err["msg"]
        if err["type"] == "extra_forbidden":
            msg = "unknown key (check the spelling; `patchloom recipe show` lists every key)"
        elif err["type"] == "literal_error":
            msg = msg.replace("Input should be", "must be one of")
        msg = msg.removeprefix("Value error, ")
        got = err.get("input")
        suffix = "" if err["type"] in ("extra_forbidden", "missing") or isinstance(got, dict) else f" (got {got!r})"
        lines.append(f"  {loc}: {msg}{suffix}")
    return "\n".join(lines)
