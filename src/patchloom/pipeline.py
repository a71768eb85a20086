"""Pipeline: compose the stages from a Recipe into an iterator of PackedBatch.

shards -> reader split -> shuffle buffer -> per-sample chain (sample.py) -> Packer -> batches.
Each sample's random draws come from its own generator (seed, epoch, key, stage), so its tokens do
not depend on worker count, order or resume point.
"""

from __future__ import annotations

import json
import logging
import time
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any


from .batch import PackedBatch
from .packing import Packer
from .patches import PatchSet
from .recipe import Recipe
from .sample import SampleError, SkipRatioError, image_to_patches, process_record
from .seeding import stream_rng
from .sources import Record, ReaderCursor, ShuffleBuffer, expand_shards, fetch_records, reader_tasks

__all__ = ["Ledger", "Pipeline", "SampleError", "Skip", "SkipRatioError", "image_to_patches"]


@dataclass(slots=True)
class Skip:
    """A sample (or the rest of a shard) that was not emitted, and why."""

    shard: str
    key: str
    stage: str
    reason: str


@dataclass(slots=True)
class Ledger:
    """Counts of samples read, emitted and skipped; read == emitted + skipped + in_buffer."""

    read: int = 0
    emitted: int = 0
    skipped: list[Skip] = field(default_factory=list)
    shard_errors: list[Skip] = field(default_factory=list)
    repeated: int = 0  # reads in top-up passes of an equalised epoch (also counted in `read`)

    @property
    def in_buffer(self) -> int:
        return self.read - self.emitted - len(self.skipped)

    def reasons(self) -> dict[str, int]:
        """Skipped samples counted by stage and the gist of their cause."""
        return dict(Counter(f"{s.stage}: {_gist(s.reason)}" for s in self.skipped))

    def examples(self, per_reason: int = 2) -> dict[str, list[str]]:
        """A few `key (shard)` examples for each reason, so a user can go and look."""
        out: dict[str, list[str]] = {}
        for s in self.skipped:
            names = out.setdefault(f"{s.stage}: {_gist(s.reason)}", [])
            if len(names) < per_reason:
                names.append(f"{s.key} ({s.shard.rsplit('/', 1)[-1]})")
        return out

    def to_dict(self) -> dict[str, Any]:
        return {
            "read": self.read,
            "emitted": self.emitted,
            "skipped": len(self.skipped),
            "in_buffer": self.in_buffer,
            "skip_reasons": self.reasons(),
            "skip_examples": self.examples(),
            "shard_errors": [s.shard + ": " + s.reason for s in self.shard_errors],
            "repeated": self.repeated,
        }

    def write_jsonl(self, path: str) -> None:
        """One JSON line per skipped sample (a quarantine list), then one summary line."""
        with open(path, "w", encoding="utf-8") as f:
            for s in self.skipped:
                f.write(json.dumps({"shard": s.shard, "key": s.key, "stage": s.stage, "reason": s.reason}) + "\n")
            for s in self.shard_errors:
                f.write(json.dumps({"shard": s.shard, "key": None, "stage": s.stage, "reason": s.reason}) + "\n")
            f.write(json.dumps({"summary": self.to_dict()}) + "\n")

    def state_dict(self) -> dict[str, Any]:
        """Everything, as JSON-able data (for resume)."""
        return {
            "read": self.read, "emitted": self.emitted, "repeated": self.repeated,
            "skipped": [[s.shard, s.key, s.stage, s.reason] for s in self.skipped],
            "shard_errors": [[s.shard, s.key, s.stage, s.reason] for s in self.shard_errors],
        }

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> Ledger:
        return cls(read=int(state["read"]), emitted=int(state["emitted"]), repeated=int(state["repeated"]),
                   skipped=[Skip(*s) for s in state["skipped"]], shard_errors=[Skip(*s) for s in state["shard_errors"]])


def _gist(reason: str) -> str:
    """'DecodeError: truncated image data (OSError: ...); ...' -> 'truncated image data'."""
    head, sep, rest = reason.partition(": ")
    text = rest if sep and head.isidentifier() else reason
    for stop in (" (", "; ", ": "):
        text = text.split(stop, 1)[0]
    return text.strip()[:80]


