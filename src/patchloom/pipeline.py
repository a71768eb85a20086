"""Pipeline: compose the stages from a Recipe into an iterator of PackedBatch.

shards -> reader split (ReaderCursor) -> ShuffleBuffer -> per-sample chain (image/chain.py) -> Packer
-> batches, counted in a Ledger (ledger.py). Each sample's random draws come from its own generator
(seed, epoch, key, stage), so its tokens do not depend on worker count, order or resume point.
Each stateful stage owns its resume state; `Pipeline.state_dict()` nests them under their names.
"""

from __future__ import annotations

import logging
import re
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any

from .errors import PatchloomError
from .extras import require
from .image.chain import SampleError, SkipRatioError, image_to_patches, process_sample
from .image.patches import PatchSet
from .ledger import EmptyEpochError, Ledger, Skip, check_not_empty, check_skip_guard
from .packing.batch import PackedBatch
from .packing.packer import Packer
from .packing.text import TextEncoder, add_text_tokens
from .read import (
    Fields,
    Record,
    ReaderCursor,
    ShuffleBuffer,
    describe_identity_change,
    expand_shards,
    fetch_records,
    reader_tasks,
    shard_identity,
)
from .recipe.schema import Recipe
from .seeding import stream_rng

__all__ = ["EmptyEpochError", "Ledger", "Pipeline", "SampleError", "Skip", "SkipRatioError", "StateError",
           "image_to_patches", "require_recipe_extras"]


_SKIP_ADVICE = re.compile(r"[,;]?\s*(?:or )?set source\.on_error: skip to drop such samples")


def _without_skip_advice(cause: str) -> str:
    """A cause without its 'set source.on_error: skip' advice: in skip mode that is already so."""
    return _SKIP_ADVICE.sub("", cause)


#: Version of Pipeline.state_dict(). 3: one section per stage ("reader", "shuffle", "packer",
#: "ledger"), each written by the stage itself. 2: ledger as bounded counts, shard identities.
#: 1: per-sample skip list, shard count.
STATE_VERSION = 3
STATE_SECTIONS = ("reader", "shuffle", "packer", "ledger")
log = logging.getLogger("patchloom")


class StateError(PatchloomError, ValueError):
    """A resume state this pipeline cannot continue from; the message says why and what to do."""


def require_recipe_extras(recipe: Recipe) -> None:
    """Refuse a recipe whose samples would all fail for a missing package (MissingExtraError naming it):
    said once, before any work, not once per sample."""
    if recipe.source.video_keys:
        require("av", "video clips (source.video_keys)")


def check_state_version(version: Any) -> None:
    """Refuse a resume state of another version, saying whether an older patchloom wrote it."""
    exact_int = type(version) is int  # True, 3.0 or "3" are not versions a state was saved with
    if exact_int and version == STATE_VERSION:
        return
    if exact_int and 0 < version < STATE_VERSION:
        raise StateError(
            f"this resume state was saved by an older patchloom (state version {version}; this one reads "
            f"version {STATE_VERSION}) and cannot be resumed: start the epoch afresh, or resume with the "
            "patchloom release that saved it"
        )
    raise StateError(f"unknown state version {version!r} (this patchloom reads version {STATE_VERSION}): "
                     "this is not a state Pipeline.state_dict() wrote; start the epoch afresh")


