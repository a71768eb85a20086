"""Recipes: the validated settings of a run (schema), hardened YAML loading (loader), and one-line
error messages with a did-you-mean (messages)."""

from .loader import MAX_RECIPE_BYTES, MAX_SEED
from .messages import RENAMES, RecipeError
from .schema import (
    MAX_BATCH_BYTES,
    RECIPE_VERSION,
    BlockDrop,
    ContentDrop,
    CropConfig,
    DecodeConfig,
    DropConfig,
    EpochConfig,
    GridDrop,
    OutputConfig,
    PackingConfig,
    PatchOp,
    Recipe,
    SampledTokens,
    SizingConfig,
    SourceConfig,
    TextConfig,
    batch_bytes,
    current_names,
    fingerprint_form,
)

__all__ = [
    "MAX_BATCH_BYTES", "MAX_RECIPE_BYTES", "MAX_SEED", "RECIPE_VERSION", "RENAMES", "BlockDrop", "ContentDrop",
    "CropConfig", "DecodeConfig", "DropConfig", "EpochConfig", "GridDrop", "OutputConfig", "PackingConfig",
    "PatchOp", "Recipe", "RecipeError", "SampledTokens", "SizingConfig", "SourceConfig", "TextConfig", "batch_bytes",
    "current_names", "fingerprint_form",
]
