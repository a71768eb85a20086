"""Flags: the things in a run that look wrong, found by plain rules over the collected numbers.

Each rule is a function of plain inputs (ImageFacts, the ledger dict, per-row padding) so tests can
feed it crafted cases. Thresholds are module constants and appear in the messages.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from .collect import ImageFacts

#: An image resized up by more than this factor (long side of its crop) is flagged.
UPSCALE_LIMIT = 4.0
#: A grid whose aspect is off the (cropped) source's by more than this |log| ratio is flagged.
ASPECT_ERROR_LIMIT = 0.1
#: A packed row with more than this share of padding tokens is flagged.
ROW_PADDING_LIMIT = 0.10
#: Example keys listed with a flag.
EXAMPLES = 3


@dataclass(slots=True, frozen=True)
class Flag:
    """One finding: a short code, a sentence, how many things it concerns, a few examples."""

    code: str
    message: str
    count: int
    examples: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["examples"] = list(self.examples)
        return d


def _worst(images: Sequence[ImageFacts], value, limit: float) -> list[ImageFacts]:
    hits = [im for im in images if value(im) > limit]
    return sorted(hits, key=value, reverse=True)


def image_flags(images: Sequence[ImageFacts], *, upscale: float = UPSCALE_LIMIT,
                aspect_error: float = ASPECT_ERROR_LIMIT) -> list[Flag]:
    """Upscaled images and grids whose aspect is off, over every image the chain made."""
    out = []
    n = len(images)
    up = _worst(images, lambda im: im.scale, upscale)
    if up:
        out.append(Flag(
            "upscale",
            f"{len(up)} of {n} images are upscaled more than {upscale:g}x "
            f"(largest {up[0].scale:.1f}x: {up[0].name}, {up[0].height}×{up[0].width} source)",
            len(up), tuple(f"{im.name} {im.scale:.1f}x" for im in up[:EXAMPLES]),
        ))
    off = _worst(images, lambda im: im.aspect_error, aspect_error)
    if off:
        out.append(Flag(
            "aspect",
            f"{len(off)} of {n} images get a grid whose aspect is off by more than {aspect_error:g} "
            f"(log units; worst {off[0].aspect_error:.3f}: {off[0].name}, "
            f"{off[0].height}×{off[0].width} -> {off[0].grid_h}×{off[0].grid_w} patches, h×w)",
            len(off), tuple(f"{im.name} {im.aspect_error:.3f}" for im in off[:EXAMPLES]),
        ))
    return out


def padding_flag(row_padding: np.ndarray, *, rows_in_last_batch: int = 0,
                 limit: float = ROW_PADDING_LIMIT) -> list[Flag]:
    """Rows with more than `limit` padding; says how many of them the epoch's last batch holds
    (the end-of-epoch flush packs whatever is left, so it is often part-empty)."""
    pad = np.asarray(row_padding, dtype=float)
    over = np.flatnonzero(pad > limit)
    if over.size == 0:
        return []
    tail = int(np.count_nonzero(over >= pad.size - rows_in_last_batch)) if rows_in_last_batch else 0
    where = f"; {tail} of them in the epoch's last batch" if tail else ""
    return [Flag(
        "padding",
        f"{over.size} of {pad.size} packed rows are more than {100 * limit:g} % padding "
        f"(worst {100 * pad.max():.0f} %{where})",
        int(over.size), tuple(f"row {int(i)}: {100 * pad[i]:.0f} %" for i in over[:EXAMPLES]),
    )]


def ledger_flags(ledger: dict[str, Any]) -> list[Flag]:
    """Skipped samples (by reason, with example keys) and shards that failed to read."""
    out = []
    skipped = int(ledger.get("skipped", 0))
    if skipped:
        reasons = ledger.get("skip_reasons", {})
        examples = ledger.get("skip_examples", {})
        parts = [f"{n} x {r}" for r, n in sorted(reasons.items(), key=lambda kv: -kv[1])]
        eg = tuple(k for r in reasons for k in examples.get(r, []))[:EXAMPLES]
        out.append(Flag("skipped", f"{skipped} of {ledger.get('read', 0)} samples skipped: " + "; ".join(parts),
                        skipped, eg))
    errors = list(ledger.get("shard_errors", []))
    if errors:
        out.append(Flag("shard_error", f"{len(errors)} shards failed part-way: the rest of each is not read",
                        len(errors), tuple(errors[:EXAMPLES])))
    return out


def determinism_flags(mismatched: Sequence[str], identical: bool | None) -> list[Flag]:
    """Traced samples whose tokens differ from the pass's, or a repeat that is not identical."""
    out = []
    if mismatched:
        out.append(Flag("determinism", f"{len(mismatched)} traced samples did not reproduce the tokens the "
                        "pipeline made for them (same recipe, epoch and key)", len(mismatched),
                        tuple(mismatched[:EXAMPLES])))
    if identical is False:
        out.append(Flag("determinism", "the same sample under the same epoch twice is not pixel-identical", 1))
    return out


def find_flags(*, images: Sequence[ImageFacts], ledger: dict[str, Any], row_padding: np.ndarray,
               rows_in_last_batch: int = 0, mismatched: Sequence[str] = (),
               identical: bool | None = None) -> list[Flag]:
    """Every rule, in the order the report lists them."""
    return (ledger_flags(ledger) + image_flags(images)
            + padding_flag(row_padding, rows_in_last_batch=rows_in_last_batch)
            + determinism_flags(mismatched, identical))
