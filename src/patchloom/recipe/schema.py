"""Recipe: the validated, fingerprinted description of one preprocessing run.

The sections and their cross-checks are pydantic models (unknown keys are errors). Reading files
(the hardened YAML loader, `extends`) is in `loader`; turning validation errors into one line
each, with a did-you-mean, is in `messages`. The allowed names of modes, filters, patch ops and
packing algorithms are read from the tables that implement them (DROP_MODES, SIZING_MODES,
RESAMPLE_FILTERS, PATCH_OPS, ALGORITHMS), so adding an entry there is all a new name needs.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
from pathlib import Path
from typing import Any, Literal

import yaml
from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StrictBool,
    StrictFloat,
    StrictInt,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from ..image.dropping import DROP_MODES
from ..image.patchops import PATCH_OPS
from ..image.sizing import RESAMPLE_FILTERS, SIZING_MODES, usable_tokens
from ..packing.assign import ALGORITHMS
from .loader import MAX_SEED, Provenance, resolve_file, unusable_value
from .messages import RENAMES, ProblemAt, RecipeError, explain, kind, path_text, show, where
from .video import VideoConfig, check_video

RECIPE_VERSION = 1
DEFAULT_IMAGE_KEYS = ["jpg", "jpeg", "png", "webp", "gif", "bmp", "tif", "tiff"]

#: Cap on the arrays of one packed batch (patches, segment ids, coords, grids, labels, mask), so a
#: recipe that would allocate more fails at `recipe check` instead of in the middle of a run.
MAX_BATCH_BYTES = 4 << 30

#: Default of decode.memory_limit; the same number as patchloom.image.decode.MEMORY_LIMIT (not imported,
#: so reading a recipe does not load the image decoders).
DEFAULT_DECODE_MEMORY = 1 << 30

#: Largest finite value of each float output dtype (numpy.finfo(dtype).max).
FLOAT_MAX = {"float16": 65504.0, "float32": 3.4028234663852886e38}

#: Bytes per value of each output dtype.
DTYPE_BYTES = {"uint8": 1, "float16": 2, "float32": 4}

# Names a recipe may use, read from the tables that implement them: registering a new mode, filter,
# op or algorithm in its table is all it takes for a recipe to accept its name.
DropModeName = Literal[tuple(DROP_MODES)]  # type: ignore[valid-type]
SizingModeName = Literal[tuple(SIZING_MODES)]  # type: ignore[valid-type]
ResampleName = Literal[tuple(RESAMPLE_FILTERS)]  # type: ignore[valid-type]
PatchOpName = Literal[tuple(PATCH_OPS)]  # type: ignore[valid-type]
AlgorithmName = Literal[tuple(ALGORITHMS)]  # type: ignore[valid-type]

# Numbers and switches are strict (StrictInt, StrictFloat, StrictBool): YAML `true` is not the
# number 1, `7.0` or `1.0e+11` is not an integer, "16" in quotes is not a number, and 1 is not
# true. An integer is still accepted where a number is wanted (max_skip_ratio: 1).


class _Section(BaseModel):
    # NaN and infinities are refused: they have no place in a setting and no canonical JSON form.
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


class SourceConfig(_Section):
    """Where samples come from and how they are shuffled."""

    shards: str | list[str] | None = None
    label_key: str | None = "cls"
    # The member holding the sample's text (caption): `txt`, or `json:field` for a string field of
    # a JSON member, read as UTF-8 like label_key; null: no text. A sample without it gets "".
    text_key: str | None = None
    image_keys: list[str] = Field(default_factory=lambda: list(DEFAULT_IMAGE_KEYS))
    # one: the first member whose extension is in image_keys. all: every member whose extension ends
    # in one of them (`key.0.jpg`, `key.1.png`, ...), in the numeric order of the part before the
    # final extension (no number first); they go into one row, adjacent (PackedBatch.groups).
    images_per_sample: Literal["one", "all"] = "one"
    # Members holding a video file (`mp4`, `webm`, `mkv`, ...; needs the video extra): a sample with
    # one of them is a clip (its first match in this order; image members beside it are ignored),
    # cut into frames and tubelets under the `video` section. Empty: every sample is an image sample.
    video_keys: list[str] = Field(default_factory=list)
    shuffle_shards: StrictBool = True
    shuffle_buffer: StrictInt = Field(default=0, ge=0)
    on_error: Literal["skip", "raise"] = "skip"
    max_skip_ratio: StrictFloat | None = Field(default=0.05, ge=0.0, le=1.0)
    max_sample_bytes: StrictInt = Field(default=100_000_000, ge=1)

    @property
    def sample_keys(self) -> list[str]:
        """The extensions that make a file a sample in an image folder: image_keys, then video_keys."""
        return list(dict.fromkeys([*self.image_keys, *self.video_keys]))

    @field_validator("video_keys")
    @classmethod
    def _video_keys(cls, v: list[str]) -> list[str]:
        bad = [k for k in v if not k or k != k.strip() or "/" in k]
        if bad or len(set(v)) != len(v):
            raise ValueError(f"must be distinct member extensions like `mp4` or `webm` (got {v!r})")
        return v

    @field_validator("text_key")
    @classmethod
    def _member_key(cls, v: str | None) -> str | None:
        if v is None:
            return v
        ext, colon, json_field = v.partition(":")
        if not ext or ext != ext.strip() or (colon and not json_field.strip()):
            raise ValueError(f"must be a member extension like `txt`, or `json:field` (got {v!r})")
        return v


class TextConfig(_Section):
    """The text arrays a batch gets when the caller passes a `text_encoder` (code, never named here):
    `text_tokens` [B, S, max_tokens], padded with 0; a longer text keeps its first max_tokens tokens
    and is counted in the ledger (texts_truncated)."""

    max_tokens: StrictInt = Field(default=64, ge=1, le=65_536)


class DecodeConfig(_Section):
    """How bytes become RGB pixels."""

    pixel_limit: StrictInt = Field(default=64_000_000, ge=1)
    # Bytes one decode may hold (decoded pixels plus the RGB conversion, alpha compositing and
    # rotation buffers), judged from the header: an 8000x8000 16-bit RGBA PNG passes pixel_limit
    # yet needs about 1.4 GB. See patchloom.image.decode.decode_memory.
    memory_limit: StrictInt = Field(default=DEFAULT_DECODE_MEMORY, ge=1)
    reduced_jpeg: StrictBool = True  # let the JPEG decoder skip detail the size plan will discard
    background: tuple[StrictInt, StrictInt, StrictInt] = (255, 255, 255)

    @field_validator("background")
    @classmethod
    def _rgb(cls, v: tuple[int, int, int]) -> tuple[int, int, int]:
        if any(not 0 <= c <= 255 for c in v):
            raise ValueError(f"background must be three values in 0..255 (got {list(v)})")
        return v


class SampledTokens(_Section):
    """Distribution of the per-image token budget in `sampled` sizing mode."""

    range: tuple[StrictInt, StrictInt] | None = None
    choices: list[StrictInt] | None = None
    weights: list[StrictFloat] | None = None

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

    patch_size: StrictInt = Field(default=16, ge=1, le=1024)
    max_tokens: StrictInt = Field(default=256, ge=1)
    min_tokens: StrictInt = Field(default=1, ge=1)
    mode: SizingModeName = "budget"
    max_aspect: StrictFloat | None = Field(default=None, ge=1.0)
    aspect_rule: Literal["crop", "pad"] = "crop"
    resample: ResampleName = "area"  # image.sizing.DEFAULT_RESAMPLE: fastest filter keeping >= 40 dB PSNR
    sampled: SampledTokens | None = None
    # Both grid sides are multiples of this (for encoders that merge each m x m block of tokens);
    # budgets then count whole m x m windows (see patchloom.image.sizing.plan_grid).
    grid_multiple: StrictInt = Field(default=1, ge=1, le=64)
    # Frames per token (tubelets): a token covers this many consecutive frames of one p x p patch, so
    # D = temporal_patch * patch_size^2 * 3 for every token; a still image repeats its frame.
    temporal_patch: StrictInt = Field(default=1, ge=1, le=64)

    @model_validator(mode="after")
    def _consistent(self) -> SizingConfig:
        if self.min_tokens > self.max_tokens:
            raise ValueError(f"min_tokens must be <= max_tokens (got {self.min_tokens} > {self.max_tokens})")
        _check_grid_multiple(self)
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


def _check_grid_multiple(cfg: SizingConfig) -> None:
    """With grid_multiple m > 1, every budget must hold one m x m window and the largest grid of whole
    windows must still reach min_tokens."""
    m = cfg.grid_multiple
    if m == 1:
        return
    if cfg.max_tokens < m * m:
        raise ValueError(f"grid_multiple {m} needs max_tokens >= {m * m} (one {m}x{m} window; got {cfg.max_tokens})")
    largest = usable_tokens(cfg, cfg.max_tokens)
    if largest < cfg.min_tokens:
        raise ValueError(f"with grid_multiple {m} the largest grid has {largest} tokens (whole {m}x{m} windows), "
                         f"below min_tokens={cfg.min_tokens}; lower min_tokens or raise max_tokens")
    s = cfg.sampled
    smallest = None if s is None else (s.range[0] if s.range is not None else min(s.choices or [m * m]))
    if cfg.mode == "sampled" and smallest is not None and smallest < m * m:
        raise ValueError(f"with grid_multiple {m} every sampled budget must hold one {m}x{m} window: raise the "
                         f"smallest sampled budget to at least {m * m} (got {smallest})")


class CropConfig(_Section):
    """Random crop drawn from the image header before the size plan (native-resolution pretraining crop).

    `area` is the range of the share of the image's area kept; `aspect_jitter` is the range of a
    factor applied to the image's own aspect (w/h), so a panorama stays a panorama. No resize to a
    fixed size: the size plan follows.
    """

    mode: Literal["none", "random"] = "none"
    area: tuple[StrictFloat, StrictFloat] = (0.35, 1.0)
    aspect_jitter: tuple[StrictFloat, StrictFloat] = (3 / 4, 4 / 3)

    @model_validator(mode="after")
    def _ranges(self) -> CropConfig:
        lo, hi = self.area
        if not 0 < lo <= hi <= 1:
            raise ValueError(f"area must be [lo, hi] with 0 < lo <= hi <= 1 (got {list(self.area)})")
        lo, hi = self.aspect_jitter
        if not 0 < lo <= hi:
            raise ValueError(f"aspect_jitter must be [lo, hi] with 0 < lo <= hi (got {list(self.aspect_jitter)})")
        return self


class BlockDrop(_Section):
    """Options of drop mode `block`: the smallest block in patches, and the range of its h/w."""

    min_area: StrictInt = Field(default=16, ge=1)
    aspect: tuple[StrictFloat, StrictFloat] = (0.3, 1 / 0.3)


class GridDrop(_Section):
    """Options of drop mode `grid`: a fixed stride k (keep every k-th row and column) in place of a rate."""

    stride: StrictInt | None = Field(default=None, ge=1)


class ContentDrop(_Section):
    """Options of drop mode `content`: jitter on the informativeness scores, in their std."""

    noise: StrictFloat = Field(default=0.1, ge=0.0)


class DropConfig(_Section):
    """Which patch tokens to remove (output: remove) or flag (output: mask) before packing.

    The rate settings and min_keep apply to every mode; a mode's own options sit in a sub-section
    named after it (block, grid, content)."""

    mode: DropModeName = "none"
    output: Literal["remove", "mask"] = "remove"
    rate: StrictFloat | None = Field(default=None, ge=0.0, le=1.0)
    beta: tuple[StrictFloat, StrictFloat] | None = None
    max_keep: StrictInt | None = Field(default=None, ge=1)
    rate_curve: list[tuple[StrictInt, StrictFloat]] | None = None
    min_keep: StrictInt = Field(default=1, ge=0)
    block: BlockDrop = Field(default_factory=BlockDrop)
    grid: GridDrop = Field(default_factory=GridDrop)
    content: ContentDrop = Field(default_factory=ContentDrop)

    @model_validator(mode="after")
    def _one_rate(self) -> DropConfig:
        given = [n for n in ("rate", "beta", "max_keep", "rate_curve") if getattr(self, n) is not None]
        if self.mode == "none":
            return self
        if self.mode == "grid" and self.grid.stride is not None:
            if given:
                raise ValueError("grid mode takes either `grid.stride` or a rate setting, not both")
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
        lo, hi = self.block.aspect
        if not 0 < lo <= hi:
            raise ValueError(f"block.aspect must be [lo, hi] with 0 < lo <= hi (got {list(self.block.aspect)})")
        return self


class PatchOp(_Section):
    """One patch-level operation: standardize (per-patch zero mean / unit variance), jitter
    (per-patch brightness/contrast), shuffle (token order; coords travel), noise (Gaussian)."""

    name: PatchOpName
    p: StrictFloat = Field(default=1.0, ge=0.0, le=1.0)
    brightness: StrictFloat = Field(default=0.1, ge=0.0)
    contrast: StrictFloat = Field(default=0.1, ge=0.0)
    sigma: StrictFloat = Field(default=8.0, ge=0.0)
    eps: StrictFloat = Field(default=1e-6, gt=0.0)


class PackingConfig(_Section):
    """How PatchSets are packed into fixed-shape rows."""

    seq_len: StrictInt = Field(default=1024, ge=1)
    rows: StrictInt = Field(default=8, ge=1)
    max_images_per_row: StrictInt = Field(default=16, ge=1)
    lookahead: StrictInt = Field(default=64, ge=1)  # images the packer holds to choose rows from
    # largest_first (first fit decreasing over the look-ahead buffer, with a wait cap) left the least
    # padding in `patchloom bench --packing`; first_fit keeps arrival order within rows.
    algorithm: AlgorithmName = "largest_first"


class EpochConfig(_Section):
    """How long one epoch is for each rank: one pass over its share (default), or an explicit
    number of batches or samples. With `equalize`, a rank whose share runs out first tops up by
    re-reading its own share (counted in the ledger), so every rank yields the same count and
    distributed training never waits on a rank that ran dry."""

    batches: StrictInt | None = Field(default=None, ge=1)
    samples: StrictInt | None = Field(default=None, ge=1)
    equalize: StrictBool = False

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
    mean: tuple[StrictFloat, StrictFloat, StrictFloat] = (0.5, 0.5, 0.5)
    std: tuple[StrictFloat, StrictFloat, StrictFloat] = (0.5, 0.5, 0.5)
    # raster: tokens row by row. windows: the tokens of each sizing.grid_multiple x grid_multiple
    # window contiguous (windows in raster order, raster inside each); coords still name each token.
    token_order: Literal["raster", "windows"] = "raster"

    @field_validator("std")
    @classmethod
    def _positive(cls, v: tuple[float, float, float], info: ValidationInfo) -> tuple[float, float, float]:
        if min(v) <= 0:
            raise ValueError(f"std values must be > 0 (got {list(v)})")
        dtype, mean = info.data.get("dtype"), info.data.get("mean")
        if dtype in FLOAT_MAX and mean is not None:
            _check_overflow(dtype, mean, v)
        return v


def _check_overflow(dtype: str, mean: tuple[float, ...], std: tuple[float, ...]) -> None:
    """Refuse mean/std whose (x/255 - mean)/std leaves `dtype`'s finite range for some x in 0..255.

    Only overflow is checked (values that would become inf, then NaN in training); a std small
    enough to cost float16 precision without overflowing is allowed."""
    top = FLOAT_MAX[dtype] * (1 - 1e-6)  # the float32 arithmetic may round a hair above the exact value
    for i, (m, s) in enumerate(zip(mean, std)):
        reach = max(abs(m), abs(1 - m)) / s  # the extremes are at x = 0 and x = 255
        if not reach <= top:
            need = max(abs(m), abs(1 - m)) / top
            wider = dtype == "float16" and reach <= FLOAT_MAX["float32"] * (1 - 1e-6)
            raise ValueError(
                f"with output.dtype {dtype}, (x/255 - mean)/std reaches {reach:.3g} in channel {i} "
                f"(mean {m:g}, std {s:g}), past {dtype}'s largest finite value {FLOAT_MAX[dtype]:g}, so "
                f"batches would hold inf/NaN; raise std[{i}] to at least {need:.3g}"
                f"{' or use output.dtype float32' if wider else ''} (got {list(std)})"
            )


class Recipe(_Section):
    """A whole preprocessing run. Build with `from_file`, `from_dict`, or keyword arguments."""

    version: Literal[1] = 1
    seed: StrictInt = Field(default=0, ge=0, le=MAX_SEED)
    source: SourceConfig = Field(default_factory=SourceConfig)
    decode: DecodeConfig = Field(default_factory=DecodeConfig)
    crop: CropConfig = Field(default_factory=CropConfig)
    sizing: SizingConfig = Field(default_factory=SizingConfig)
    augment: list[dict[str, Any]] = Field(default_factory=list)
    patch_ops: list[PatchOp] = Field(default_factory=list)
    drop: DropConfig = Field(default_factory=DropConfig)
    packing: PackingConfig = Field(default_factory=PackingConfig)
    text: TextConfig = Field(default_factory=TextConfig)
    video: VideoConfig = Field(default_factory=VideoConfig)
    epoch: EpochConfig = Field(default_factory=EpochConfig)
    output: OutputConfig = Field(default_factory=OutputConfig)

    @field_validator("version", mode="before")
    @classmethod
    def _known_version(cls, v: Any) -> Any:
        if type(v) is not int or v != RECIPE_VERSION:
            raise ValueError(_version_message(v))
        return v

    @field_validator("augment")
    @classmethod
    def _augment_builds(cls, v: list[dict[str, Any]]) -> list[dict[str, Any]]:
        if v:
            from ..image.augment import validate_augment  # imports albumentations only when used

            validate_augment(v)
        return v

    @model_validator(mode="after")
    def _fits_rows(self) -> Recipe:
        if self.sizing.max_tokens > self.packing.seq_len:
            raise ValueError(
                f"sizing.max_tokens must be <= packing.seq_len (got {self.sizing.max_tokens} > "
                f"{self.packing.seq_len}): an image bigger than a row could never be packed"
            )
        tokens, slots, per_token = batch_bytes(self)
        if tokens + slots > MAX_BATCH_BYTES:
            p = self.packing
            rows = show(p.rows)
            if slots > tokens:
                key, what = "max_images_per_row", f"{rows} rows x {show(p.max_images_per_row)} images x 20 bytes"
            else:
                key = "seq_len"
                what = f"{rows} rows x {show(p.seq_len)} tokens x {per_token}, plus grids and labels"
            size = tokens + slots
            shown = f"{size / (1 << 30):,.1f} GiB" if size.bit_length() < 1000 else f"{show(size)} bytes"
            raise ProblemAt(
                ("packing", key),
                f"one batch would take {shown} ({what}), over the {MAX_BATCH_BYTES >> 30} GiB cap per batch; "
                f"lower packing.rows or packing.{key} (got {show(getattr(p, key))})",
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
        _check_token_order(self, names)
        check_video(self)
        return self

    @property
    def temporal(self) -> bool:
        """True when tokens carry a time (clips can come, or tubelets span frames): every PatchSet then
        has `times`, every batch `times` and `frames`."""
        return bool(self.source.video_keys) or self.sizing.temporal_patch > 1

    @classmethod
    def from_dict(cls, data: dict[str, Any] | None, *, origin: str = "<dict>") -> Recipe:
        """Validate a (possibly partial) dict; missing keys take their defaults.

        `extends` is refused here: a dict has no file to resolve the base path against."""
        if isinstance(data, dict) and "extends" in data:
            raise RecipeError(
                f"{origin}: `extends` works only in recipe files (Recipe.from_file), where the base path "
                f"is resolved against the extending file; merge the base settings into the dict instead"
            )
        return cls._validate(data, origin=origin)

    @classmethod
    def from_file(cls, path: str | Path) -> Recipe:
        """Load a YAML recipe (restricted safe loader), resolve its `extends` chain, and validate it."""
        path = Path(path)
        data, provenance = resolve_file(path)
        return cls._validate(data, origin=str(path), provenance=provenance, in_file=True)

    @classmethod
    def _validate(
        cls,
        data: Any,
        *,
        origin: str,
        provenance: Provenance | None = None,
        in_file: bool = False,
    ) -> Recipe:
        if data is None:
            data = {}
        if not isinstance(data, dict):
            raise RecipeError(f"{origin}: a recipe must be a mapping of sections, got {kind(data)}")
        if "version" in data:  # a recipe of another version cannot be read key by key: say only that
            v = data["version"]
            if type(v) is not int or v != RECIPE_VERSION:
                src = where(("version",), provenance, origin)
                raise RecipeError(f"{origin}: invalid recipe\n  {src}version: {_version_message(v)}")
        unusable = unusable_value(data)
        if unusable is not None:
            loc, msg = unusable
            src = where(loc, provenance, origin)
            raise RecipeError(f"{origin}: invalid recipe\n  {src}{path_text(loc)}: {msg}")
        try:
            return cls.model_validate(data)
        except ValidationError as exc:
            raise RecipeError(
                explain(exc, origin, Recipe, data=data, provenance=provenance, in_file=in_file)
            ) from None

    def to_dict(self) -> dict[str, Any]:
        """The fully resolved recipe, defaults filled in, as plain JSON-able data."""
        return self.model_dump(mode="json")

    def to_yaml(self) -> str:
        return yaml.safe_dump(self.to_dict(), sort_keys=False)

    def fingerprint(self) -> str:
        """Hex digest of the canonical resolved form: same settings, same fingerprint.

        Renamed keys are hashed under their first names (fingerprint_form), so fingerprints
        recorded before a rename still match the same settings."""
        canonical = json.dumps(fingerprint_form(self.to_dict()), sort_keys=True, separators=(",", ":"))
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


def _check_token_order(recipe: Recipe, op_names: list[str]) -> None:
    """Window order needs windows (grid_multiple > 1) and no patch op that reorders tokens."""
    if recipe.output.token_order != "windows":
        return
    if recipe.sizing.grid_multiple == 1:
        raise ProblemAt(("output", "token_order"), "token_order windows keeps each sizing.grid_multiple x "
                        "grid_multiple window together: set sizing.grid_multiple to 2 or more (got 1)")
    if "shuffle" in op_names:
        raise ProblemAt(("output", "token_order"), "token_order windows keeps each window's tokens together, "
                        "but patch op shuffle reorders them: remove the shuffle op or use token_order raster")
    per = recipe.sizing.grid_multiple ** 2
    if recipe.packing.seq_len % per:
        raise ProblemAt(("packing", "seq_len"), f"with output.token_order windows a row must split into whole "
                        f"{recipe.sizing.grid_multiple}x{recipe.sizing.grid_multiple} windows: make seq_len a "
                        f"multiple of {per} (got {recipe.packing.seq_len})")


def batch_bytes(recipe: Recipe) -> tuple[int, int, str]:
    """Bytes of one packed batch's arrays under `recipe` (what packing.build_batch allocates): the
    per-token arrays, the per-image-slot arrays, and the bytes a token in words. Per token: patches
    [B, L, D] in output.dtype, segment ids [B, L] int32, coords [B, L, 2] int32, and the mask
    [B, L] bool under drop output: mask; per slot: grids [B, S, 2] int32, labels [B, S] int64 and
    groups [B, S] int32; with clips (Recipe.temporal) D = temporal_patch * p^2 * 3, times [B, L] and
    frames [B, S] int32."""
    values = recipe.sizing.temporal_patch * recipe.sizing.patch_size**2 * 3
    itemsize = DTYPE_BYTES[recipe.output.dtype]
    masked = recipe.drop.mode != "none" and recipe.drop.output == "mask"
    timed = 4 if recipe.temporal else 0  # times [B, L] and frames [B, S], int32
    token = values * itemsize + 4 + 8 + (1 if masked else 0) + timed
    slot = 8 + 8 + 4 + timed
    p = recipe.packing
    words = (f"({values} patch values x {itemsize} byte{'s' if itemsize > 1 else ''} of {recipe.output.dtype} "
             f"+ 12 bytes of segment id and coords{' + 1 of mask' if masked else ''})")
    return p.rows * p.seq_len * token, p.rows * p.max_images_per_row * slot, words


#: Keys added after fingerprints were first recorded (dotted path -> default). fingerprint_form leaves
#: such a key out while it has its default, so a recipe that does not use it keeps its fingerprint
#: (resume states and packed folders made before the key existed still match). Add new keys here.
ADDED_KEYS: dict[str, Any] = {
    "source.images_per_sample": "one",
    "sizing.grid_multiple": 1,
    "output.token_order": "raster",
    "source.text_key": None,
    "text.max_tokens": 64,
    "source.video_keys": [],
    "sizing.temporal_patch": 1,
    "video.frames": None,
    "video.fps": None,
    "video.max_frames": 16,
    "video.sampling": "random",
    "video.max_tokens": None,
}


def fingerprint_form(settings: dict[str, Any]) -> dict[str, Any]:
    """`settings` (Recipe.to_dict()) with every renamed key (messages.RENAMES) moved back to its
    first name and value, the sub-sections the renames emptied removed, and keys added later
    (ADDED_KEYS) left out while at their defaults: the form fingerprints are taken of, so that
    renaming or adding a key does not change any recipe's fingerprint."""
    out = copy.deepcopy(settings)
    emptied: set[tuple[str, ...]] = set()
    for r in RENAMES.values():
        *new_parents, new_key = r.new.split(".")
        *old_parents, old_key = r.old.split(".")
        below = _section_at(out, new_parents)
        value = below.pop(new_key)
        if r.values:
            value = {new: old for old, new in r.values}.get(value, value)
        _section_at(out, old_parents)[old_key] = value
        if len(new_parents) > 1:
            emptied.add(tuple(new_parents))
    for *parents, name in emptied:
        if _section_at(out, parents)[name] == {}:
            del _section_at(out, parents)[name]
    for path, default in ADDED_KEYS.items():
        *parents, key = path.split(".")
        section = _section_at(out, parents)
        if key in section and section[key] == default:
            del section[key]
            if parents and not section:  # a section added later, all at its defaults
                del _section_at(out, parents[:-1])[parents[-1]]
    return out


