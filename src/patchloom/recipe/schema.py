"""Recipe: the validated, fingerprinted description of one preprocessing run.

A recipe is data. It is loaded with a restricted YAML safe loader (no Python or custom tags, no
duplicate keys, size and alias-expansion caps), validated by pydantic (unknown keys are errors,
with a did-you-mean), and never names code to run.

A recipe file may start with ``extends: base.yaml`` (a path relative to the extending file; the
base may extend another file in turn, a cycle is an error). The base is loaded first and the
extending file's keys override it:

- mappings merge key by key, at every depth;
- any other value, lists included, replaces the base's value whole (lists are not appended to);
- ``key: null`` in an extending file removes the key, so it takes its schema default. (Where
  null is itself a setting, e.g. ``source.label_key: null`` for unlabelled data, write it in a
  file that extends nothing: there null keeps its plain meaning.)

Resolution happens before validation, so an extending recipe validates, prints (``to_yaml``) and
fingerprints exactly like the same settings written out in full.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import os
import re
import stat
import types
import typing
from pathlib import Path
from typing import Annotated, Any, Literal

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

from ..errors import PatchloomError

RECIPE_VERSION = 1
RESAMPLE_FILTERS = ("nearest", "box", "bilinear", "hamming", "bicubic", "lanczos")
DEFAULT_IMAGE_KEYS = ["jpg", "jpeg", "png", "webp", "gif", "bmp", "tif", "tiff"]


#: Largest seed: seeds feed numpy's SeedSequence (any size works there) and are written into
#: manifests and resume states, so they are kept to what a signed 64-bit integer holds.
MAX_SEED = 2**63 - 1

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

#: File names `extends` may load.
RECIPE_SUFFIXES = (".yaml", ".yml")


class RecipeError(PatchloomError, ValueError):
    """A recipe that cannot be used; the message names the file and the key path."""


class _AtKey(ValueError):
    """A cross-field problem raised by a model validator, reported at the key `path` (from the
    top of the recipe) instead of at the section that found it."""

    def __init__(self, path: tuple[str, ...], message: str) -> None:
        super().__init__(message)
        self.path = path


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
    image_keys: list[str] = Field(default_factory=lambda: list(DEFAULT_IMAGE_KEYS))
    shuffle_shards: StrictBool = True
    shuffle_buffer: StrictInt = Field(default=0, ge=0)
    on_error: Literal["skip", "raise"] = "skip"
    max_skip_ratio: StrictFloat | None = Field(default=0.05, ge=0.0, le=1.0)
    max_sample_bytes: StrictInt = Field(default=100_000_000, ge=1)


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
    mode: Literal["budget", "native", "fixed", "sampled"] = "budget"
    max_aspect: StrictFloat | None = Field(default=None, ge=1.0)
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
    scale: tuple[StrictFloat, StrictFloat] = (0.35, 1.0)
    ratio: tuple[StrictFloat, StrictFloat] = (3 / 4, 4 / 3)

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
    rate: StrictFloat | None = Field(default=None, ge=0.0, le=1.0)
    beta: tuple[StrictFloat, StrictFloat] | None = None
    max_keep: StrictInt | None = Field(default=None, ge=1)
    rate_curve: list[tuple[StrictInt, StrictFloat]] | None = None
    min_keep: StrictInt = Field(default=1, ge=0)
    stride: StrictInt | None = Field(default=None, ge=1)
    block_min_area: StrictInt = Field(default=16, ge=1)
    block_aspect: tuple[StrictFloat, StrictFloat] = (0.3, 1 / 0.3)
    content_noise: StrictFloat = Field(default=0.1, ge=0.0)

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
    buffer: StrictInt = Field(default=64, ge=1)
    # largest_first (first fit decreasing over the look-ahead buffer, with a wait cap) left the least
    # padding in `patchloom bench --packing`; first_fit keeps arrival order within rows.
    algorithm: Literal["largest_first", "first_fit", "best_fit", "in_order"] = "largest_first"


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
            rows = _show(p.rows)
            if slots > tokens:
                key, what = "max_images_per_row", f"{rows} rows x {_show(p.max_images_per_row)} images x 16 bytes"
            else:
                key = "seq_len"
                what = f"{rows} rows x {_show(p.seq_len)} tokens x {per_token}, plus grids and labels"
            size = tokens + slots
            shown = f"{size / (1 << 30):,.1f} GiB" if size.bit_length() < 1000 else f"{_show(size)} bytes"
            raise _AtKey(
                ("packing", key),
                f"one batch would take {shown} ({what}), over the {MAX_BATCH_BYTES >> 30} GiB cap per batch; "
                f"lower packing.rows or packing.{key} (got {_show(getattr(p, key))})",
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
        data, provenance = _resolve_file(path, chain=())
        return cls._validate(data, origin=str(path), provenance=provenance, in_file=True)

    @classmethod
    def _validate(
        cls,
        data: Any,
        *,
        origin: str,
        provenance: dict[tuple[Any, ...], str] | None = None,
        in_file: bool = False,
    ) -> Recipe:
        if data is None:
            data = {}
        if not isinstance(data, dict):
            raise RecipeError(f"{origin}: a recipe must be a mapping of sections, got {_kind(data)}")
        if "version" in data:  # a recipe of another version cannot be read key by key: say only that
            v = data["version"]
            if type(v) is not int or v != RECIPE_VERSION:
                where = _where(("version",), provenance, origin)
                raise RecipeError(f"{origin}: invalid recipe\n  {where}version: {_version_message(v)}")
        unusable = _unusable_value(data)
        if unusable is not None:
            loc, msg = unusable
            where = _where(loc, provenance, origin)
            raise RecipeError(f"{origin}: invalid recipe\n  {where}{_path_text(loc)}: {msg}")
        try:
            return cls.model_validate(data)
        except ValidationError as exc:
            raise RecipeError(
                _explain(exc, origin, data=data, provenance=provenance, in_file=in_file)
            ) from None

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


def batch_bytes(recipe: Recipe) -> tuple[int, int, str]:
    """Bytes of one packed batch's arrays under `recipe` (what packing.build_batch allocates): the
    per-token arrays, the per-image-slot arrays, and the bytes a token in words. Per token: patches
    [B, L, D] in output.dtype, segment ids [B, L] int32, coords [B, L, 2] int32, and the mask
    [B, L] bool under drop apply: mask; per slot: grids [B, S, 2] int32 and labels [B, S] int64."""
    values = recipe.sizing.patch_size**2 * 3
    itemsize = DTYPE_BYTES[recipe.output.dtype]
    masked = recipe.drop.mode != "none" and recipe.drop.apply == "mask"
    token = values * itemsize + 4 + 8 + (1 if masked else 0)
    slot = 8 + 8
    p = recipe.packing
    words = (f"({values} patch values x {itemsize} byte{'s' if itemsize > 1 else ''} of {recipe.output.dtype} "
             f"+ 12 bytes of segment id and coords{' + 1 of mask' if masked else ''})")
    return p.rows * p.seq_len * token, p.rows * p.max_images_per_row * slot, words


def _version_message(v: Any) -> str:
    newer = type(v) is int and v > RECIPE_VERSION
    hint = "; a recipe written for a newer format needs a newer patchloom" if newer else ""
    return f"must be {RECIPE_VERSION}, the only recipe version this patchloom reads (got {_show(v)}){hint}"


# ---------------------------------------------------------------------------------------------
# YAML: the safe loader, narrowed to plain data and bounded in size.

MAX_RECIPE_BYTES = 1 << 20  # a recipe is a page of settings; anything near this is not one
MAX_RECIPE_NODES = 100_000  # values after expanding aliases (stops alias bombs before they expand)
MAX_RECIPE_DEPTH = 64  # nesting of mappings and lists
MAX_NUMBER_CHARS = 64  # an integer written longer than this is kept as _LongNumber, never converted

_YAML_TAG_PREFIX = "tag:yaml.org,2002:"
_MERGE_TAG = _YAML_TAG_PREFIX + "merge"
_REFUSED_STD_TAGS = {_YAML_TAG_PREFIX + t for t in ("binary", "set", "omap", "pairs")}


class _Refused(yaml.YAMLError):
    """A YAML document that parses but is not acceptable as a recipe."""

    def __init__(self, message: str, mark: Any = None) -> None:
        super().__init__(message)
        self.message = message
        self.mark = mark

    def __str__(self) -> str:
        return f"{_line(self.mark)}{self.message}"


def _line(mark: Any) -> str:
    return f"line {mark.line + 1}: " if mark is not None else ""


def _short_tag(tag: str) -> str:
    return "!!" + tag[len(_YAML_TAG_PREFIX):] if tag.startswith(_YAML_TAG_PREFIX) else tag


class _RecipeLoader(yaml.SafeLoader):
    """The safe loader with limits: plain data only (mappings, lists, strings, numbers, booleans,
    null), bounded nesting; the composed tree is checked for size and duplicate keys before any
    value is built."""

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self._depth = 0

    def compose_node(self, parent: Any, index: Any) -> Any:
        self._depth += 1
        try:
            if self._depth > MAX_RECIPE_DEPTH:
                raise _Refused(
                    f"nested more than {MAX_RECIPE_DEPTH} levels deep; a recipe is a few levels of settings",
                    self.peek_event().start_mark,
                )
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


def _refuse_tag(loader: _RecipeLoader, *args: Any) -> Any:
    node = args[-1]  # a multi-constructor also gets the tag's suffix first
    tag = _short_tag(node.tag)
    if node.tag.startswith(_YAML_TAG_PREFIX + "python/"):
        why = "a recipe is data, so it cannot create Python objects or run code"
    else:
        why = "a recipe holds only mappings, lists, strings, numbers, true/false and null"
    raise _Refused(f"tag {tag!r} is refused: {why}", node.start_mark)


class _LongNumber:
    """Stands in for a YAML integer too long to convert (Python refuses over 4300 digits, and no
    setting needs more than 19), so validation can name its key instead of failing in the loader."""

    def __init__(self, text: str) -> None:
        self.length = len(text)

    def __repr__(self) -> str:
        return f"a number {self.length} characters long"


def _int_or_long(loader: _RecipeLoader, node: yaml.Node) -> int | _LongNumber:
    text = loader.construct_scalar(node)
    if len(text) > MAX_NUMBER_CHARS:
        return _LongNumber(text)
    return loader.construct_yaml_int(node)


def _timestamp_as_text(loader: _RecipeLoader, node: yaml.Node) -> str:
    # YAML 1.1 reads an unquoted 2024-01-01 as a date; a recipe has no dates, so keep the text.
    return loader.construct_scalar(node)


_RecipeLoader.add_constructor(None, _refuse_tag)
for _tag in _REFUSED_STD_TAGS:
    _RecipeLoader.add_constructor(_tag, _refuse_tag)
_RecipeLoader.add_constructor(_YAML_TAG_PREFIX + "timestamp", _timestamp_as_text)
_RecipeLoader.add_constructor(_YAML_TAG_PREFIX + "int", _int_or_long)
# YAML 1.1 reads `1e-6` (no dot, or an unsigned exponent) as text; read it as the number it is, as
# YAML 1.2 does, since numbers are strict (a float setting refuses text).
_RecipeLoader.add_implicit_resolver(
    _YAML_TAG_PREFIX + "float", re.compile(r"^[-+]?[0-9][0-9_]*(?:\.[0-9_]*)?[eE][-+]?[0-9]+$"), list("-+0123456789")
)
# Python tags are not registered by the safe loader; listing them anyway keeps the refusal explicit.
_RecipeLoader.add_multi_constructor(_YAML_TAG_PREFIX + "python/", _refuse_tag)


def _check_tree(loader: _RecipeLoader, root: yaml.Node) -> None:
    """Count values with aliases expanded (a shared node counts each time it is used), refuse a
    structure that contains itself, and refuse duplicate keys in a mapping."""
    sizes: dict[int, int] = {}
    open_nodes: set[int] = set()

    def size(node: yaml.Node) -> int:
        nid = id(node)
        if nid in sizes:
            return sizes[nid]
        if nid in open_nodes:
            raise _Refused("an alias refers to a node that contains it (a recursive structure)", node.start_mark)
        total = 1
        if isinstance(node, (yaml.SequenceNode, yaml.MappingNode)):
            open_nodes.add(nid)
            if isinstance(node, yaml.MappingNode):
                _check_duplicates(loader, node)
                children = [c for pair in node.value for c in pair]
            else:
                children = list(node.value)
            for child in children:
                total += size(child)
                if total > MAX_RECIPE_NODES:
                    raise _Refused(
                        f"more than {MAX_RECIPE_NODES} values once aliases are expanded; "
                        f"a recipe is far smaller, so this looks like aliases nested to multiply each other",
                        node.start_mark,
                    )
            open_nodes.discard(nid)
        sizes[nid] = total
        return total

    size(root)


def _check_duplicates(loader: _RecipeLoader, node: yaml.MappingNode) -> None:
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        if not isinstance(key_node, yaml.ScalarNode) or key_node.tag == _MERGE_TAG:
            continue  # `<<` merge keys may be overridden by the mapping's own keys; complex keys fail later
        key = loader.construct_object(key_node)
        line = key_node.start_mark.line + 1
        try:
            first = seen.get(key)
        except TypeError:
            continue
        if first is not None:
            raise _Refused(
                f"key {_show(key)} appears twice in one mapping (lines {first} and {line}); "
                f"YAML would silently keep the last one, so write it once",
                key_node.start_mark,
            )
        seen[key] = line


def _load_yaml(path: Path) -> Any:
    """Read one recipe file into plain data; every failure is a RecipeError naming the file.

    At most MAX_RECIPE_BYTES + 1 bytes are read, so a device or a file that grows cannot fill memory."""
    try:
        with path.open("rb") as f:
            raw = f.read(MAX_RECIPE_BYTES + 1)
            size = os.fstat(f.fileno()).st_size
    except OSError as exc:
        raise RecipeError(f"cannot read recipe {path}: {exc.strerror or exc}") from None
    if len(raw) > MAX_RECIPE_BYTES:
        shown = size if size > MAX_RECIPE_BYTES else f"more than {MAX_RECIPE_BYTES}"
        raise RecipeError(
            f"{path}: refused: {shown} bytes is over the {MAX_RECIPE_BYTES >> 20} MiB limit for a recipe file"
        )
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RecipeError(f"{path}: not UTF-8 text (bad byte at offset {exc.start})") from None
    try:
        loader = _RecipeLoader(text)  # the reader refuses control characters here, before parsing
    except yaml.reader.ReaderError as exc:
        raise RecipeError(f"{path}: not valid YAML for a recipe: {_reader_problem(text, exc)}") from None
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        _check_tree(loader, node)
        return loader.construct_document(node)
    except _Refused as exc:
        # "not valid YAML for a recipe": the text may be valid YAML, but not as a recipe.
        raise RecipeError(f"{path}: not valid YAML for a recipe: {exc}") from None
    except yaml.MarkedYAMLError as exc:
        raise RecipeError(f"{path}: not valid YAML: {_yaml_problem(exc)}") from None
    except yaml.YAMLError as exc:
        raise RecipeError(f"{path}: not valid YAML: {' '.join(str(exc).split())}") from None
    except RecursionError:
        raise RecipeError(f"{path}: not valid YAML for a recipe: nested too deeply") from None
    finally:
        loader.dispose()


def _reader_problem(text: str, exc: yaml.reader.ReaderError) -> str:
    """PyYAML's refusal of a character, as line, column and what to do."""
    pos = max(0, min(int(exc.position), len(text)))
    line = text.count("\n", 0, pos) + 1
    column = pos - (text.rfind("\n", 0, pos) + 1) + 1
    code = exc.character if isinstance(exc.character, int) else ord(str(exc.character)[:1] or "\0")
    return (f"line {line}, column {column}: control character U+{code:04X} is not allowed in a recipe; "
            f"remove it")


