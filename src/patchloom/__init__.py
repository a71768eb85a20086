"""patchloom: tar shards of images -> token-budget patch grids -> packed fixed-shape batches.

The public API is what this module names; everything else may move.
"""

from __future__ import annotations

from .batch import PackedBatch
from .decode import DecodeError
from .packing import Packer, pack
from .patches import PatchSet, patchify, unpatchify
from .pipeline import EmptyEpochError, Ledger, Pipeline, SampleError, SkipRatioError, image_to_patches
from .recipe import Recipe, RecipeError
from .sizing import SizePlan, plan_size
from .sources import ShardError, SourceError, expand_shards
from .store import read_packed

__version__ = "0.1.0"

__all__ = [
    "DecodeError",
    "EmptyEpochError",
    "Ledger",
    "PackedBatch",
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