def current_names(data: dict[str, Any]) -> dict[str, Any]:
    """A recipe mapping written with the first names of renamed keys (e.g. the recipe recorded in
    a folder packed before the renames) under the current names and values; the inverse of
    fingerprint_form. Recipes people write should fail on an old key instead (one line names the
    new one), so only call this on recipes an older patchloom wrote itself."""
    out = copy.deepcopy(data)
    for r in RENAMES.values():
        *old_parents, old_key = r.old.split(".")
        *new_parents, new_key = r.new.split(".")
        below: Any = out
        for part in old_parents:
            below = below.get(part) if isinstance(below, dict) else None
        if not isinstance(below, dict) or old_key not in below:
            continue
        value = below.pop(old_key)
        if r.values and isinstance(value, str):
            value = dict(r.values).get(value, value)
        target = out
        for part in new_parents:
            target = target.setdefault(part, {})
            if not isinstance(target, dict):
                break
        else:
            target[new_key] = value
    return out


def _section_at(data: dict[str, Any], path: list[str] | tuple[str, ...]) -> dict[str, Any]:
    for part in path:
        data = data[part]
    return data


def _version_message(v: Any) -> str:
    newer = type(v) is int and v > RECIPE_VERSION
    hint = "; a recipe written for a newer format needs a newer patchloom" if newer else ""
    return f"must be {RECIPE_VERSION}, the only recipe version this patchloom reads (got {show(v)}){hint}"
