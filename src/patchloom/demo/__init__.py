"""The made-up demo archive (`demo.data`), its clips (`demo.clips`, needs PyAV) and the demo recipes (`demo.recipe`)."""

from .recipe import DEMO_CLIP_RECIPE, DEMO_RECIPE

__all__ = ["DEMO_CLIP_RECIPE", "DEMO_RECIPE"]
