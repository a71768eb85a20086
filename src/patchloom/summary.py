"""Run statistics gathered from the batches a pipeline yields, and their terminal table."""

from __future__ import annotations

import re
import time
from dataclasses import dataclass, field

import numpy as np

from .packing.batch import PackedBatch


@dataclass(slots=True)
class RunStats:
    """Accumulates what users check first: images, tokens per image, padding, images per row, speed."""

    batches: int = 0
    images: int = 0
    slots: int = 0  # B * L summed over batches
    tokens: list[np.ndarray] = field(default_factory=list)
    images_per_row: list[np.ndarray] = field(default_factory=list)
    started: float = field(default_factory=time.perf_counter)
    elapsed: float = 0.0

    def add(self, batch: PackedBatch) -> None:
        lengths = batch.segment_lengths()
        self.batches += 1
        self.images += batch.num_images
        self.slots += batch.segment_ids.size
        self.tokens.append(lengths[lengths > 0])
        self.images_per_row.append((lengths > 0).sum(axis=1))
        self.elapsed = time.perf_counter() - self.started

    def to_dict(self) -> dict[str, float | int]:
        tokens = np.concatenate(self.tokens) if self.tokens else np.zeros(0)
        per_row = np.concatenate(self.images_per_row) if self.images_per_row else np.zeros(0)
        real = int(tokens.sum())
        return {
            "batches": self.batches,
            "images": self.images,
            "tokens_mean": float(tokens.mean()) if tokens.size else 0.0,
            "tokens_p5": float(np.percentile(tokens, 5)) if tokens.size else 0.0,
            "tokens_p95": float(np.percentile(tokens, 95)) if tokens.size else 0.0,
            "padding_pct": 100.0 * (1 - real / self.slots) if self.slots else 0.0,
            "images_per_row": float(per_row.mean()) if per_row.size else 0.0,
            "seconds": self.elapsed,
            "images_per_s": self.images / self.elapsed if self.elapsed > 0 else 0.0,
        }


#: Failed shards the summary names one by one; the rest are counted (the --ledger file lists all).
SHARD_ERRORS_SHOWN = 3


def format_table(stats: RunStats, ledger: dict, *, title: str = "patchloom run") -> str:
    """The summary block printed by `patchloom run` and `patchloom demo` (ledger: Ledger.to_dict())."""
    s = stats.to_dict()
    errors = list(ledger.get("shard_errors", []))
    failed = int(ledger.get("shards_failed", len(errors)))
    opened = ledger.get("shards_read")
    rows = [
        ("images read", f"{ledger['read']}"),
        ("images emitted", f"{ledger['emitted']}" + (  # multi-image samples: read/emitted/skipped count samples
            f" samples, {ledger['images_emitted']} images"
            if ledger.get("images_emitted", ledger["emitted"]) != ledger["emitted"] else "")),
        ("images skipped", f"{ledger['skipped']}"),
        *([("images in buffer", f"{ledger['in_buffer']} (read, not yet packed: the run stopped early)")]
          if ledger.get("in_buffer") else []),
        ("shards failed", f"{failed}" + (f" of {opened}" if opened else "")),
        ("batches", f"{s['batches']}"),
        ("tokens / image", f"mean {s['tokens_mean']:.1f}  p5 {s['tokens_p5']:.0f}  p95 {s['tokens_p95']:.0f}"),
        ("padding", f"{s['padding_pct']:.1f} %"),
        ("images / row", f"{s['images_per_row']:.2f}"),
        ("throughput", f"{s['images_per_s']:.1f} images/s ({s['seconds']:.2f} s)"),
    ]
    width = max(len(k) for k, _ in rows)
    lines = [title, "-" * len(title)]
    lines += [f"  {k:<{width}}  {v}" for k, v in rows]
    examples = ledger.get("skip_examples", {})
    for reason, n in sorted(ledger.get("skip_reasons", {}).items()):
        eg = ", ".join(examples.get(reason, []))
        lines.append(f"  {'skipped':<{width}}  {n} x {reason}" + (f"  (e.g. {eg})" if eg else ""))
    for err in errors[:SHARD_ERRORS_SHOWN]:
        lines.append(f"  {'shard error':<{width}}  {err}")
    if len(errors) > SHARD_ERRORS_SHOWN:
        lines.append(f"  {'':<{width}}  and {len(errors) - SHARD_ERRORS_SHOWN} more (--ledger FILE lists them all)")
    return "\n".join(printable(line) for line in lines)


_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f]")


def printable(text: str) -> str:
    """Control characters (sample keys and shard names come from untrusted tars) escaped, so a
    key cannot move the cursor, retitle the terminal or clear the screen when printed."""
    return _CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}", text)
