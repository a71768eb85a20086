"""Pipeline: compose the stages from a Recipe into an iterator of PackedBatch.

shards -> reader split -> shuffle buffer -> per-sample chain (sample.py) -> Packer -> batches.
Each sample's random draws come from its own generator (seed, epoch, key, stage), so its tokens do
not depend on worker count, order or resume point.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any


from .batch import PackedBatch
from .packing import Packer
from .patches import PatchSet
from .recipe import Recipe
from .sample import SampleError, image_to_patches, process_record
from .seeding import stream_rng
from .sources import Record, ShuffleBuffer, expand_shards, read_tasks, reader_tasks

__all__ = ["Ledger", "Pipeline", "SampleError", "Skip", "image_to_patches"]


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
        }


def _gist(reason: str) -> str:
    """'DecodeError: truncated image data (OSError: ...); ...' -> 'truncated image data'."""
    head, sep, rest = reason.partition(": ")
    text = rest if sep and head.isidentifier() else reason
    for stop in (" (", "; ", ": "):
        text = text.split(stop, 1)[0]
    return text.strip()[:80]


class Pipeline:
    """Iterable of PackedBatch for one reader (rank, worker) over one epoch of a recipe's shards.

    `shards` overrides the recipe's. Call `set_epoch(e)` between epochs. `state_dict()` /
    `load_state_dict()` resume mid-epoch with the identical continuation.
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
        src = recipe.source
        self.shards = expand_shards(shards if shards is not None else src.shards, allow_shell=allow_shell)
        self.allow_shell = allow_shell
        self.rank, self.world_size = rank, world_size
        self.worker, self.num_workers = worker, num_workers
        self.epoch = epoch
        self.ledger = Ledger()
        self._batches = 0
        self._skip_batches = 0
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

    def _records(self) -> Iterator[Record]:
        r = self.recipe
        tasks = reader_tasks(
            self.shards, seed=r.seed, epoch=self.epoch, rank=self.rank, world_size=self.world_size,
            worker=self.worker, num_workers=self.num_workers, shuffle_shards=r.source.shuffle_shards,
        )
        on_error = self._shard_error if r.source.on_error == "skip" else None
        for rec in read_tasks(tasks, allow_shell=self.allow_shell, on_shard_error=on_error):
            self.ledger.read += 1
            yield rec

    def _shard_error(self, url: str, exc: Exception) -> None:
        self.ledger.shard_errors.append(Skip(url, "", "read", f"{type(exc).__name__}: {exc}"))

    def samples(self) -> Iterator[PatchSet]:
        """The PatchSets of this reader's epoch, before packing (bad samples skipped or raised)."""
        r = self.recipe
        rng = stream_rng(r.seed, self.epoch, "sample-shuffle", self.rank, self.world_size, self.worker,
                         self.num_workers)
        self._shuffle = ShuffleBuffer(r.source.shuffle_buffer, rng)
        for rec in self._shuffle(self._records()):
            try:
                yield process_record(rec, r, self.epoch)
            except SampleError as err:
                if r.source.on_error == "raise":
                    raise
                self.ledger.skipped.append(Skip(err.shard, err.key, err.stage, err.cause))

    def __iter__(self) -> Iterator[PackedBatch]:
        p = self.recipe.packing
        self.ledger = Ledger()
        self._batches = 0
        skip, self._skip_batches = self._skip_batches, 0
        self._packer = packer = Packer(
            seq_len=p.seq_len, rows=p.rows, max_images_per_row=p.max_images_per_row,
            buffer=p.buffer, algorithm=p.algorithm,
        )

        def emit(batch: PackedBatch) -> Iterator[PackedBatch]:
            self.ledger.emitted += batch.num_images
            self._batches += 1
            if self._batches > skip:
                yield batch

        for ps in self.samples():
            for batch in packer.push(ps):
                yield from emit(batch)
        for batch in packer.flush():
            yield from emit(batch)

    def state_dict(self) -> dict[str, Any]:
        """JSON-able position: epoch and batches yielded, tied to the recipe and shard list."""
        return {
            "fingerprint": self.recipe.fingerprint(),
            "shards": len(self.shards),
            "epoch": self.epoch,
            "batches": self._batches,
            "rank": self.rank,
            "world_size": self.world_size,
            "worker": self.worker,
            "num_workers": self.num_workers,
        }

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Resume: the next iteration continues right after the saved batch.

        This version replays the epoch up to the saved point (exact, but costs the work already
        done); it refuses a state saved under another recipe or reader layout.
        """
        if state.get("fingerprint") != self.recipe.fingerprint():
            raise ValueError("this state was saved under a different recipe (fingerprints differ)")
        for name in ("shards", "rank", "world_size", "worker", "num_workers"):
            mine = len(self.shards) if name == "shards" else getattr(self, name)
            if state.get(name) != mine:
                raise ValueError(f"state was saved with {name}={state.get(name)}, this pipeline has {mine}")
        self.epoch = int(state["epoch"])
        self._skip_batches = int(state["batches"])
        self._batches = self._skip_batches