def _yaml_problem(exc: yaml.MarkedYAMLError) -> str:
    """PyYAML's several-line error, as one line: where, what, and what it was inside."""
    text = exc.problem or "unreadable"
    if exc.problem_mark is not None:
        text = f"line {exc.problem_mark.line + 1}, column {exc.problem_mark.column + 1}: {text}"
    if exc.context:
        where = ""
        if exc.context_mark is not None:
            where = f" at line {exc.context_mark.line + 1}, column {exc.context_mark.column + 1}"
        text += f" ({exc.context}{where})"
    return text


# ---------------------------------------------------------------------------------------------
# extends: resolve a chain of files into one mapping, remembering which file set each value.

Provenance = dict[tuple[Any, ...], str]


def _resolve_file(path: Path, chain: tuple[Path, ...]) -> tuple[Any, Provenance]:
    """The file's data with its `extends` chain merged in, and the file that set each leaf value."""
    here = path.resolve()
    if here in (p.resolve() for p in chain):
        names = " -> ".join(str(p) for p in (*chain, path))
        raise RecipeError(f"{path}: extends cycle: {names}")
    data = _load_yaml(path)
    if not isinstance(data, dict) or "extends" not in data:
        provenance: Provenance = {}
        if isinstance(data, dict):
            _record_leaves(data, (), str(path), provenance)
        elif data is not None:
            raise RecipeError(f"{path}: a recipe must be a mapping of sections, got {_kind(data)}")
        return data, provenance
    data = dict(data)
    target = data.pop("extends")
    if not isinstance(target, str) or not target.strip():
        raise RecipeError(
            f"{path}: invalid recipe\n  extends: must be the path of a base recipe file, relative to this "
            f"file (got {_show(target)})"
        )
    base_path = _base_file(path, target)
    base, provenance = _resolve_file(base_path, (*chain, path))
    if base is None:
        base = {}
    return _merge(base, data, (), str(path), provenance), provenance