def check_state(state: Any) -> None:
    """Refuse what is not a Pipeline.state_dict() of this version: not a dict, another version, or a
    stage's section missing. One StateError, saying to start the epoch afresh."""
    if not isinstance(state, dict):
        raise StateError(f"a resume state is the dict Pipeline.state_dict() returns (got {type(state).__name__}); "
                         "pass that, or start the epoch afresh")
    check_state_version(state.get("version"))
    missing = [name for name in STATE_SECTIONS if not isinstance(state.get(name), dict)]
    missing += [name for name in ("epoch", "batches") if not isinstance(state.get(name), int)]
    if missing:
        raise StateError(f"this resume state lacks {', '.join(repr(m) for m in missing)} (version {STATE_VERSION} "
                         "holds one section per stage): it was not written by Pipeline.state_dict(); start "
                         "the epoch afresh")


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
    judges the merged ledgers itself. Each failed shard is logged as it fails unless
    `warn_shard_errors` is set to False by a caller that names them itself from the merged ledgers
    (pack does, once per shard whichever group or engine read it).

    Observers (they watch, and change nothing): `on_record(record)` is called with each raw record
    the reader yields (after the ledger counted it, before the shuffle buffer), `on_sample(patchset)`
    with each PatchSet the per-sample chain makes (before packing). `max_records` stops the reader
    after that many records (a preview; what was read is still processed, packed and counted); pass
    the same value when resuming such a run.

    `text_encoder` (`fn(str) -> list[int]`, any tokenizer; code, never named in a recipe) gives every
    batch `text_tokens` [B, S, text.max_tokens] and `text_lengths` [B, S] from its `texts`, encoded
    here (in the DataLoader worker); texts cut to text.max_tokens count in `ledger.texts_truncated`.
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
        on_record: Callable[[Record], None] | None = None,
        on_sample: Callable[[PatchSet], None] | None = None,
        max_records: int | None = None,
        text_encoder: TextEncoder | None = None,
    ) -> None:
        if not isinstance(recipe, Recipe):
            raise TypeError(f"Pipeline needs a Recipe (got {type(recipe).__name__}); use Recipe.from_file(path)")
        self.recipe = recipe
        self._fingerprint = recipe.fingerprint()
        src = recipe.source
        require_recipe_extras(recipe)
        self.shards = expand_shards(shards if shards is not None else src.shards, allow_shell=allow_shell,
                                    image_keys=src.sample_keys)
        # What Parquet files and image folders are read for (tar shards give every member anyway).
        self._fields = Fields(tuple(src.image_keys), src.label_key, src.text_key,
                              all_images=src.images_per_sample == "all", video_keys=tuple(src.video_keys))
        self.allow_shell = allow_shell
        self.rank, self.world_size = rank, world_size
        self.worker, self.num_workers = worker, num_workers
        self.epoch = epoch
        self.guard = guard
        self.warn_shard_errors = True
        self.on_record, self.on_sample, self.max_records = on_record, on_sample, max_records
        self.text_encoder = text_encoder
        self.ledger = Ledger()
        self._identities: list[dict[str, Any]] | None = None
        self._batches = 0
        self._resume: dict[str, Any] | None = None
        self._log = _SkipLog()
        self._cursor: ReaderCursor | None = None
        self._packer: Packer | None = None
        self._shuffle: ShuffleBuffer | None = None

    def set_epoch(self, epoch: int) -> None:
        """Start a different epoch on the next iteration (new shard order, shuffles and draws).

        The finished (or loaded) position belongs to the old epoch, so it is dropped: a
        `state_dict()` taken now describes the start of the new one.
        """
        if epoch != self.epoch:
            self._cursor = self._shuffle = self._packer = None
            self._resume = None
        self.epoch = epoch

    @property
    def in_buffer(self) -> int:
        """Samples read but not yet emitted or skipped (shuffle buffer + packer look-ahead)."""
        held = len(self._shuffle.held) if self._shuffle is not None else 0
        pending = len(self._packer.pending) if self._packer is not None else 0
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
        if self.warn_shard_errors:
            log.warning("shard %s failed: %s; its unread samples are not in this epoch", url, reason)
        if self.guard:
            check_skip_guard(self.ledger, self.recipe.source.max_skip_ratio, final=False)

    def _record_limit(self) -> int | None:
        """Records this reader reads at most: its share of `epoch.samples`, capped by max_records."""
        limits = [n for n in (reader_share(self.recipe.epoch.samples, self.worker, self.num_workers),
                              self.max_records) if n is not None]
        return min(limits) if limits else None

    def _new_shuffle(self) -> ShuffleBuffer:
        r = self.recipe
        rng = stream_rng(r.seed, self.epoch, "sample-shuffle", self.rank, self.world_size, self.worker,
                         self.num_workers)
        return ShuffleBuffer(r.source.shuffle_buffer, rng)

    def _new_packer(self) -> Packer:
        p = self.recipe.packing
        return Packer(seq_len=p.seq_len, rows=p.rows, max_images_per_row=p.max_images_per_row,
                      buffer=p.lookahead, algorithm=p.algorithm)

    def _setup(self) -> None:
        """Fresh reader, shuffle buffer, packer and ledger for this epoch, restored from a loaded state if any."""
        r = self.recipe
        state, self._resume = self._resume, None
        tasks = reader_tasks(
            self.shards, seed=r.seed, epoch=self.epoch, rank=self.rank, world_size=self.world_size,
            worker=self.worker, num_workers=self.num_workers, shuffle_shards=r.source.shuffle_shards,
            fields=self._fields,
        )
        self._cursor = ReaderCursor(
            tasks, allow_shell=self.allow_shell,
            on_shard_error=self._shard_error if r.source.on_error == "skip" else None,
            cycle=r.epoch.equalize, limit=self._record_limit(), max_sample_bytes=r.source.max_sample_bytes,
            fields=self._fields,
        )
        self._shuffle = self._new_shuffle()
        self._packer = self._new_packer()
        self.ledger = Ledger()
        self._batches = 0
        if state is not None:
            self._restore(state)
        self.ledger.shards_planned = len(tasks)  # follows from the reader layout, not from a state

    def _restore(self, state: dict[str, Any]) -> None:
        """Load each stage's section of a checked state. The buffered samples are re-read from their
        shards; the packer's are re-processed too (deterministic: they come out identical)."""
        r, epoch = self.recipe, self.epoch

        def fetch(refs: Sequence[tuple[str, int]]) -> list[Record]:
            return fetch_records(refs, allow_shell=self.allow_shell, max_sample_bytes=r.source.max_sample_bytes,
                                 fields=self._fields)

        def materialise(refs: Sequence[tuple[str, int]]) -> list[list[PatchSet]]:
            return [process_sample(rec, r, epoch) for rec in fetch(refs)]

        assert self._cursor is not None and self._shuffle is not None and self._packer is not None
        try:
            self._cursor.load_state_dict(state["reader"])
            self._shuffle.load_state_dict(state["shuffle"], fetch)
            self._packer.load_state_dict(state["packer"], materialise)
            self.ledger.load_state_dict(state["ledger"])
        except PatchloomError:
            raise
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise StateError(f"a section of this resume state is malformed ({type(exc).__name__}: {exc}); it was "
                             "not written by Pipeline.state_dict() of this version: start the epoch afresh") from exc
        self._batches = int(state["batches"])

    def _records(self) -> Iterator[Record]:
        cursor = self._cursor
        assert cursor is not None
        for rec in cursor:
            self.ledger.read += 1
            if cursor.pass_ > 0:
                self.ledger.repeated += 1
            self._note_opened()
            if self.on_record is not None:
                self.on_record(rec)
            yield rec
        self.ledger.shards_read = max(self.ledger.shards_read, min(cursor.task, len(cursor.tasks))
                                      if cursor.pass_ == 0 else len(cursor.tasks))

    def samples(self) -> Iterator[PatchSet]:
        """The PatchSets of this reader's epoch, before packing (bad samples skipped or raised); a
        multi-image sample gives its images one after the other."""
        self._setup()
        for images in self._sample_stream():
            yield from images

    def _sample_stream(self) -> Iterator[list[PatchSet]]:
        """Each sample's PatchSets (one per image, in member order), as the packer takes them."""
        r = self.recipe
        assert self._shuffle is not None
        for rec in self._shuffle(self._records()):
            try:
                images = process_sample(rec, r, self.epoch)
            except SampleError as err:
                if r.source.on_error == "raise":
                    raise
                self._skip(Skip(err.shard, err.key, err.stage, _without_skip_advice(err.cause)))
                continue
            if self.on_sample is not None:
                for ps in images:
                    self.on_sample(ps)
            yield images
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
        for images in self._sample_stream():
            for batch in packer.push(images):
                self._emit(batch)
                yield batch
                if target is not None and self._batches >= target:
                    return
        for batch in packer.flush():
            self._emit(batch)
            yield batch
            if target is not None and self._batches >= target:
                return

    def _emit(self, batch: PackedBatch) -> None:
        """Count a batch about to be yielded, and add its text tokens when there is an encoder."""
        if self.text_encoder is not None:
            self.ledger.texts_truncated += add_text_tokens(batch, self.text_encoder, self.recipe.text.max_tokens)
        self.ledger.emitted += batch.num_samples
        self.ledger.images_emitted += batch.num_images
        self._batches += 1

    def state_dict(self, *, with_shards: bool = True) -> dict[str, Any]:
        """Small JSON-able position, valid between batches: {"version", "fingerprint", "epoch", the
        reader layout ("rank", "world_size", "worker", "num_workers"), "batches", one section per
        stage, each written by the stage itself ("reader": position, "shuffle": generator state and
        held records as [shard, index], "packer": pending images as [shard, index, waited],
        "ledger": counts), and "shards": the shards' identities (url, size, mtime)}, so a resume into
        changed shards is refused.

        `with_shards=False` leaves the identities out (the torch loader keeps them once for all
        its workers instead of sending them with every batch).
        """
        if self._resume is not None:  # loaded but not iterated yet: the loaded state still stands
            return self._resume if with_shards else {k: v for k, v in self._resume.items() if k != "shards"}
        if self._cursor is None or self._shuffle is None or self._packer is None:  # not started
            cursor, shuffle, packer, ledger = ReaderCursor([]), self._new_shuffle(), self._new_packer(), Ledger()
            batches = 0
        else:
            cursor, shuffle, packer, ledger = self._cursor, self._shuffle, self._packer, self.ledger
            batches = self._batches
        state = {
            "version": STATE_VERSION,
            "fingerprint": self._fingerprint,
            "epoch": self.epoch,
            "rank": self.rank,
            "world_size": self.world_size,
            "worker": self.worker,
            "num_workers": self.num_workers,
            "batches": batches,
            "reader": cursor.state_dict(),
            "shuffle": shuffle.state_dict(),
            "packer": packer.state_dict(),
            "ledger": ledger.state_dict(),
        }
        if with_shards:
            state["shards"] = self.shard_identities()
        return state

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Resume: the next iteration continues right after the saved batch, exactly.

        Refuses (StateError) what is not a state of this version (see check_state), a state saved
        under another recipe or reader layout, or over other shards: reordered, swapped, or
        rewritten in place (size or mtime changed). Restoring re-reads the few buffered samples
        from their shards and skips the rest of the read ones by name only.
        """
        check_state(state)
        if state.get("fingerprint") != self._fingerprint:
            raise StateError("this state was saved under a different recipe (fingerprints differ): resume "
                             "with the recipe that saved it, or start the epoch afresh")
        for name in ("rank", "world_size", "worker", "num_workers"):
            mine = getattr(self, name)
            if state.get(name) != mine:
                raise StateError(f"state was saved with {name}={state.get(name)}, this pipeline has {mine}")
        saved = state.get("shards")
        if not isinstance(saved, list):
            raise StateError("this state has no shard identities: pass a state from Pipeline.state_dict()")
        change = describe_identity_change(saved, self.shard_identities())
        if change is not None:
            raise StateError(
                f"the shards differ from the ones this state was saved over: {change}. Resume over the same "
                "shard list with the files unchanged, or start the epoch afresh"
            )
        self.epoch = state["epoch"]
        self._resume = state
        self._cursor = self._shuffle = self._packer = None  # rebuilt from the state on the next iteration
