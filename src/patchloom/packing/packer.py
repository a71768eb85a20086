"""Packing: place the tokens of several images into fixed-length rows.

`assign_rows` (assign.py) is the pure bin-packing step (sizes in, row assignment out); `build_batch`
writes the arrays; `Packer` streams with a bounded look-ahead buffer and carries what does not fit;
`pack` is the stateless form for a collate_fn.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..image.patches import PatchSet
from .assign import assign_rows, check_algorithm
from .batch import PackedBatch

#: A pending image in a Packer's state: the shard URL and sample index it was read from.
ImageRef = tuple[str, int]


@dataclass(slots=True, frozen=True, eq=False)
class Sample:
    """The images of one multi-image sample, packed as one unit: adjacent and in order in one row,
    sharing one number in PackedBatch.groups. key and meta are its first image's (the sample's)."""

    images: tuple[PatchSet, ...]

    @property
    def key(self) -> str:
        return self.images[0].key

    @property
    def meta(self) -> dict[str, Any]:
        return self.images[0].meta

    @property
    def num_tokens(self) -> int:
        return sum(p.num_tokens for p in self.images)


#: What the packer places as one: a one-image sample (its PatchSet) or a multi-image Sample.
Unit = PatchSet | Sample


def as_unit(item: PatchSet | Sample | Sequence[PatchSet]) -> Unit:
    """A PatchSet or Sample as it is; a list of PatchSets (one sample's images) as one unit."""
    if isinstance(item, (PatchSet, Sample)):
        return item
    images = tuple(item)
    if not images or not all(isinstance(p, PatchSet) for p in images):
        raise TypeError("a sample is a PatchSet or a non-empty list of its images' PatchSets")
    return images[0] if len(images) == 1 else Sample(images)


def images_of(unit: Unit) -> tuple[PatchSet, ...]:
    """The PatchSets of one unit, in order."""
    return unit.images if isinstance(unit, Sample) else (unit,)


def _by_image(units: Sequence[Unit], assignment: Sequence[Sequence[int]]
              ) -> tuple[list[PatchSet], list[list[int]], list[list[int]]]:
    """Units and their row assignment -> (images, rows of image indices, each segment's 1-based group)."""
    images: list[PatchSet] = []
    rows: list[list[int]] = []
    groups: list[list[int]] = []
    for row in assignment:
        rows.append([])
        groups.append([])
        for g, idx in enumerate(row, 1):
            for ps in images_of(units[idx]):
                rows[-1].append(len(images))
                groups[-1].append(g)
                images.append(ps)
    return images, rows, groups


def build_batch(
    items: Sequence[PatchSet | Sample],
    assignment: Sequence[Sequence[int]],
    *,
    seq_len: int,
    max_images_per_row: int,
    patch_dim: int | None = None,
    dtype: Any = None,
) -> PackedBatch:
    """Write the fixed-shape arrays for a row assignment (padding: zeros, segment 0, label -1), and
    the keys and texts lists (one entry per segment). `items` are samples (units): a Sample's images
    take adjacent segments of its row, in order, and share one group number."""
    items, assignment, group_of = _by_image([as_unit(u) for u in items], assignment)
    b, s, length = len(assignment), max_images_per_row, seq_len
    if patch_dim is None or dtype is None:
        if not items:
            raise ValueError("an empty batch needs patch_dim and dtype")
        patch_dim = items[0].patches.shape[1] if patch_dim is None else patch_dim
        dtype = items[0].patches.dtype if dtype is None else dtype
    patches = np.zeros((b, length, patch_dim), dtype=dtype)
    segment_ids = np.zeros((b, length), dtype=np.int32)
    coords = np.zeros((b, length, 2), dtype=np.int32)
    grids = np.zeros((b, s, 2), dtype=np.int32)
    labels = np.full((b, s), -1, dtype=np.int64)
    groups = np.zeros((b, s), dtype=np.int32)
    masked = np.zeros((b, length), dtype=bool) if any(p.masked is not None for p in items) else None
    timed = any(p.times is not None for p in items)  # a temporal recipe: times [B, L], frames [B, S]
    times = np.zeros((b, length), dtype=np.int32) if timed else None
    frames = np.zeros((b, s), dtype=np.int32) if timed else None
    keys: list[list[str]] = []
    texts: list[list[str]] = []
    for r, row in enumerate(assignment):
        if len(row) > s:
            raise ValueError(f"row {r} holds {len(row)} images, more than max_images_per_row={s}")
        pos = 0
        row_keys = []
        row_texts = []
        for j, idx in enumerate(row):
            ps = items[idx]
            n = ps.num_tokens
            if ps.patches.shape[1] != patch_dim:
                raise ValueError(
                    f"image {ps.key!r} has patch dimension {ps.patches.shape[1]}, expected {patch_dim}: "
                    "every image in a batch needs the same patch size and channels"
                )
            patches[r, pos : pos + n] = ps.patches
            segment_ids[r, pos : pos + n] = j + 1
            coords[r, pos : pos + n] = ps.coords
            if masked is not None and ps.masked is not None:
                masked[r, pos : pos + n] = ps.masked
            if times is not None:
                if ps.times is not None:
                    times[r, pos : pos + n] = ps.times
                frames[r, j] = ps.frames
            grids[r, j] = ps.grid
            groups[r, j] = group_of[r][j]
            if ps.label is not None:
                labels[r, j] = ps.label
            row_keys.append(ps.key)
            row_texts.append(ps.text)
            pos += n
        keys.append(row_keys)
        texts.append(row_texts)
    return PackedBatch(patches, segment_ids, coords, grids, labels, keys, masked, texts=texts, groups=groups,
                       times=times, frames=frames)


def pack(
    patchsets: Iterable[PatchSet | Sample | Sequence[PatchSet]],
    seq_len: int,
    rows: int | None = None,
    *,
    max_images_per_row: int | None = None,
    algorithm: str = "first_fit",
) -> PackedBatch:
    """Pack PatchSets into one batch, statelessly (for a DataLoader collate_fn).

    rows=None opens as many rows as needed; with a fixed `rows`, images that do not fit raise (a
    stateless call has nowhere to carry them: use `Packer` to stream). max_images_per_row=None
    sizes S to the fullest row; pass it to get the same S every batch. A list of PatchSets among
    the items is one multi-image sample: its images go into one row, adjacent (see groups).
    """
    items = [as_unit(p) for p in patchsets]
    if not items:
        raise ValueError("pack() needs at least one PatchSet")
    counts = [len(images_of(u)) for u in items]
    assignment, left = assign_rows(
        [p.num_tokens for p in items], seq_len=seq_len, rows=rows,
        max_images_per_row=max_images_per_row, algorithm=algorithm, counts=counts,
    )
    if left:
        raise ValueError(
            f"{len(left)} of {len(items)} images do not fit in {rows} rows of {seq_len} tokens; "
            "pass rows=None, more rows, or stream with Packer to carry them into the next batch"
        )
    s = max_images_per_row if max_images_per_row is not None else max(sum(counts[i] for i in r) for r in assignment)
    return build_batch(items, assignment, seq_len=seq_len, max_images_per_row=s)


class Packer:
    """Streaming packer: fills `rows` rows of `seq_len` tokens from a look-ahead buffer.

    Push samples (a PatchSet, or a list of one sample's PatchSets, kept together in one row); once
    at least `buffer` samples are waiting and their tokens could fill a whole batch, one batch is
    assembled and the samples that did not fit stay for the next one (never dropped). `pending`
    holds samples: a PatchSet each, or a `Sample` for several images. Waiting for a batch's worth
    of tokens keeps a small buffer from emitting half-empty batches; the look-ahead is bounded by
    max(buffer, a batch's worth of images). `flush()` empties the buffer at the end of the stream;
    every batch has the same [rows, seq_len] shape.
    """

    def __init__(
        self,
        *,
        seq_len: int,
        rows: int,
        max_images_per_row: int = 16,
        buffer: int = 64,
        algorithm: str = "largest_first",
    ) -> None:
        check_algorithm(algorithm)
        self.seq_len = seq_len
        self.rows = rows
        self.max_images_per_row = max_images_per_row
        self.buffer = max(1, buffer)
        self.algorithm = algorithm
        self.pending: list[Unit] = []
        self.emitted = 0  # batches assembled so far
        self._arrived: list[int] = []  # per pending item: self.emitted when it arrived

    def waited(self) -> list[int]:
        """Per pending item, how many batches it has waited (saved with a resume state)."""
        self._sync()
        return [self.emitted - a for a in self._arrived]

    def restore(self, items: Sequence[PatchSet | Sample | Sequence[PatchSet]],
                waited: list[int] | None = None) -> None:
        """Put back saved look-ahead samples with their waits, so packing continues exactly."""
        waited = list(waited) if waited is not None else [0] * len(items)
        if len(waited) != len(items):
            raise ValueError(f"{len(items)} pending items but {len(waited)} waits in the saved state")
        self.pending = [as_unit(u) for u in items]
        self._arrived = [self.emitted - int(w) for w in waited]

    def state_dict(self) -> dict[str, Any]:
        """The pending samples as [shard url, sample index, batches waited] (their meta's "shard" and
        "index"; one entry per sample, however many images; no pixels), so a resumed packer makes
        exactly the same batches."""
        self._sync()
        out = []
        for ps, arrived in zip(self.pending, self._arrived):
            if "shard" not in ps.meta or "index" not in ps.meta:
                raise ValueError(f"image {ps.key!r} has no shard and index in its meta: only images read "
                                 "from shards can be saved in a Packer state")
            out.append([str(ps.meta["shard"]), int(ps.meta["index"]), self.emitted - arrived])
        return {"pending": out}

    def load_state_dict(self, state: dict[str, Any],
                        materialise: Callable[[Sequence[ImageRef]], Sequence[PatchSet | Sample | Sequence[PatchSet]]]
                        ) -> None:
        """Continue from `state_dict()`: `materialise` turns the references back into the same
        samples (a PatchSet, or a list of a sample's PatchSets; the pipeline re-reads and
        re-processes them; the packer knows no decoding)."""
        entries = [(str(url), int(index), int(waited)) for url, index, waited in state["pending"]]
        items = list(materialise([(url, index) for url, index, _ in entries])) if entries else []
        self.restore(items, [waited for _, _, waited in entries])

    def _sync(self) -> None:
        if len(self._arrived) != len(self.pending):  # pending was set directly: count from now
            self._arrived = (self._arrived + [self.emitted] * len(self.pending))[: len(self.pending)]

    @property
    def pending_tokens(self) -> int:
        return sum(p.num_tokens for p in self.pending)

    def push(self, item: PatchSet | Sample | Sequence[PatchSet]) -> list[PackedBatch]:
        """Add one sample (a PatchSet, or a list of one sample's PatchSets); returns the batches that
        became ready (zero or one)."""
        item = as_unit(item)
        if item.num_tokens > self.seq_len:
            raise ValueError(
                f"image {item.key!r} has {item.num_tokens} tokens, more than seq_len={self.seq_len}; "
                "lower sizing.max_tokens or raise packing.seq_len"
            )
        if len(images_of(item)) > self.max_images_per_row:
            raise ValueError(f"sample {item.key!r} has {len(images_of(item))} images, more than "
                             f"max_images_per_row={self.max_images_per_row}; raise packing.max_images_per_row")
        self._sync()
        self.pending.append(item)
        self._arrived.append(self.emitted)
        if len(self.pending) >= self.buffer and self.pending_tokens >= self.rows * self.seq_len:
            return [self._assemble()]
        return []

    def flush(self) -> Iterator[PackedBatch]:
        """Pack everything still waiting, in as many fixed-shape batches as it takes.

        Lazy: each batch is assembled when asked for, so `pending` always holds exactly the images
        not yet handed out (a resume state saved between flush batches stays exact)."""
        while self.pending:
            yield self._assemble()

    def _assemble(self) -> PackedBatch:
        self._sync()
        items, sizes = self.pending, [p.num_tokens for p in self.pending]
        assignment, left = assign_rows(sizes, seq_len=self.seq_len, rows=self.rows,
                                       max_images_per_row=self.max_images_per_row, algorithm=self.algorithm,
                                       waited=[self.emitted - a for a in self._arrived],
                                       counts=[len(images_of(u)) for u in items])
        batch = build_batch(items, assignment, seq_len=self.seq_len, max_images_per_row=self.max_images_per_row)
        self.pending = [items[i] for i in left]
        self._arrived = [self._arrived[i] for i in left]
        self.emitted += 1
        return batch