def _base_file(path: Path, target: str) -> Path:
    """The base file `extends: target` names, once it is known to be a recipe: a regular file (not a
    device, pipe or folder) named .yaml or .yml, also after following links, within the size cap."""
    def refuse(why: str) -> RecipeError:
        return RecipeError(f"{path}: invalid recipe\n  extends: {why} (got {_show(target)})")

    bad = _CONTROL.search(target)
    if bad:
        raise refuse(f"contains control character U+{ord(bad.group()):04X}; remove it")
    base_path = path.parent / target
    try:
        real = base_path.resolve()
    except (OSError, RuntimeError) as exc:  # a link loop
        raise refuse(f"cannot be followed to a file ({exc})") from None
    if base_path.suffix.lower() not in RECIPE_SUFFIXES or real.suffix.lower() not in RECIPE_SUFFIXES:
        named = "" if real.name == base_path.name else f", a link to {real}"
        raise refuse(f"must name a recipe file ending in .yaml or .yml{named}")
    try:
        info = base_path.stat()
    except OSError:
        info = None
    if info is None or not stat.S_ISREG(info.st_mode):
        reason = "no such file" if info is None else (
            "is a folder" if stat.S_ISDIR(info.st_mode) else "is not a regular file (a device, pipe or socket)")
        raise RecipeError(f"{path}: extends {target!r}: cannot read recipe {base_path}: {reason}")
    if info.st_size > MAX_RECIPE_BYTES:
        raise refuse(f"{base_path} is {info.st_size} bytes, over the {MAX_RECIPE_BYTES >> 20} MiB limit")
    return base_path


