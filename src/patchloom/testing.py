"""Test helpers shipped with the library, for users who build their own recipes and loaders."""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from .packing.batch import PackedBatch
from .pipeline import Pipeline


@dataclass(slots=True)
class ResumeReport:
    """What `check_resume` checked: positions, state sizes and the time resume cost."""

    batches: int
    positions: list[int] = field(default_factory=list)
    state_bytes: list[int] = field(default_factory=list)
    state_seconds: list[float] = field(default_factory=list)
    load_seconds: list[float] = field(default_factory=list)
    full_seconds: float = 0.0


def batches_equal(a: PackedBatch, b: PackedBatch) -> str | None:
    """None if two batches are identical byte for byte, else the name of the first field that differs."""
    if a.keys != b.keys:
        return "keys"
    if a.texts != b.texts:
        return "texts"
    for name in ("text_tokens", "text_lengths"):
        x, y = getattr(a, name), getattr(b, name)
        if (x is None) != (y is None) or (x is not None and (x.shape != y.shape or x.tobytes() != y.tobytes())):
            return name
    for name, x in a.to_arrays().items():
        y = b.to_arrays().get(name)
        if y is None or x.dtype != y.dtype or x.shape != y.shape or x.tobytes() != y.tobytes():
            return name
    if set(b.to_arrays()) != set(a.to_arrays()):
        return "masked"
    return None


#: The ledger counts a resumed run must end with exactly as the uninterrupted run did.
LEDGER_COUNTS = ("read", "emitted", "skipped", "in_buffer", "repeated", "skip_reasons", "shards_read",
                 "shards_failed", "texts_truncated")


def check_ledger_balance(pipe: Pipeline, where: str) -> None:
    """Assert `read == emitted + skipped + in_buffer` for a pipeline between batches."""
    led = pipe.ledger
    if led.read != led.emitted + led.skipped_count + pipe.in_buffer:
        raise AssertionError(
            f"{where}: ledger does not balance: read {led.read} != emitted {led.emitted} + skipped "
            f"{led.skipped_count} + in buffer {pipe.in_buffer}"
        )


def ledger_counts(pipe: Pipeline) -> dict:
    """The counts of a pipeline's ledger that a resume must reproduce."""
    d = pipe.ledger.to_dict()
    return {k: d[k] for k in LEDGER_COUNTS}


def check_same_counts(got: dict, want: dict, where: str) -> None:
    """Assert two ledger_counts() are equal, naming the first count that differs."""
    if got != want:
        diff = next(k for k in LEDGER_COUNTS if got[k] != want[k])
        raise AssertionError(f"{where}: the ledger has {diff}={got[diff]!r}, the full run had {want[diff]!r}")


def check_resume(make_pipeline: Callable[[], Pipeline], *, every: int = 1) -> ResumeReport:
    """Run a pipeline through, then restore from its state at every `every`-th batch (from 0 to the
    end, inclusive) in a fresh pipeline and require the rest to match byte for byte.

    The ledger must balance (`read == emitted + skipped + in_buffer`) after every batch of every
    run, and after each batch a resumed run's ledger counts must equal the uninterrupted run's after
    the same batch (so a resume that loses or double-counts reads, skips or emitted samples is
    caught where it happens), and at the end too. The state goes
    through JSON on the way, as it would in a checkpoint. Raises AssertionError naming the position,
    batch and field (or ledger count) of the first difference.
    """
    if every < 1:
        raise ValueError("every must be >= 1")
    pipe = make_pipeline()
    full: list[PackedBatch] = []
    counts_after: list[dict] = []  # the full run's ledger counts after each batch
    states: dict[int, str] = {}
    report = ResumeReport(batches=0)
    t0 = time.perf_counter()
    states[0] = json.dumps(pipe.state_dict())
    for batch in pipe:
        full.append(batch)
        check_ledger_balance(pipe, f"full run, batch {len(full) - 1}")
        counts_after.append(ledger_counts(pipe))
        if len(full) % every == 0:
            t = time.perf_counter()
            states[len(full)] = json.dumps(pipe.state_dict())
            report.state_seconds.append(time.perf_counter() - t)
    states[len(full)] = json.dumps(pipe.state_dict())
    check_ledger_balance(pipe, "full run, end")
    final = ledger_counts(pipe)
    report.full_seconds = time.perf_counter() - t0
    report.batches = len(full)
    for pos, text in sorted(states.items()):
        resumed = make_pipeline()
        t = time.perf_counter()
        resumed.load_state_dict(json.loads(text))
        it = iter(resumed)
        rest = []
        first = next(it, None)
        report.load_seconds.append(time.perf_counter() - t)
        if first is not None:
            rest.append(first)
            check_ledger_balance(resumed, f"resumed at batch {pos}, batch {pos}")
            if pos < len(counts_after):
                check_same_counts(ledger_counts(resumed), counts_after[pos], f"resumed at batch {pos}, batch {pos}")
            for batch in it:
                rest.append(batch)
                at = pos + len(rest) - 1
                check_ledger_balance(resumed, f"resumed at batch {pos}, batch {at}")
                if at < len(counts_after):
                    check_same_counts(ledger_counts(resumed), counts_after[at], f"resumed at batch {pos}, batch {at}")
        check_ledger_balance(resumed, f"resumed at batch {pos}, end")
        if len(rest) != len(full) - pos:
            raise AssertionError(
                f"resumed at batch {pos}: got {len(rest)} more batches, the full run had {len(full) - pos}"
            )
        for i, (a, b) in enumerate(zip(rest, full[pos:])):
            diff = batches_equal(a, b)
            if diff is not None:
                raise AssertionError(f"resumed at batch {pos}: batch {pos + i} differs in {diff}")
        counts = ledger_counts(resumed)
        if counts != final:
            diff = next(k for k in LEDGER_COUNTS if counts[k] != final[k])
            raise AssertionError(
                f"resumed at batch {pos}: the ledger ends with {diff}={counts[diff]!r}, the full run "
                f"with {final[diff]!r}"
            )
        report.positions.append(pos)
        report.state_bytes.append(len(text))
    return report


def assert_arrays_equal(a: PackedBatch, b: PackedBatch) -> None:
    """numpy-style assertion of batch equality, for use in tests."""
    diff = batches_equal(a, b)
    if diff is not None:
        raise AssertionError(f"batches differ in {diff}: {np.asarray(a.to_arrays().get(diff, []))!r:.200}")
