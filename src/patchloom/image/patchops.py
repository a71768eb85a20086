"""Patch-level operations on an image's [N, D] patch array, each one vectorised numpy pass.

Values are float32 on the 0..255 scale while ops run. `standardize` turns each patch into zero
mean / unit variance (the usual target for masked-image modelling) and replaces the output
mean/std normalisation. Every random choice comes from the generator passed in.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..recipe.schema import PatchOp


def jitter(x: np.ndarray, rng: np.random.Generator, *, brightness: float, contrast: float) -> np.ndarray:
    """Independent brightness shift and contrast scale per patch (around the patch's own mean)."""
    n = x.shape[0]
    shift = rng.uniform(-brightness, brightness, size=(n, 1)).astype(np.float32) * 255.0
    scale = rng.uniform(1.0 - contrast, 1.0 + contrast, size=(n, 1)).astype(np.float32)
    mean = x.mean(axis=1, keepdims=True)
    return np.clip((x - mean) * scale + mean + shift, 0.0, 255.0)


def gaussian_noise(x: np.ndarray, rng: np.random.Generator, *, sigma: float) -> np.ndarray:
    """Add N(0, sigma^2) noise (sigma on the 0..255 scale) to every value."""
    return np.clip(x + rng.normal(0.0, sigma, size=x.shape).astype(np.float32), 0.0, 255.0)


def standardize(x: np.ndarray, *, eps: float) -> np.ndarray:
    """Each patch to zero mean and unit variance over its D values."""
    mean = x.mean(axis=1, keepdims=True)
    var = x.var(axis=1, keepdims=True)
    return (x - mean) / np.sqrt(var + eps)


def apply_patch_ops(
    patches: np.ndarray,
    ops: Sequence[PatchOp],
    rng: np.random.Generator,
    *,
    extra: Sequence[np.ndarray] = (),
) -> tuple[np.ndarray, list[np.ndarray], bool]:
    """Run `ops` in order on uint8 or float patches.

    `extra` holds per-token arrays (coords, masked flags) that must follow the tokens when they
    are shuffled. Returns (float32 patches, the extra arrays, whether the result is standardized).
    Each op applies to the whole image with its probability `p`; its parameters vary per patch.
    """
    x = patches.astype(np.float32, copy=True)
    extra = list(extra)
    standardized = False
    for op in ops:
        if op.p < 1.0 and rng.random() >= op.p:
            continue
        if standardized and op.name != "shuffle":
            raise ValueError(f"patch op {op.name!r} after standardize: put standardize last")
        if op.name == "jitter":
            x = jitter(x, rng, brightness=op.brightness, contrast=op.contrast)
        elif op.name == "noise":
            x = gaussian_noise(x, rng, sigma=op.sigma)
        elif op.name == "shuffle":
            perm = rng.permutation(x.shape[0])
            x = x[perm]
            extra = [a[perm] for a in extra]
        elif op.name == "standardize":
            x = standardize(x, eps=op.eps)
            standardized = True
        else:  # the schema only admits the names above
            raise ValueError(f"unknown patch op {op.name!r}")
    return x, extra, standardized
