"""Row assignment: which images go into which row, by token count alone (sizes in, rows out).

`ALGORITHMS` maps each packing algorithm's name to its function; it is the one place a packing
algorithm is registered (the recipe schema reads `packing.algorithm`'s allowed values from it).
Every function takes the sizes (already checked to fit a row) and returns (row -> item indices in
placement order, indices left unplaced); with rows=None it opens rows as needed and leaves nothing.
An item is one sample: with several images it also has a count (`counts`, images per item), and
a row holds at most `cap` images in all. `counts` is passed only when some item has more than one
image, so an algorithm that ignores it still serves one-image streams.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

#: largest_first places the biggest images first and fills the gaps with small ones; an image that
#: has waited this many batches in the packer goes before all others, so none waits for ever.
MAX_WAIT_BATCHES = 8

Assignment = tuple[list[list[int]], list[int]]


@dataclass(slots=True)
class _Rows:
    """Rows being filled: room left and images in each. A fixed number of rows, or (rows=None)
    as many as needed: a new one opens when no row takes an item."""

    seq_len: int
    cap: int  # images a row may hold
    fixed: bool
    space: np.ndarray  # int64 [rows]: tokens of room left
    count: np.ndarray  # int64 [rows]: images placed
    out: list[list[int]]  # the items of each row

    @classmethod
    def start(cls, rows: int | None, seq_len: int, cap: int) -> _Rows:
        n = rows if rows is not None else 0
        return cls(seq_len, cap, rows is not None, np.full(n, seq_len, dtype=np.int64),
                   np.zeros(n, dtype=np.int64), [[] for _ in range(n)])

    def fitting(self, size: int, k: int) -> np.ndarray:
        """Indices of the rows with room for `size` tokens and `k` more images."""
        return np.flatnonzero((self.space >= size) & (self.count + k <= self.cap))

    def takes(self, row: int, size: int, k: int) -> bool:
        return bool(self.space[row] >= size and self.count[row] + k <= self.cap)

    def place(self, item: int, size: int, row: int | None, k: int) -> int | None:
        """Put `item` in `row` (None: no row takes it, so open one unless the rows are fixed).
        Returns the row it went to, or None when it has to wait for the next batch."""
        if row is None:
            if self.fixed:
                return None
            self.space = np.append(self.space, self.seq_len)
            self.count = np.append(self.count, 0)
            self.out.append([])
            row = len(self.space) - 1
        self.space[row] -= size
        self.count[row] += k
        self.out[row].append(item)
        return row


def _ones(counts: Sequence[int] | None, n: int) -> Sequence[int]:
    return counts if counts is not None else [1] * n


def first_fit(sizes: Sequence[int], *, seq_len: int, rows: int | None, cap: int,
              waited: Sequence[int] | None = None, counts: Sequence[int] | None = None) -> Assignment:
    """Items in arrival order, each into the first row with room."""
    table, left = _Rows.start(rows, seq_len, cap), []
    for i, (s, k) in enumerate(zip(sizes, _ones(counts, len(sizes)))):
        fits = table.fitting(s, k)
        if table.place(i, s, int(fits[0]) if fits.size else None, k) is None:
            left.append(i)
    return table.out, left


def best_fit(sizes: Sequence[int], *, seq_len: int, rows: int | None, cap: int,
             waited: Sequence[int] | None = None, counts: Sequence[int] | None = None) -> Assignment:
    """Items in arrival order, each into the row with the least room that still takes it."""
    table, left = _Rows.start(rows, seq_len, cap), []
    for i, (s, k) in enumerate(zip(sizes, _ones(counts, len(sizes)))):
        fits = table.fitting(s, k)
        row = int(fits[np.argmin(table.space[fits])]) if fits.size else None
        if table.place(i, s, row, k) is None:
            left.append(i)
    return table.out, left


def in_order(sizes: Sequence[int], *, seq_len: int, rows: int | None, cap: int,
             waited: Sequence[int] | None = None, counts: Sequence[int] | None = None) -> Assignment:
    """Items in arrival order, filling one row after the other; once one item waits, all after it
    wait too (the order of images is kept exactly)."""
    table, left = _Rows.start(rows, seq_len, cap), []
    current = 0  # the row being filled
    for i, (s, k) in enumerate(zip(sizes, _ones(counts, len(sizes)))):
        if left:
            left.append(i)
            continue
        while current < len(table.space) and not table.takes(current, s, k):
            current += 1
        row = table.place(i, s, current if current < len(table.space) else None, k)
        if row is None:
            left.append(i)
        else:
            current = row
    return table.out, left


def largest_first(sizes: Sequence[int], *, seq_len: int, rows: int | None, cap: int,
                  waited: Sequence[int] | None = None, counts: Sequence[int] | None = None) -> Assignment:
    """First fit over the items from the largest down (first fit decreasing; ties in arrival
    order). Items that have `waited` MAX_WAIT_BATCHES batches or more go before all others."""
    old = [w >= MAX_WAIT_BATCHES for w in waited] if waited is not None else [False] * len(sizes)
    order = sorted(range(len(sizes)), key=lambda i: (not old[i], -sizes[i]))
    k = _ones(counts, len(sizes))
    out, left = first_fit([sizes[i] for i in order], seq_len=seq_len, rows=rows, cap=cap,
                          counts=[k[i] for i in order])
    return [[order[j] for j in row] for row in out], sorted(order[j] for j in left)


#: Packing algorithm name -> function(sizes, *, seq_len, rows, cap, waited[, counts]) -> (rows, left).
ALGORITHMS: dict[str, Callable[..., Assignment]] = {
    "largest_first": largest_first,
    "first_fit": first_fit,
    "best_fit": best_fit,
    "in_order": in_order,
}


def check_algorithm(algorithm: str) -> None:
    """Refuse a name that is not in ALGORITHMS, listing the ones that are."""
    if algorithm not in ALGORITHMS:
        raise ValueError(f"packing algorithm must be one of {', '.join(ALGORITHMS)} (got {algorithm!r})")


def assign_rows(
    sizes: Sequence[int],
    *,
    seq_len: int,
    rows: int | None,
    max_images_per_row: int | None = None,
    algorithm: str = "first_fit",
    waited: Sequence[int] | None = None,
    counts: Sequence[int] | None = None,
) -> Assignment:
    """Assign items (by token count) to rows with the named algorithm (see ALGORITHMS).

    Returns (row -> item indices in placement order, indices left unplaced). With rows=None as
    many rows as needed are opened and nothing is left over. `waited` (batches each item has
    waited in a streaming packer) lets largest_first put long-waiting items first. `counts`
    (images per item; default one each) counts against max_images_per_row. Items larger than
    seq_len, or with more images than max_images_per_row, are an error.
    """
    check_algorithm(algorithm)
    sizes = [int(s) for s in sizes]
    for s in sizes:
        if s > seq_len:
            raise ValueError(
                f"an image of {s} tokens cannot fit a row of seq_len={seq_len}; "
                "lower sizing.max_tokens or raise packing.seq_len"
            )
    if waited is not None and len(waited) != len(sizes):
        raise ValueError(f"{len(sizes)} sizes but {len(waited)} waits")
    cap = max_images_per_row if max_images_per_row is not None else seq_len
    extra = {}
    if counts is not None:
        counts = [int(k) for k in counts]
        if len(counts) != len(sizes):
            raise ValueError(f"{len(sizes)} sizes but {len(counts)} image counts")
        if any(k > cap for k in counts):
            raise ValueError(f"a sample of {max(counts)} images cannot fit a row of max_images_per_row={cap}; "
                             "raise packing.max_images_per_row")
        if any(k != 1 for k in counts):
            extra["counts"] = counts
    return ALGORITHMS[algorithm](sizes, seq_len=seq_len, rows=rows, cap=cap, waited=waited, **extra)
