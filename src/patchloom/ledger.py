"""The ledger: counts of samples read, emitted and skipped (with reasons) and of shards read and
failed, its bounded resume state, and the guards that judge it (too much lost, an empty epoch)."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

from .image.chain import SkipRatioError
from .read import SourceError

@dataclass(slots=True)
class Skip:
    """A sample (or the rest of a shard) that was not emitted, and why."""

    shard: str
    key: str
    stage: str
    reason: str


#: A Ledger keeps this many example keys per skip reason, this many distinct reasons (the rest are
#: counted under OTHER_REASONS) and this many shard failures by name in its resume state, so the
#: state stays a few KB however many samples or shards fail.
EXAMPLES_PER_REASON = 2
MAX_REASONS = 32
OTHER_REASONS = "other reasons"
SHARD_ERRORS_KEPT = 20


@dataclass(slots=True)
class Ledger:
    """Counts of samples read, emitted and skipped, and of shards read and failed.

    `read == emitted + skipped_count + in_buffer` at every point, across resumes. The counts, the
    skip reasons (counted, with a few example keys each) and the first SHARD_ERRORS_KEPT shard
    failures make the resume state, whose size is bounded. `skipped` lists in full the skips this
    process saw since it started or resumed (for the `--ledger` JSON-lines file); `shard_errors`
    lists the shard failures it knows by name.
    """

    read: int = 0
    emitted: int = 0  # samples (a multi-image sample counts once)
    images_emitted: int = 0  # images of the emitted samples (equals emitted with one image a sample)
    skipped: list[Skip] = field(default_factory=list)
    shard_errors: list[Skip] = field(default_factory=list)
    repeated: int = 0  # reads in top-up passes of an equalised epoch (also counted in `read`)
    skipped_count: int = 0  # all skips, including those before a resume (len(skipped) may be less)
    skip_counts: dict[str, int] = field(default_factory=dict)
    skip_examples: dict[str, list[str]] = field(default_factory=dict)
    shards_planned: int = 0  # shard tasks in one pass of this reader's epoch
    shards_read: int = 0  # shard tasks opened in the first pass (failed ones included)
    shards_failed: int = 0  # shard tasks that failed in the first pass
    texts_truncated: int = 0  # emitted samples whose text had more than text.max_tokens tokens (text_encoder)

    @property
    def in_buffer(self) -> int:
        return self.read - self.emitted - self.skipped_count

    def add_skip(self, s: Skip) -> None:
        """Count one skipped sample under its reason and keep it in the in-memory list."""
        self.skipped.append(s)
        self.skipped_count += 1
        reason = f"{s.stage}: {gist(s.reason)}"
        if reason not in self.skip_counts and len(self.skip_counts) >= MAX_REASONS:
            reason = OTHER_REASONS
        self.skip_counts[reason] = self.skip_counts.get(reason, 0) + 1
        names = self.skip_examples.setdefault(reason, [])
        if len(names) < EXAMPLES_PER_REASON:
            names.append(f"{s.key} ({s.shard.rsplit('/', 1)[-1]})")

    def add_shard_error(self, s: Skip, *, counted: bool = True) -> None:
        """Record a failed shard; `counted` ones (first pass) count toward the skip guard."""
        self.shard_errors.append(s)
        if counted:
            self.shards_failed += 1

    def reasons(self) -> dict[str, int]:
        """Skipped samples counted by stage and the gist of their cause."""
        return dict(self.skip_counts)

    def examples(self, per_reason: int = EXAMPLES_PER_REASON) -> dict[str, list[str]]:
        """A few `key (shard)` examples for each reason, so a user can go and look."""
        return {k: v[:per_reason] for k, v in self.skip_examples.items()}

    def shard_reasons(self, first: int = 3) -> list[str]:
        """The first few failed shards as 'url: reason' lines."""
        return [s.shard + ": " + s.reason for s in self.shard_errors[:first]]

    def to_dict(self) -> dict[str, Any]:
        return {
            "read": self.read,
            "emitted": self.emitted,
            "images_emitted": self.images_emitted,
            "skipped": self.skipped_count,
            "in_buffer": self.in_buffer,
            "skip_reasons": self.reasons(),
            "skip_examples": self.examples(),
            "shard_errors": [s.shard + ": " + s.reason for s in self.shard_errors],
            "repeated": self.repeated,
            "shards_read": self.shards_read,
            "shards_failed": self.shards_failed,
            "texts_truncated": self.texts_truncated,
        }

    def write_jsonl(self, path: str) -> None:
        """One JSON line per skipped sample this process saw (a quarantine list), one per failed
        shard, then one summary line (whose counts include skips from before a resume)."""
        with open(path, "w", encoding="utf-8") as f:
            for s in self.skipped:
                f.write(json.dumps({"shard": s.shard, "key": s.key, "stage": s.stage, "reason": s.reason}) + "\n")
            for s in self.shard_errors:
                f.write(json.dumps({"shard": s.shard, "key": None, "stage": s.stage, "reason": s.reason}) + "\n")
            f.write(json.dumps({"summary": self.to_dict()}) + "\n")

    def state_dict(self) -> dict[str, Any]:
        """The counts as JSON-able data of bounded size (for resume): no per-sample list."""
        return {
            "read": self.read, "emitted": self.emitted, "images_emitted": self.images_emitted,
            "repeated": self.repeated,
            "skipped": self.skipped_count,
            "skip_reasons": dict(self.skip_counts),
            "skip_examples": {k: list(v) for k, v in self.skip_examples.items()},
            "shards_planned": self.shards_planned, "shards_read": self.shards_read,
            "shards_failed": self.shards_failed,
            "shard_errors": [[s.shard, s.stage, s.reason] for s in self.shard_errors[:SHARD_ERRORS_KEPT]],
            "texts_truncated": self.texts_truncated,
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Continue the counts of `state_dict()`; the in-memory skip list starts empty."""
        self.read, self.emitted = int(state["read"]), int(state["emitted"])
        self.images_emitted = int(state.get("images_emitted", self.emitted))  # older states: one image a sample
        self.repeated, self.skipped_count = int(state["repeated"]), int(state["skipped"])
        self.skipped = []
        self.skip_counts = {str(k): int(v) for k, v in state["skip_reasons"].items()}
        self.skip_examples = {str(k): [str(e) for e in v] for k, v in state["skip_examples"].items()}
        self.shards_planned, self.shards_read = int(state["shards_planned"]), int(state["shards_read"])
        self.shards_failed = int(state["shards_failed"])
        self.texts_truncated = int(state.get("texts_truncated", 0))  # absent in states saved before texts
        self.shard_errors = [Skip(str(url), "", str(stage), str(reason)) for url, stage, reason in state["shard_errors"]]

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> Ledger:
        """A new ledger that continues the counts of `state_dict()` (see load_state_dict)."""
        led = cls()
        led.load_state_dict(state)
        return led

    @classmethod
    def merged(cls, ledgers: list[Ledger]) -> Ledger:
        """One ledger summing several readers' (the DataLoader workers of one rank)."""
        out = cls()
        for led in ledgers:
            out.read += led.read
            out.emitted += led.emitted
            out.images_emitted += led.images_emitted
            out.repeated += led.repeated
            out.skipped_count += led.skipped_count
            out.skipped.extend(led.skipped)
            out.shards_planned += led.shards_planned
            out.shards_read += led.shards_read
            out.shards_failed += led.shards_failed
            out.texts_truncated += led.texts_truncated
            out.shard_errors.extend(led.shard_errors)
            for key, n in led.skip_counts.items():
                full = key not in out.skip_counts and len(out.skip_counts) >= MAX_REASONS
                reason = OTHER_REASONS if full else key
                out.skip_counts[reason] = out.skip_counts.get(reason, 0) + n
                names = out.skip_examples.setdefault(reason, [])
                names.extend(led.skip_examples.get(key, [])[: EXAMPLES_PER_REASON - len(names)])
        return out


