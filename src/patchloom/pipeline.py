"""Pipeline: compose the stages from a Recipe into an iterator of PackedBatch.

shards -> reader split -> shuffle buffer -> per-sample chain (sample.py) -> Packer -> batches.
Each sample's random draws come from its own generator (seed, epoch, key, stage), so its tokens do
not depend on worker count, order or resume point.
"""

from __future__ import annotations

import json
import logging
import re
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any


from .pack.batch import PackedBatch
from .pack.packer import Packer
from .image.patches import PatchSet
from .recipe.schema import Recipe
from .image.chain import SampleError, SkipRatioError, image_to_patches, process_record
from .seeding import stream_rng
from .read.shards import (
    Record,
    ReaderCursor,
    ShuffleBuffer,
    SourceError,
    describe_identity_change,
    expand_shards,
    fetch_records,
    reader_tasks,
    shard_identity,
)

__all__ = ["EmptyEpochError", "Ledger", "Pipeline", "SampleError", "Skip", "SkipRatioError", "image_to_patches"]


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
    emitted: int = 0
    skipped: list[Skip] = field(default_factory=list)
    shard_errors: list[Skip] = field(default_factory=list)
    repeated: int = 0  # reads in top-up passes of an equalised epoch (also counted in `read`)
    skipped_count: int = 0  # all skips, including those before a resume (len(skipped) may be less)
    skip_counts: dict[str, int] = field(default_factory=dict)
    skip_examples: dict[str, list[str]] = field(default_factory=dict)
    shards_planned: int = 0  # shard tasks in one pass of this reader's epoch
    shards_read: int = 0  # shard tasks opened in the first pass (failed ones included)
    shards_failed: int = 0  # shard tasks that failed in the first pass

    @property
    def in_buffer(self) -> int:
        return self.read - self.emitted - self.skipped_count

    def add_skip(self, s: Skip) -> None:
        """Count one skipped sample under its reason and keep it in the in-memory list."""
        self.skipped.append(s)
        self.skipped_count += 1
        reason = f"{s.stage}: {_gist(s.reason)}"
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
            "skipped": self.skipped_count,
            "in_buffer": self.in_buffer,
            "skip_reasons": self.reasons(),
            "skip_examples": self.examples(),
            "shard_errors": [s.shard + ": " + s.reason for s in self.shard_errors],
            "repeated": self.repeated,
            "shards_read": self.shards_read,
            "shards_failed": self.shards_failed,
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
            "read": self.read, "emitted": self.emitted, "repeated": self.repeated,
            "skipped": self.skipped_count,
            "skip_reasons": dict(self.skip_counts),
            "skip_examples": {k: list(v) for k, v in self.skip_examples.items()},
            "shards_planned": self.shards_planned, "shards_read": self.shards_read,
            "shards_failed": self.shards_failed,
            "shard_errors": [[s.shard, s.stage, s.reason] for s in self.shard_errors[:SHARD_ERRORS_KEPT]],
        }

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> Ledger:
        """A ledger that continues the counts of `state_dict()` (its in-memory skip list starts empty)."""
        return cls(
            read=int(state["read"]), emitted=int(state["emitted"]), repeated=int(state["repeated"]),
            skipped_count=int(state["skipped"]),
            skip_counts={str(k): int(v) for k, v in state["skip_reasons"].items()},
            skip_examples={str(k): [str(e) for e in v] for k, v in state["skip_examples"].items()},
            shards_planned=int(state["shards_planned"]), shards_read=int(state["shards_read"]),
            shards_failed=int(state["shards_failed"]),
            shard_errors=[Skip(str(url), "", str(stage), str(reason)) for url, stage, reason in state["shard_errors"]],
        )

    @classmethod
    def merged(cls, ledgers: list[Ledger]) -> Ledger:
        """One ledger summing several readers' (the DataLoader workers of one rank)."""
        out = cls()
        for led in ledgers:
            out.read += led.read
            out.emitted += led.emitted
            out.repeated += led.repeated
            out.skipped_count += led.skipped_count
            out.skipped.extend(led.skipped)
            out.shards_planned += led.shards_planned
            out.shards_read += led.shards_read
            out.shards_failed += led.shards_failed
            out.shard_errors.extend(led.shard_errors)
            for key, n in led.skip_counts.items():
                full = key not in out.skip_counts and len(out.skip_counts) >= MAX_REASONS
                reason = OTHER_REASONS if full else key
                out.skip_counts[reason] = out.skip_counts.get(reason, 0) + n
                names = out.skip_examples.setdefault(reason, [])
                names.extend(led.skip_examples.get(key, [])[: EXAMPLES_PER_REASON - len(names)])
        return out