def _record_leaves(data: dict[str, Any], prefix: tuple[Any, ...], origin: str, provenance: Provenance) -> None:
    for key, value in data.items():
        if isinstance(value, dict) and value:
            _record_leaves(value, (*prefix, key), origin, provenance)
        else:
            provenance[(*prefix, key)] = origin


def _forget(provenance: Provenance, prefix: tuple[Any, ...]) -> None:
    for p in [p for p in provenance if p[: len(prefix)] == prefix]:
        del provenance[p]


def _merge(
    base: dict[str, Any], over: dict[str, Any], prefix: tuple[Any, ...], origin: str, provenance: Provenance
) -> dict[str, Any]:
    """`over` on top of `base`: mappings merge, anything else replaces, null removes the key."""
    out = dict(base)
    for key, value in over.items():
        where = (*prefix, key)
        below = out.get(key)
        if value is None:
            out.pop(key, None)
            _forget(provenance, where)
        elif isinstance(value, dict):
            if not isinstance(below, dict):
                _forget(provenance, where)
                below = {}
            out[key] = _merge(below, value, where, origin, provenance)
            if not value and not out[key]:
                provenance[where] = origin
        else:
            _forget(provenance, where)
            out[key] = value
            provenance[where] = origin
    return out


def _where(loc: tuple[Any, ...], provenance: Provenance | None, origin: str) -> str:
    """'' when the value at `loc` came from the file being loaded, else 'BASE-FILE: '."""
    if not provenance:
        return ""
    for n in range(len(loc), 0, -1):
        if loc[:n] in provenance:
            src = provenance[loc[:n]]
            break
    else:
        files = {f for p, f in provenance.items() if p[: len(loc)] == loc}
        src = files.pop() if len(files) == 1 else origin
    return "" if src == origin else f"{src}: "


