"""The seeded shuffle buffer over raw records (bytes, before decode), with its resume state."""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from typing import Any

import numpy as np

from .tar import Record


class ShuffleBuffer:
    """Seeded shuffle of raw records (bytes, before decode) through a buffer of `size` records.

    `held` is what the buffer holds right now, so the ledger can account for it.
    """

    def __init__(self, size: int, rng: np.random.Generator) -> None:
        self.size = size
        self.rng = rng
        self.held: list[Record] = []

    def __call__(self, records: Iterator[Record]) -> Iterator[Record]:
        if self.size <= 1:
            yield from records
            return
        buf = self.held
        for rec in records:
            if len(buf) < self.size:
                buf.append(rec)
                continue
            i = int(self.rng.integers(len(buf)))
            out, buf[i] = buf[i], rec
            yield out
        while buf:
            i = int(self.rng.integers(len(buf)))
            buf[i], buf[-1] = buf[-1], buf[i]
            yield buf.pop()

    def state_dict(self) -> dict[str, Any]:
        """The generator's state and the held records as [shard url, index] references (no bytes)."""
        return {"rng": self.rng.bit_generator.state, "held": [[rec.url, rec.index] for rec in self.held]}

    def load_state_dict(self, state: dict[str, Any],
                        fetch: Callable[[Sequence[tuple[str, int]]], list[Record]]) -> None:
        """Continue from `state_dict()`: `fetch` re-reads the held records from their references.
        A state whose "rng" is None (saved before the first draw) keeps the generator as seeded."""
        refs = [(str(url), int(index)) for url, index in state["held"]]
        if state["rng"] is not None:
            self.rng.bit_generator.state = state["rng"]
        self.held = list(fetch(refs)) if refs else []
