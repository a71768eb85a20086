"""patchloom: tar shards of images -> token-budget patch grids -> packed fixed-shape batches.

The public API is what this module names; everything else may move.
"""

from __future__ import annotations

from .errors import PatchloomError
from .packing.batch import PackedBatch
from .image.decode import DecodeError
from .packing.packer import Packer, pack
from .image.patches import PatchSet, patchify, unpatchify
from .ledger import EmptyEpochError, Ledger
from .pipeline import Pipeline, SampleError, SkipRatioError, image_to_patches
from .recipe.schema import Recipe, RecipeError
from .image.sizing import SizePlan, plan_size
from .read import ShardError, SourceError, expand_shards
from .store import read_packed

__version__ = "0.1.0"

__all__ = [
    "DecodeError",
    "EmptyEpochError",
    "Ledger",
    "PackedBatch",
    "PatchloomError",
    "Packer",
    "PatchSet",
    "Pipeline",
    "Recipe",
    "RecipeError",
    "SampleError",
    "ShardError",
    "SizePlan",
    "SkipRatioError",
    "SourceError",
    "expand_shards",
    "image_to_patches",
    "pack",
    "patchify",
    "plan_size",
    "read_packed",
    "unpatchify",
]