# ---------------------------------------------------------------------------------------------
# Error messages: one line per problem, naming the key path and what is allowed there.


# C0 and C1 control characters (Unicode category Cc), tab and newline included: no setting needs
# one, and printed in an error they could rewrite the terminal.
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f]")


def _unusable_value(data: Any) -> tuple[tuple[Any, ...], str] | None:
    """(key path, problem) for the first value no setting can take whatever the schema says: a
    string or key with a control character, or an integer too large for any setting. Checked
    before validation so that the problem is reported at its key, in one line."""
    stack: list[tuple[tuple[Any, ...], Any]] = [((), data)]
    seen: set[int] = set()
    while stack:
        path, value = stack.pop()
        if isinstance(value, str):
            bad = _CONTROL.search(value)
            if bad:
                return path, (f"contains control character U+{ord(bad.group()):04X} at position {bad.start()}; "
                              f"remove it (got {_show(value)})")
        elif isinstance(value, _LongNumber) or (
            isinstance(value, int) and not isinstance(value, bool) and abs(value) > MAX_SEED
        ):
            return path, (f"{_show(value)} is too large for any setting (seed takes 0..{MAX_SEED}; sizes and "
                          f"counts are far smaller)")
        elif isinstance(value, (dict, list, tuple)) and id(value) not in seen:
            seen.add(id(value))
            if isinstance(value, dict):
                items = list(value.items())
                for key, _ in items:
                    bad = _CONTROL.search(key) if isinstance(key, str) else None
                    if bad:
                        return path, (f"key {_show(key)} contains control character U+{ord(bad.group()):04X}; "
                                      f"remove it")
            else:
                items = list(enumerate(value))
            stack.extend(((*path, k), v) for k, v in reversed(items))
    return None


