"""The one RNG rule: every random choice comes from a generator derived through SeedSequence.

Per-sample draws depend only on (recipe seed, epoch, sample key, stage name), so a sample's result
does not depend on worker count, order or resume point. Stream-level draws (shard order, shuffle
buffer) depend on (seed, epoch, stream name, and the reader's slot numbers).
"""

from __future__ import annotations

import hashlib

import numpy as np


def _word(text: str) -> int:
    """A stable 64-bit integer for a string (Python's hash() is salted per process)."""
    return int.from_bytes(hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest(), "little")


def sample_rng(seed: int, epoch: int, key: str, stage: str) -> np.random.Generator:
    """Generator for one sample's random choices in one stage."""
    if seed is None:
        raise ValueError("a random stage needs an explicit seed; set `seed:` in the recipe")
    return np.random.default_rng(np.random.SeedSequence([int(seed), int(epoch), _word(key), _word(stage)]))


def stream_rng(seed: int, epoch: int, name: str, *slots: int) -> np.random.Generator:
    """Generator for a stream-level choice (shard shuffle, sample shuffle buffer)."""
    if seed is None:
        raise ValueError("shuffling needs an explicit seed; set `seed:` in the recipe")
    entropy = [int(seed), int(epoch), _word(name), *(int(s) for s in slots)]
    return np.random.default_rng(np.random.SeedSequence(entropy))