def gist(reason: str) -> str:
    """'DecodeError: truncated image data (OSError: ...); ...' -> 'truncated image data'."""
    head, sep, rest = reason.partition(": ")
    text = rest if sep and head.isidentifier() else reason
    for stop in (" (", "; ", ": "):
        text = text.split(stop, 1)[0]
    return text.strip()[:80]


SKIP_RATIO_MIN_READ = 100


class EmptyEpochError(SourceError):
    """An epoch yielded no samples at all: the message says what was found (shards, failures, reads)."""


def check_skip_guard(led: Ledger, limit: float | None, *, final: bool) -> None:
    """Raise SkipRatioError when too much of the data was lost (`source.max_skip_ratio`).

    Samples and shards are judged separately, and either share over the limit trips the guard:
    - samples: skipped / read > limit, once SKIP_RATIO_MIN_READ samples are read (a ratio of a
      handful says little);
    - shards: failed / opened > limit at the end of the epoch (`final`), and earlier as soon as the
      failures alone exceed limit x the shards in the epoch (the verdict can no longer change, so
      the rest is not read for nothing). A failed shard loses all its samples, unread and uncounted,
      so it is weighed as a shard, not folded into the sample share.
    """
    if limit is None:
        return
    if led.read >= SKIP_RATIO_MIN_READ and led.skipped_count / led.read > limit:
        ratio = led.skipped_count / led.read
        reasons = ", ".join(f"{n} x {k}" for k, n in sorted(led.reasons().items(), key=lambda kv: -kv[1]))
        raise SkipRatioError(
            f"{led.skipped_count} of {led.read} samples skipped ({100 * ratio:.1f} %), over "
            f"source.max_skip_ratio={limit}: {reasons}. Fix the shards, or raise max_skip_ratio "
            "(null turns the check off) if this is expected"
        )
    if not led.shards_failed:
        return
    over = led.shards_failed > limit * led.shards_read
    certain = led.shards_failed > limit * led.shards_planned
    if (final and over) or certain:
        ratio = led.shards_failed / max(led.shards_read, 1)
        named = "; ".join(led.shard_reasons(5))
        more = led.shards_failed - min(len(led.shard_errors), 5)
        early = "" if final or led.shards_read >= led.shards_planned else (
            f" (stopped after {led.shards_read} of {led.shards_planned} shards: the rest cannot bring the "
            "share under the limit)")
        raise SkipRatioError(
            f"{led.shards_failed} of {led.shards_read} shards failed ({100 * ratio:.1f} %), over "
            f"source.max_skip_ratio={limit}{early}: {named}" + (f"; and {more} more" if more > 0 else "")
            + ". Fix or remove those shards, or raise max_skip_ratio (null turns the check off) if this is expected"
        )


def check_not_empty(led: Ledger, *, shards: int, where: str) -> None:
    """Raise EmptyEpochError when no sample came through an epoch (read minus skipped is zero)."""
    if led.read - led.skipped_count > 0:
        return
    failed = ""
    if led.shards_failed:
        failed = f", {led.shards_failed} failed ({'; '.join(led.shard_reasons(3))})"
    skipped = ""
    if led.skipped_count:
        reasons = ", ".join(f"{n} x {k}" for k, n in sorted(led.reasons().items(), key=lambda kv: -kv[1]))
        skipped = f", all skipped ({reasons})"
    if led.shards_failed or led.skipped_count:
        advice = "fix or replace what failed (above), or point source.shards at other shards"
    else:
        advice = "the shards hold no samples: check source.shards"
    raise EmptyEpochError(
        f"{where} yielded no samples: {shards} shards, {led.shards_read} opened{failed}; "
        f"{led.read} samples read{skipped}. An empty epoch is an error: {advice}"
    )