STATE_VERSION = 1
SKIP_RATIO_MIN_READ = 100
log = logging.getLogger("patchloom")


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
        self.ledger = Ledger()
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

    def _shard_error(self, url: str, exc: Exception) -> None:
        self.ledger.shard_errors.append(Skip(url, "", "read", f"{type(exc).__name__}: {exc}"))

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
        )
        rng = stream_rng(r.seed, self.epoch, "sample-shuffle", self.rank, self.world_size, self.worker,
                         self.num_workers)
        self._shuffle = ShuffleBuffer(r.source.shuffle_buffer, rng)
        p = r.packing
        self._packer = Packer(seq_len=p.seq_len, rows=p.rows, max_images_per_row=p.max_images_per_row,
                              buffer=p.buffer, algorithm=p.algorithm)
        self.ledger = Ledger()
        self._batches = 0
        if state is None:
            return
        self._cursor.load_state_dict(state["reader"])
        rng.bit_generator.state = state["shuffle_rng"]
        held = [tuple(ref) for ref in state["shuffle_held"]]
        pending = [tuple(ref) for ref in state["pending"]]
        records = fetch_records(held + pending, allow_shell=self.allow_shell)
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
            yield rec

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
                self._skip(Skip(err.shard, err.key, err.stage, err.cause))
        self._check_skip_ratio()

    def _skip(self, entry: Skip) -> None:
        self.ledger.skipped.append(entry)
        self._log.skip(entry)
        self._check_skip_ratio()

    def _check_skip_ratio(self) -> None:
        """Past source.max_skip_ratio even `skip` raises, so a broken shard list cannot train quietly
        on part of the data. Judged after each skip and at the end of the stream, once at least
        SKIP_RATIO_MIN_READ samples are read (a ratio of a handful says little)."""
        limit = self.recipe.source.max_skip_ratio
        led = self.ledger
        if limit is None or led.read < SKIP_RATIO_MIN_READ:
            return
        ratio = len(led.skipped) / led.read
        if ratio > limit:
            reasons = ", ".join(f"{n} x {k}" for k, n in sorted(led.reasons().items(), key=lambda kv: -kv[1]))
            raise SkipRatioError(
                f"{len(led.skipped)} of {led.read} samples skipped ({100 * ratio:.1f} %), over "
                f"source.max_skip_ratio={limit}: {reasons}. Fix the shards, or raise max_skip_ratio "
                "(null turns the check off) if this is expected"
            )

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

    def state_dict(self) -> dict[str, Any]:
        """Small JSON-able position, valid between batches: reader position, shuffle-buffer contents
        (as shard and sample index) and generator state, packer carry-over, ledger."""
        cursor, shuffle, packer = self._cursor, self._shuffle, self._packer
        if self._resume is not None:  # loaded but not iterated yet: the loaded state still stands
            return self._resume
        fresh = cursor is None
        return {
            "version": STATE_VERSION,
            "fingerprint": self._fingerprint,
            "shards": len(self.shards),
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

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Resume: the next iteration continues right after the saved batch, exactly.

        Refuses a state saved under another recipe or reader layout. Restoring re-reads the few
        buffered samples from their shards and skips the rest of the read ones by name only.
        """
        if state.get("version") != STATE_VERSION:
            raise ValueError(f"unknown state version {state.get('version')!r} (this patchloom writes {STATE_VERSION})")
        if state.get("fingerprint") != self._fingerprint:
            raise ValueError("this state was saved under a different recipe (fingerprints differ)")
        for name in ("shards", "rank", "world_size", "worker", "num_workers"):
            mine = len(self.shards) if name == "shards" else getattr(self, name)
            if state.get(name) != mine:
                raise ValueError(f"state was saved with {name}={state.get(name)}, this pipeline has {mine}")
        self.epoch = int(state["epoch"])
        self._resume = state if state["shuffle_rng"] is not None else None
        self._cursor = None
