"""PackedBatch: B fixed-length rows of patch tokens from several images, with segment ids and coords.

Helpers derive what attention kernels and losses need: a block-diagonal mask, cu_seqlens for
variable-length kernels, per-image token counts and a per-image mean pool.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np


@dataclass(slots=True, eq=False)  # arrays inside: compare fields explicitly
class PackedBatch:
    """B rows of length L, at most S images a row. Segment id 0 is padding, 1..k the row's images."""

    patches: np.ndarray  # [B, L, D]
    segment_ids: np.ndarray  # [B, L] int32
    coords: np.ndarray  # [B, L, 2] int32
    grids: np.ndarray  # [B, S, 2] int32
    labels: np.ndarray  # [B, S] int64
    keys: list[list[str]] = field(default_factory=list)
    masked: np.ndarray | None = None  # [B, L] bool, True = token hidden (drop output: mask); else None
    texts: list[list[str]] = field(default_factory=list)  # like keys: each segment's text, "" if none
    # With a text_encoder (packing/text.py): int32 [B, S, T] token ids padded with 0 after each text's
    # text_lengths int32 [B, S] tokens (0 where no image); else None.
    text_tokens: np.ndarray | None = None
    text_lengths: np.ndarray | None = None
    # int32 [B, S]: each segment's sample, 1-based within its row (0 where absent); the images of a
    # multi-image sample share one and are adjacent. None when built: one sample per segment.
    groups: np.ndarray | None = None
    # With a temporal recipe (clips, or sizing.temporal_patch > 1): times int32 [B, L], the temporal
    # slice of each token (0 for images and padding), and frames int32 [B, S], the slices of each
    # segment (1 for an image, 0 where absent). Both None otherwise.
    times: np.ndarray | None = None
    frames: np.ndarray | None = None

    def __post_init__(self) -> None:
        if (self.times is None) != (self.frames is None):
            raise ValueError("times and frames come together: give both or neither")
        if self.groups is None:  # built without groups: every segment is its own sample
            slots = np.arange(1, self.grids.shape[1] + 1, dtype=np.int32)
            self.groups = np.where(self.grids[..., 0] > 0, slots, 0).astype(np.int32)
        if not self.texts:  # built without texts: every segment has none
            self.texts = [[""] * len(row) for row in self.keys]
        elif [len(t) for t in self.texts] != [len(k) for k in self.keys]:
            raise ValueError(f"texts must hold one string per segment, like keys (got rows of "
                             f"{[len(t) for t in self.texts]} texts for {[len(k) for k in self.keys]} keys)")

    @property
    def rows(self) -> int:
        return int(self.segment_ids.shape[0])

    @property
    def seq_len(self) -> int:
        return int(self.segment_ids.shape[1])

    @property
    def max_images(self) -> int:
        return int(self.grids.shape[1])

    @property
    def num_images(self) -> int:
        return sum(len(k) for k in self.keys)

    @property
    def num_samples(self) -> int:
        """Samples in the batch (a multi-image sample counts once): the highest group of each row, summed."""
        return int(self.groups.max(axis=1, initial=0).sum())

    @property
    def num_tokens(self) -> int:
        """Real (non-padding) tokens in the batch."""
        return int(np.count_nonzero(self.segment_ids))

    @property
    def padding_fraction(self) -> float:
        return 1.0 - self.num_tokens / self.segment_ids.size

    def attention_mask(self, *, padding_attends_self: bool = False) -> np.ndarray:
        """bool [B, L, L]: token i may attend to token j iff both belong to the same image.

        Padding attends to nothing. A query row with no allowed key gives NaN in softmax attention
        (e.g. torch's scaled_dot_product_attention); pass padding_attends_self=True to let each
        padding token attend to itself only, which keeps every output finite.
        """
        seg = self.segment_ids
        mask = (seg[:, :, None] == seg[:, None, :]) & (seg[:, :, None] > 0)
        if padding_attends_self:
            pad = seg == 0
            idx = np.arange(seg.shape[1])
            mask[:, idx, idx] |= pad
        return mask

    def cu_seqlens(self) -> np.ndarray:
        """int32 offsets over the flattened [B*L] tokens: each image one segment, each row's padding
        tail its own segment. Starts at 0, ends at B*L, one more entry than segments."""
        flat = self.segment_ids.reshape(-1)
        n = flat.size
        length = self.seq_len
        pos = np.arange(n)
        start = (pos % length == 0) | np.concatenate([[True], flat[1:] != flat[:-1]])
        return np.concatenate([np.flatnonzero(start), [n]]).astype(np.int32)

    @property
    def max_seqlen(self) -> int:
        """Longest segment in cu_seqlens(), as a Python int (kernels take it as a host scalar)."""
        return int(np.diff(self.cu_seqlens()).max())

    def cu_seqlens_fixed(self) -> np.ndarray:
        """cu_seqlens() padded to a fixed length B*(S+1)+1 by repeating B*L (empty trailing segments),
        so compiled steps see the same shape every batch."""
        cu = self.cu_seqlens()
        size = self.rows * (self.max_images + 1) + 1
        if cu.size > size:
            raise ValueError(f"batch has {cu.size - 1} segments, more than the fixed {size - 1}")
        out = np.full(size, cu[-1], dtype=np.int32)
        out[: cu.size] = cu
        return out

    def segment_lengths(self) -> np.ndarray:
        """int32 [B, S]: tokens of each image (0 where absent), e.g. to normalise a per-image loss."""
        s = self.max_images
        onehot = self.segment_ids[:, :, None] == np.arange(1, s + 1, dtype=self.segment_ids.dtype)
        return onehot.sum(axis=1).astype(np.int32)

    def pool(self, features: np.ndarray) -> np.ndarray:
        """Mean of token features [B, L, F] over each image -> [B, S, F] (zeros where absent)."""
        if features.shape[:2] != self.segment_ids.shape:
            raise ValueError(f"features must be [B, L, F] = {self.segment_ids.shape} + (F,), got {features.shape}")
        s = self.max_images
        onehot = (self.segment_ids[:, :, None] == np.arange(1, s + 1)).astype(np.float32)
        sums = np.einsum("bls,blf->bsf", onehot, features.astype(np.float32, copy=False))
        counts = onehot.sum(axis=1)[..., None]
        return sums / np.maximum(counts, 1.0)

    def to_torch(self) -> dict[str, Any]:
        """The arrays as torch tensors (sharing memory where possible) plus the keys and texts lists
        (text_tokens and text_lengths are None without a text encoder, like masked without a mask, and
        times and frames without a temporal recipe)."""
        import torch

        return {
            "patches": torch.from_numpy(self.patches),
            "segment_ids": torch.from_numpy(self.segment_ids),
            "coords": torch.from_numpy(self.coords),
            "grids": torch.from_numpy(self.grids),
            "labels": torch.from_numpy(self.labels),
            "groups": torch.from_numpy(self.groups),
            "keys": self.keys,
            "masked": None if self.masked is None else torch.from_numpy(self.masked),
            "texts": self.texts,
            "text_tokens": None if self.text_tokens is None else torch.from_numpy(self.text_tokens),
            "text_lengths": None if self.text_lengths is None else torch.from_numpy(self.text_lengths),
            "times": None if self.times is None else torch.from_numpy(self.times),
            "frames": None if self.frames is None else torch.from_numpy(self.frames),
        }

    def to_arrays(self) -> dict[str, np.ndarray]:
        """The arrays by name (a pre-packed shard stores those in store.format.ARRAYS)."""
        return {
            "patches": self.patches,
            "segment_ids": self.segment_ids,
            "coords": self.coords,
            "grids": self.grids,
            "labels": self.labels,
            "groups": self.groups,
            **({"masked": self.masked} if self.masked is not None else {}),
            **({"times": self.times, "frames": self.frames} if self.times is not None else {}),
        }