def _path_text(path: tuple[Any, ...]) -> str:
    return ".".join(str(p) for p in path)


def _plain(ann: Any) -> Any:
    """int for `Annotated[int, Strict()]` (StrictInt); the annotation itself otherwise."""
    return typing.get_args(ann)[0] if typing.get_origin(ann) is Annotated else ann


def _strip_none(ann: Any) -> Any:
    """X for `X | None`; the annotation itself otherwise (strictness markers removed)."""
    if _is_union(ann):
        args = [a for a in typing.get_args(ann) if a is not type(None)]
        if len(args) == 1:
            return _plain(args[0])
    return _plain(ann)


def _is_union(ann: Any) -> bool:
    return typing.get_origin(ann) in (typing.Union, types.UnionType)


def _model_of(ann: Any) -> type[BaseModel] | None:
    ann = _strip_none(ann)
    return ann if isinstance(ann, type) and issubclass(ann, BaseModel) else None


def _follow(loc: tuple[Any, ...]) -> tuple[tuple[Any, ...], Any, bool]:
    """Walk an error location through the schema.

    Returns the location to report, the annotation there (None where the schema says nothing:
    an unknown key, or free-form data) and whether the location ends at a union whose member
    names pydantic had put into the location (those are reported once, at the union)."""
    ann: Any = Recipe
    path: list[Any] = []
    for n, part in enumerate(loc):
        if ann is None:
            return (*path, *loc[n:]), None, False
        model = _model_of(ann)
        inner = _strip_none(ann)
        if model is not None:
            if isinstance(part, str) and part in model.model_fields:
                ann = model.model_fields[part].annotation
                path.append(part)
                continue
            return (*path, *loc[n:]), None, False
        if _is_union(inner):
            return tuple(path), ann, True
        origin = typing.get_origin(inner)
        args = typing.get_args(inner)
        if isinstance(part, int) and origin is list:
            ann = args[0]
        elif isinstance(part, int) and origin is tuple:
            ann = args[0] if len(args) == 2 and args[1] is Ellipsis else (args[part] if part < len(args) else None)
        else:
            ann = None
        path.append(part)
    return tuple(path), ann, False


