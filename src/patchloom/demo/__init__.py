"""The made-up demo archive (`demo.data`) and the demo recipe (`demo.recipe`)."""

from .recipe import DEMO_RECIPE

__all__ = ["DEMO_RECIPE"]
