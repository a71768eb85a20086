"""Text tokens of a packed batch: each segment's text through the caller's encoder, in fixed shapes.

The encoder is code, `fn(str) -> list[int]` (any tokenizer), passed to `Pipeline`, the torch dataset
or `read_packed`; a recipe never names it. `text.max_tokens` (T) fixes the shape: `text_tokens` is
int32 [B, S, T], `text_lengths` int32 [B, S]. A text longer than T keeps its first T tokens and is
counted as truncated (the ledger's `texts_truncated`); the rest of a slot is TEXT_PAD_ID (0), so
read a text's end from `text_lengths`, not from the pad value. Every image's text is encoded, ""
included (a sample without text gets `fn("")`); a slot without an image has length 0.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from .batch import PackedBatch

__all__ = ["TEXT_PAD_ID", "TextEncoder", "TextTokens", "add_text_tokens", "encode_texts"]

#: A text encoder: one string -> its token ids (any tokenizer; must be picklable for DataLoader workers).
TextEncoder = Callable[[str], Sequence[int]]
#: The value after each text's tokens in `text_tokens`.
TEXT_PAD_ID = 0

_INT32 = np.iinfo(np.int32)


@dataclass(slots=True)
class TextTokens:
    """The encoded texts of one batch: what goes into the batch, and which texts were cut."""

    tokens: np.ndarray  # int32 [B, S, T]
    lengths: np.ndarray  # int32 [B, S]
    truncated: np.ndarray  # bool [B, S]: the text had more than T tokens


def _token_ids(encoder: TextEncoder, text: str, key: str) -> np.ndarray:
    """encoder(text) as an int32 vector, refusing what is not a flat list of int32 ids."""
    ids = encoder(text)
    arr = np.asarray(ids)
    if arr.ndim != 1 or (arr.size and arr.dtype.kind not in "iu"):
        raise TypeError(f"text_encoder must return a flat list of int token ids (got {type(ids).__name__} "
                        f"of shape {arr.shape}, dtype {arr.dtype}, for the text of sample {key!r})")
    if arr.size and (int(arr.min()) < _INT32.min or int(arr.max()) > _INT32.max):
        raise ValueError(f"text_encoder returned token ids outside int32 for the text of sample {key!r} "
                         f"(range {int(arr.min())}..{int(arr.max())})")
    return arr.astype(np.int32, copy=False)


def encode_texts(texts: Sequence[Sequence[str]], encoder: TextEncoder, *, max_tokens: int, max_images: int,
                 keys: Sequence[Sequence[str]] | None = None) -> TextTokens:
    """B rows of per-segment texts -> TextTokens of shape [B, max_images, max_tokens] (head kept).

    A text that occurs several times in the batch is encoded once. `keys` (aligned with `texts`) only
    name the sample in an encoder error."""
    b = len(texts)
    tokens = np.full((b, max_images, max_tokens), TEXT_PAD_ID, dtype=np.int32)
    lengths = np.zeros((b, max_images), dtype=np.int32)
    truncated = np.zeros((b, max_images), dtype=bool)
    seen: dict[str, np.ndarray] = {}
    for r, row in enumerate(texts):
        if len(row) > max_images:
            raise ValueError(f"row {r} holds {len(row)} texts, more than max_images={max_images}")
        for j, text in enumerate(row):
            ids = seen.get(text)
            if ids is None:
                ids = seen[text] = _token_ids(encoder, text, keys[r][j] if keys is not None else f"row {r}, {j}")
            n = min(ids.size, max_tokens)
            tokens[r, j, :n] = ids[:n]
            lengths[r, j] = n
            truncated[r, j] = ids.size > max_tokens
    return TextTokens(tokens, lengths, truncated)


def add_text_tokens(batch: PackedBatch, encoder: TextEncoder, max_tokens: int) -> int:
    """Set `batch.text_tokens` and `batch.text_lengths` from its texts; return how many samples' texts
    were truncated (what the ledger counts)."""
    out = encode_texts(batch.texts, encoder, max_tokens=max_tokens, max_images=batch.max_images, keys=batch.keys)
    batch.text_tokens, batch.text_lengths = out.tokens, out.lengths
    # A sample of several images carries its text on each of them (one group): count it once.
    first = np.ones_like(out.truncated)
    first[:, 1:] = batch.groups[:, 1:] != batch.groups[:, :-1]
    return int(np.count_nonzero(out.truncated & first))