def _gist(reason: str) -> str:
    """'DecodeError: truncated image data (OSError: ...); ...' -> 'truncated image data'."""
    head, sep, rest = reason.partition(": ")
    text = rest if sep and head.isidentifier() else reason
    for stop in (" (", "; ", ": "):
        text = text.split(stop, 1)[0]
    return text.strip()[:80]


_SKIP_ADVICE = re.compile(r"[,;]?\s*(?:or )?set source\.on_error: skip to drop such samples")


def _without_skip_advice(cause: str) -> str:
    """A cause without its 'set source.on_error: skip' advice: in skip mode that is already so."""
    return _SKIP_ADVICE.sub("", cause)


STATE_VERSION = 2  # 2: ledger as bounded counts, shard identities (1: per-sample skip list, shard count)
SKIP_RATIO_MIN_READ = 100
log = logging.getLogger("patchloom")


def check_state_version(version: Any) -> None:
    """Refuse a resume state of another version, saying whether an older patchloom wrote it."""
    if version == STATE_VERSION:
        return
    if isinstance(version, int) and 0 < version < STATE_VERSION:
        raise ValueError(
            f"this resume state was saved by an older patchloom (state version {version}; this one reads "
            f"version {STATE_VERSION}) and cannot be resumed: start the epoch afresh, or resume with the "
            "patchloom release that saved it"
        )
    raise ValueError(f"unknown state version {version!r} (this patchloom reads version {STATE_VERSION})")


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


class _SkipLog:
    """Rate-limited warnings for skipped samples: the first few in full, then one summary line at
    most every `every` seconds (never sleeps)."""

    def __init__(self, first: int = 5, every: float = 30.0) -> None:
        self.first, self.every = first, every
        self.count = 0
        self.last = 0.0
        self.quiet = 0

    def skip(self, s: Skip) -> None:
        self.count += 1
        if self.count <= self.first:
            log.warning("skipped shard %s, key %r, stage %s: %s", s.shard, s.key, s.stage, s.reason)
            return
        self.quiet += 1
        now = time.monotonic()
        if now - self.last >= self.every:
            log.warning("%d more samples skipped (latest: key %r, stage %s); see pipeline.ledger",
                        self.quiet, s.key, s.stage)
            self.last, self.quiet = now, 0


def reader_share(total: int | None, worker: int, num_workers: int) -> int | None:
    """A rank-level count split over its DataLoader workers (the first ones take the remainder)."""
    if total is None:
        return None
    return total // num_workers + (1 if worker < total % num_workers else 0)