def _lookup(data: Any, loc: tuple[Any, ...]) -> Any:
    for part in loc:
        try:
            data = data[part]
        except (KeyError, IndexError, TypeError):
            return _NOTHING
    return data


_NOTHING = object()

_WORDS: dict[Any, tuple[str, str]] = {
    str: ("a string", "strings"),
    int: ("an integer", "integers"),
    float: ("a number", "numbers"),
    bool: ("true or false", "true/false values"),
    type(None): ("null", "nulls"),
}


def _describe(ann: Any, plural: bool = False) -> str:
    """What a value of this annotation looks like, in words."""
    ann = _plain(ann)
    if ann in _WORDS:
        return _WORDS[ann][plural]
    origin = typing.get_origin(ann)
    args = typing.get_args(ann)
    if origin is Literal:
        choices = ", ".join(_show(a) for a in args)
        return f"one of {choices}" if len(args) > 1 else _show(args[0])
    if _is_union(ann):
        parts = [_describe(a, plural) for a in args]
        return ", ".join(parts[:-1]) + " or " + parts[-1]
    if origin is list:
        return "lists" if plural else f"a list of {_describe(args[0], plural=True)}"
    if origin is tuple:
        if len(set(args)) == 1:
            text = f"{len(args)} {_describe(args[0], plural=True)}"
            return f"lists of {text}" if plural else f"a list of {text}"
        inner = ", ".join(_describe(a).removeprefix("a ").removeprefix("an ") for a in args)
        return f"[{inner}] pairs" if plural and len(args) == 2 else f"[{inner}]"
    model = _model_of(ann)
    if model is not None:
        return "mappings" if plural else f"a mapping with keys {', '.join(model.model_fields)}"
    if origin is dict:
        return "mappings" if plural else "a mapping"
    return "values" if plural else "a value"


def _show(value: Any, limit: int = 60) -> str:
    """A value as a reader of the YAML file would write it, shortened."""
    if value is True or value is False:
        text = "true" if value else "false"
    elif isinstance(value, int) and value.bit_length() > 128:  # repr() refuses over 4300 digits
        text = f"a number of about {int(value.bit_length() * math.log10(2)) + 1} digits"
    elif value is None:
        text = "null"
    elif isinstance(value, (list, tuple)):
        text = "[" + ", ".join(_show(v, limit) for v in value) + "]"
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{_show(k, limit)}: {_show(v, limit)}" for k, v in value.items()) + "}"
    else:
        text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _kind(value: Any) -> str:
    return {list: "a list", str: "a string", int: "a number", float: "a number", bool: "true/false"}.get(
        type(value), type(value).__name__
    )


def _section_fields() -> dict[str, list[str]]:
    """Every key name of the top level and of each section, to the paths that have it."""
    found: dict[str, list[str]] = {}
    for name, field in Recipe.model_fields.items():
        found.setdefault(name, []).append(name)
        model = _model_of(field.annotation)
        if model is not None:
            for sub in model.model_fields:
                found.setdefault(sub, []).append(f"{name}.{sub}")
    return found


def _unknown_key(path: tuple[Any, ...], in_file: bool) -> str:
    model = _model_of(_follow(path[:-1])[1])
    allowed = list(model.model_fields) if model is not None else []
    if not path[:-1] and in_file:
        allowed.append("extends")
    key = path[-1]
    msg = "unknown key"
    if isinstance(key, str):  # (a key that is not a string is reported as invalid_key instead)
        lowered = {a.lower(): a for a in allowed}
        close = difflib.get_close_matches(key.lower(), list(lowered), n=1, cutoff=0.6)
        here = ".".join(str(p) for p in path[:-1])
        elsewhere = [p for p in _section_fields().get(key, []) if p.rpartition(".")[0] != here]
        if close:
            msg += f"; did you mean {lowered[close[0]]!r}?"
        elif elsewhere:
            msg += f"; did you mean {' or '.join(repr(p) for p in elsewhere)}?"
    return f"{msg} (allowed: {', '.join(allowed)})" if allowed else msg


_QUOTE_HINT = "quote it: YAML reads unquoted yes/no/on/off/true/false as booleans and digits as numbers"
_RANGE = {"greater_than_equal": (">=", "ge"), "greater_than": (">", "gt"),
          "less_than_equal": ("<=", "le"), "less_than": ("<", "lt")}
