"""Patch-level operations on an image's [N, D] patch array, each one vectorised numpy pass.

Values are float32 on the 0..255 scale while ops run. `standardize` turns each patch into zero
mean / unit variance (the usual target for masked-image modelling) and replaces the output
mean/std normalisation. Every random choice comes from the generator passed in.

`PATCH_OPS` (name -> op function, one uniform signature, see `PatchOpFn`) is the one place an op
is registered: `apply_patch_ops` dispatches through it and the recipe's op names are its keys.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # the recipe reads PATCH_OPS, so no run-time import of it here
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


#: A patch op: (x, op, rng) -> (values, order). x is float32 [N, D] (0..255 scale until standardize);
#: `op` is the recipe entry (its parameters); order is the token permutation the op applied (the
#: caller moves coords and masked flags with it), or None when the token order is unchanged.
PatchOpFn = Callable[[np.ndarray, "PatchOp", np.random.Generator], tuple[np.ndarray, "np.ndarray | None"]]


def op_standardize(x: np.ndarray, op: PatchOp, rng: np.random.Generator) -> tuple[np.ndarray, None]:
    """`standardize` with the op's eps."""
    return standardize(x, eps=op.eps), None


def op_jitter(x: np.ndarray, op: PatchOp, rng: np.random.Generator) -> tuple[np.ndarray, None]:
    """`jitter` with the op's brightness and contrast."""
    return jitter(x, rng, brightness=op.brightness, contrast=op.contrast), None


def op_shuffle(x: np.ndarray, op: PatchOp, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A uniformly random token order."""
    perm = rng.permutation(x.shape[0])
    return x[perm], perm


def op_noise(x: np.ndarray, op: PatchOp, rng: np.random.Generator) -> tuple[np.ndarray, None]:
    """`gaussian_noise` with the op's sigma."""
    return gaussian_noise(x, rng, sigma=op.sigma), None


#: name -> op: the one place a patch op is registered (recipe `patch_ops[].name` takes these names).
PATCH_OPS: dict[str, PatchOpFn] = {
    "standardize": op_standardize,
    "jitter": op_jitter,
    "shuffle": op_shuffle,
    "noise": op_noise,
}
#: The op whose result replaces the output mean/std normalisation; only reorders may follow it.
STANDARDIZE = "standardize"


def patch_op(name: str) -> PatchOpFn:
    """The PATCH_OPS entry for `name`, or an error listing the known ops."""
    try:
        return PATCH_OPS[name]
    except (KeyError, TypeError):
        raise ValueError(f"unknown patch op {name!r}: set patch_ops[].name in the recipe to one of "
                         f"{', '.join(PATCH_OPS)}") from None


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
    After standardize only ops that just reorder the tokens (those that return an order) may run.
    """
    x = patches.astype(np.float32, copy=True)
    extra = list(extra)
    standardized = False
    for op in ops:
        run = patch_op(op.name)
        if op.p < 1.0 and rng.random() >= op.p:
            continue
        values, order = run(x, op, rng)
        if standardized and order is None:
            raise ValueError(f"patch op {op.name!r} after standardize: put standardize last")
        x = values
        if order is not None:
            extra = [a[order] for a in extra]
        standardized = standardized or op.name == STANDARDIZE
    return x, extra, standardized