class Pipeline:
    """Iterable of PackedBatch for one reader (rank, worker) over one epoch of a recipe's shards.

    `shards` overrides the recipe's. Call `set_epoch(e)` between epochs. `state_dict()` taken
    between batches, then `load_state_dict()` on a new Pipeline, continues with exactly the batches
    the uninterrupted run would have produced. Shell-command shard URLs (`pipe:`) need
    allow_shell=True from the caller; a recipe cannot allow them for itself.

    Failed shards and skipped samples count toward `source.max_skip_ratio` (see check_skip_guard),
    and with num_workers == 1 an epoch that yields no sample raises EmptyEpochError. A caller that
    sees the whole run instead (the torch loader, over all its workers) passes guard=False and
    judges the merged ledgers itself.
    """

    def __init__(
        self,
        recipe: Recipe,
        shards: str | list[str] | None = None,
        rank: int = 0,
        world_size: int = 1,
        epoch: int = 0,
        *,
        worker: int = 0,
        num_workers: int = 1,
        allow_shell: bool = False,
        guard: bool = True,
    ) -> None:
        if not isinstance(recipe, Recipe):
            raise TypeError(f"Pipeline needs a Recipe (got {type(recipe).__name__}); use Recipe.from_file(path)")
        self.recipe = recipe
        self._fingerprint = recipe.fingerprint()
        src = recipe.source
        self.shards = expand_shards(shards if shards is not None else src.shards, allow_shell=allow_shell)
        self.allow_shell = allow_shell
        self.rank, self.world_size = rank, world_size
        self.worker, self.num_workers = worker, num_workers
        self.epoch = epoch
        self.guard = guard
        self.ledger = Ledger()
        self._identities: list[dict[str, Any]] | None = None
        self._batches = 0
        self._resume: dict[str, Any] | None = None
        self._log = _SkipLog()
        self._cursor: ReaderCursor | None = None
        self._packer: Packer | None = None
        self._shuffle: ShuffleBuffer | None = None

    def set_epoch(self, epoch: int) -> None:
        """Start a different epoch on the next iteration (new shard order, shuffles and draws)."""
        self.epoch = epoch

    @property
    def in_buffer(self) -> int:
        """Samples read but not yet emitted or skipped (shuffle buffer + packer look-ahead)."""
        held = len(self._shuffle.held) if self._shuffle else 0
        pending = len(self._packer.pending) if self._packer else 0
        return held + pending

    @property
    def batch_target(self) -> int | None:
        """Batches this reader yields in an epoch when the recipe fixes the length, else None."""
        return reader_share(self.recipe.epoch.batches, self.worker, self.num_workers)

    def shard_identities(self) -> list[dict[str, Any]]:
        """[shard_identity(url)] of this pipeline's shards, taken once when first asked (for the resume
        state; a run that never saves a state never looks)."""
        if self._identities is None:
            self._identities = [shard_identity(u) for u in self.shards]
        return self._identities

    def _where(self) -> str:
        rank = f" on rank {self.rank} of {self.world_size}" if self.world_size > 1 else ""
        return f"epoch {self.epoch}{rank}"

    def _note_opened(self) -> None:
        """Count the shard tasks opened in the first pass (the shard guard's denominator)."""
        cur = self._cursor
        assert cur is not None
        n = len(cur.tasks)
        opened = n if cur.pass_ > 0 else min(cur.task + 1, n)
        self.ledger.shards_read = max(self.ledger.shards_read, opened)

    def _shard_error(self, url: str, exc: Exception) -> None:
        """A shard failed in skip mode: warn once, record it, and let the guard judge."""
        text = str(exc).removeprefix(f"shard {url}: ")  # the url is named once, in the Skip
        reason = f"{type(exc).__name__}: {text}"
        first_pass = self._cursor is None or self._cursor.pass_ == 0
        if self._cursor is not None:
            self._note_opened()
        # A shard failing again in a top-up pass is named but not counted twice.
        self.ledger.add_shard_error(Skip(url, "", "read", reason), counted=first_pass)
        log.warning("shard %s failed: %s; its unread samples are not in this epoch", url, reason)
        if self.guard:
            check_skip_guard(self.ledger, self.recipe.source.max_skip_ratio, final=False)

    def _setup(self) -> None:
        """Fresh reader, shuffle buffer and packer for this epoch, restored from a saved state if any."""
        r = self.recipe
        state, self._resume = self._resume, None
        tasks = reader_tasks(
            self.shards, seed=r.seed, epoch=self.epoch, rank=self.rank, world_size=self.world_size,
            worker=self.worker, num_workers=self.num_workers, shuffle_shards=r.source.shuffle_shards,
        )
        self._cursor = ReaderCursor(
            tasks, allow_shell=self.allow_shell,
            on_shard_error=self._shard_error if r.source.on_error == "skip" else None,
            cycle=r.epoch.equalize, limit=reader_share(r.epoch.samples, self.worker, self.num_workers),
            max_sample_bytes=r.source.max_sample_bytes,
        )
        rng = stream_rng(r.seed, self.epoch, "sample-shuffle", self.rank, self.world_size, self.worker,
                         self.num_workers)
        self._shuffle = ShuffleBuffer(r.source.shuffle_buffer, rng)
        p = r.packing
        self._packer = Packer(seq_len=p.seq_len, rows=p.rows, max_images_per_row=p.max_images_per_row,
                              buffer=p.buffer, algorithm=p.algorithm)
        self.ledger = Ledger(shards_planned=len(tasks))
        self._batches = 0
        if state is None:
            return
        self._cursor.load_state_dict(state["reader"])
        rng.bit_generator.state = state["shuffle_rng"]
        held = [tuple(ref) for ref in state["shuffle_held"]]
        pending = [tuple(ref) for ref in state["pending"]]
        records = fetch_records(held + pending, allow_shell=self.allow_shell,
                                max_sample_bytes=r.source.max_sample_bytes)
        self._shuffle.held = records[: len(held)]
        self._packer.restore([process_record(rec, r, self.epoch) for rec in records[len(held):]],
                             state.get("pending_waited"))
        self.ledger = Ledger.from_state(state["ledger"])
        self._batches = int(state["batches"])

    def _records(self) -> Iterator[Record]:
        cursor = self._cursor
        assert cursor is not None
        for rec in cursor:
            self.ledger.read += 1
            if cursor.pass_ > 0:
                self.ledger.repeated += 1
            self._note_opened()
            yield rec
        self.ledger.shards_read = max(self.ledger.shards_read, min(cursor.task, len(cursor.tasks))
                                      if cursor.pass_ == 0 else len(cursor.tasks))

    def samples(self) -> Iterator[PatchSet]:
        """The PatchSets of this reader's epoch, before packing (bad samples skipped or raised)."""
        self._setup()
        yield from self._sample_stream()

    def _sample_stream(self) -> Iterator[PatchSet]:
        r = self.recipe
        assert self._shuffle is not None
        for rec in self._shuffle(self._records()):
            try:
                yield process_record(rec, r, self.epoch)
            except SampleError as err:
                if r.source.on_error == "raise":
                    raise
                self._skip(Skip(err.shard, err.key, err.stage, _without_skip_advice(err.cause)))
        self._end_of_epoch()

    def _skip(self, entry: Skip) -> None:
        self.ledger.add_skip(entry)
        self._log.skip(entry)
        if self.guard:
            check_skip_guard(self.ledger, self.recipe.source.max_skip_ratio, final=False)

    def _end_of_epoch(self) -> None:
        """The reader ran out: judge the skip guard over the whole epoch, and (when this reader is
        the whole epoch, num_workers == 1) refuse an epoch that yielded no sample."""
        if not self.guard:
            return
        check_skip_guard(self.ledger, self.recipe.source.max_skip_ratio, final=True)
        if self.num_workers == 1:
            check_not_empty(self.ledger, shards=len(self.shards), where=self._where())

    def __iter__(self) -> Iterator[PackedBatch]:
        self._setup()
        packer = self._packer
        assert packer is not None
        target = self.batch_target
        if target is not None and self._batches >= target:
            return
        for ps in self._sample_stream():
            for batch in packer.push(ps):
                self.ledger.emitted += batch.num_images
                self._batches += 1
                yield batch
                if target is not None and self._batches >= target:
                    return
        for batch in packer.flush():
            self.ledger.emitted += batch.num_images
            self._batches += 1
            yield batch
            if target is not None and self._batches >= target:
                return

    def state_dict(self, *, with_shards: bool = True) -> dict[str, Any]:
        """Small JSON-able position, valid between batches: reader position, shuffle-buffer contents
        (as shard and sample index) and generator state, packer carry-over, ledger counts, and the
        shards' identities (url, size, mtime), so a resume into changed shards is refused.

        `with_shards=False` leaves the identities out (the torch loader keeps them once for all
        its workers instead of sending them with every batch).
        """
        cursor, shuffle, packer = self._cursor, self._shuffle, self._packer
        if self._resume is not None:  # loaded but not iterated yet: the loaded state still stands
            return self._resume if with_shards else {k: v for k, v in self._resume.items() if k != "shards"}
        fresh = cursor is None
        state = {
            "version": STATE_VERSION,
            "fingerprint": self._fingerprint,
            "epoch": self.epoch,
            "rank": self.rank,
            "world_size": self.world_size,
            "worker": self.worker,
            "num_workers": self.num_workers,
            "batches": 0 if fresh else self._batches,
            "reader": ReaderCursor([]).state_dict() if fresh else cursor.state_dict(),
            "shuffle_rng": None if fresh else shuffle.rng.bit_generator.state,
            "shuffle_held": [] if fresh else [[rec.url, rec.index] for rec in shuffle.held],
            "pending": [] if fresh else [[ps.meta["shard"], ps.meta["index"]] for ps in packer.pending],
            "pending_waited": [] if fresh else packer.waited(),
            "ledger": Ledger().state_dict() if fresh else self.ledger.state_dict(),
        }
        if with_shards:
            state["shards"] = self.shard_identities()
        return state

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Resume: the next iteration continues right after the saved batch, exactly.

        Refuses a state saved under another recipe or reader layout, by an older patchloom, or over
        other shards: reordered, swapped, or rewritten in place (size or mtime changed). Restoring
        re-reads the few buffered samples from their shards and skips the rest of the read ones by
        name only.
        """
        check_state_version(state.get("version"))
        if state.get("fingerprint") != self._fingerprint:
            raise ValueError("this state was saved under a different recipe (fingerprints differ)")
        for name in ("rank", "world_size", "worker", "num_workers"):
            mine = getattr(self, name)
            if state.get(name) != mine:
                raise ValueError(f"state was saved with {name}={state.get(name)}, this pipeline has {mine}")
        saved = state.get("shards")
        if not isinstance(saved, list):
            raise ValueError("this state has no shard identities: pass a state from Pipeline.state_dict()")
        change = describe_identity_change(saved, self.shard_identities())
        if change is not None:
            raise ValueError(
                f"the shards differ from the ones this state was saved over: {change}. Resume over the same "
                "shard list with the files unchanged, or start the epoch afresh"
            )
        self.epoch = int(state["epoch"])
        self._resume = state if state["shuffle_rng"] is not None else None
        self._cursor = None