_TYPE_ERRORS = {
    "int_parsing", "int_type", "float_parsing", "float_type", "bool_parsing", "bool_type", "string_type",
    "list_type", "tuple_type", "dict_type", "model_type", "model_attributes_type", "too_short", "too_long",
    "string_too_short", "string_too_long", "int_parsing_size", "none_required",
}


def _problem(err: Any, data: Any, in_file: bool) -> tuple[tuple[Any, ...], str]:
    """(location, message) for one pydantic error."""
    kind = err["type"]
    path, ann, at_union = _follow(tuple(err["loc"]))
    got = err.get("input")
    cause = (err.get("ctx") or {}).get("error")
    if isinstance(cause, _AtKey):
        return cause.path, " ".join(str(cause).split())
    if at_union or (kind == "missing" and path and isinstance(path[-1], int)):
        if kind == "missing":
            path = path[:-1]
            ann = _follow(path)[1]
        got = _lookup(data, path)
        shown = "" if got is _NOTHING else f" (got {_show(got)})"
        return path, f"must be {_describe(ann)}{shown}"
    if kind == "extra_forbidden":
        return path, _unknown_key(path, in_file)
    if kind == "invalid_key":  # pydantic puts the key into the location; True shows as 1 there
        model = _model_of(_follow(path[:-1])[1])
        allowed = f" (allowed: {', '.join(model.model_fields)})" if model is not None else ""
        return path[:-1], f"key {_show(got)} is not a string; {_QUOTE_HINT}{allowed}"
    if kind == "missing":
        what = f": {_describe(ann)}" if ann is not None else ""
        return path, f"required key is missing{what}"
    if kind == "literal_error":
        choices = list(typing.get_args(_strip_none(ann))) if ann is not None else []
        allowed = ", ".join(_show(c) for c in choices) or err["ctx"]["expected"]
        hint = ""
        if isinstance(got, str):
            close = difflib.get_close_matches(got, [str(c) for c in choices], n=1)
            hint = f"; did you mean {close[0]!r}?" if close else ""
        return path, f"must be one of {allowed} (got {_show(got)}{hint})"
    if kind in _RANGE:
        op, name = _RANGE[kind]
        return path, f"must be {op} {err['ctx'][name]} (got {_show(got)})"
    if kind == "int_from_float":
        return path, f"must be a whole number (got {_show(got)})"
    if kind == "finite_number":
        return path, f"must be a finite number, not NaN or infinity (got {_show(got)})"
    if kind == "int_type" and isinstance(got, float) and not isinstance(got, bool):
        if got.is_integer():
            return path, f"must be an integer, written without a decimal point or exponent (got {_show(got)})"
        return path, f"must be a whole number (got {_show(got)})"
    if kind in _TYPE_ERRORS:
        what = _describe(ann) if ann is not None else err["msg"].replace("Input should be ", "")
        if kind in ("int_type", "float_type") and isinstance(got, bool):
            what += ", not true/false"
        msg = f"must be {what} (got {_show(got)})"
        if kind == "string_type" and isinstance(got, (bool, int, float)):
            msg += f"; {_QUOTE_HINT}"
        elif kind in ("int_type", "float_type") and isinstance(got, str) and _number_text(got):
            msg += "; write the number without quotes"
        return path, msg
    msg = " ".join(err["msg"].split()).removeprefix("Value error, ").removeprefix("Assertion failed, ")
    msg = msg.replace("Input should be", "must be")
    if kind == "value_error":  # our validators say what they got; a section's input is the whole section
        if "(got " not in msg and not isinstance(got, (dict, list, tuple)):
            msg += f" (got {_show(got)})"
    elif not isinstance(got, dict):
        msg += f" (got {_show(got)})"
    return path, msg


def _number_text(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _explain(
    exc: ValidationError,
    origin: str,
    *,
    data: Any = None,
    provenance: Provenance | None = None,
    in_file: bool = False,
) -> str:
    lines = [f"{origin}: invalid recipe"]
    for err in exc.errors():
        path, msg = _problem(err, data, in_file)
        loc = ".".join(str(p) for p in path)
        line = f"  {_where(path, provenance, origin)}{loc + ': ' if loc else ''}{msg}"
        if line not in lines:
            lines.append(line)
    return "\n".join(lines)
