"""PyTorch adapter: an IterableDataset whose DataLoader workers each read their own split.

Use it with `DataLoader(ds, batch_size=None, num_workers=N)`: every item is already a packed,
fixed-shape batch. A sample's tokens do not depend on num_workers (per-sample RNG rule); which
images share a batch does, since each worker packs its own share.

Ledgers: under a PatchloomLoader every worker sends its ledger counts (and its newly skipped samples)
home with each batch, and once more when its share ends, so `PatchloomLoader.ledger` covers the whole
rank and the loader judges `source.max_skip_ratio` and an empty epoch over all workers together, in
the main process. Under a plain DataLoader each worker judges the guard over its own share only,
and cannot tell an empty epoch from a worker that legitimately got nothing.
"""

from __future__ import annotations

import os
import weakref
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

try:
    import torch
    from torch.utils.data import DataLoader, IterableDataset, get_worker_info
except ImportError as exc:  # pragma: no cover - exercised only without the extra
    raise ImportError(
        "patchloom.adapters.torch needs PyTorch: pip install 'patchloom[torch]' "
        "(on CPU-only machines install torch first, e.g. pip install torch==2.13.0)"
    ) from exc

from ..ledger import Ledger, Skip, check_not_empty, check_skip_guard
from ..packing.text import TextEncoder
from ..pipeline import Pipeline, StateError, check_state, require_recipe_extras
from ..read import describe_identity_change, shard_identity, split_shards
from ..recipe.schema import Recipe

#: Version of PatchloomLoader.state_dict(). 3: worker states of version 3 (one section per stage).
#: 2: shard identities kept once, worker states of version 2.
LOADER_STATE_VERSION = 3


def _worker_init() -> None:
    """Keep each worker's decoding single-threaded (workers already run in parallel)."""
    torch.set_num_threads(1)


#: Shared-memory batch slots each DataLoader worker reuses (DataLoader keeps up to prefetch_factor = 2
#: batches a worker in flight, and the training loop holds one or two more).
POOL_SLOTS = 4
_ALIGN = 64  # byte alignment of each array inside a slot


def _release(flags: torch.Tensor, index: int) -> None:
    flags[index] = 0


class SharedBatch(dict):
    """A batch dict whose tensors are views of one reusable shared-memory slot of a DataLoader worker.

    Handing a fresh tensor to the main process makes torch copy it into a new shared-memory segment
    (and the kernel fault in every page of it, twice: in the worker and in the main process), about
    11 ms for an 8 x 1024 x 768 batch on our machine. A slot is allocated once and written again,
    so only its handle crosses. Unpickled in the main process it becomes a plain dict, and a
    finalizer on the slot's storage marks the slot free once nothing there refers to any of its
    tensors (views included), so a batch is never overwritten while it is in use.
    """

    __slots__ = ("flags", "index", "owner")

    def __reduce__(self) -> tuple[Any, ...]:
        return (_unpickle_shared_batch, (dict(self), self.flags, self.index, self.owner))


def _unpickle_shared_batch(items: dict[str, Any], flags: torch.Tensor, index: int, owner: int) -> dict[str, Any]:
    """In the worker (DataLoader's copy before sending): the same SharedBatch. Elsewhere: a plain dict
    whose slot is released when its storage is garbage."""
    if os.getpid() == owner:
        batch = SharedBatch(items)
        batch.flags, batch.index, batch.owner = flags, index, owner
        return batch
    storage = next(v for v in items.values() if isinstance(v, torch.Tensor)).untyped_storage()
    weakref.finalize(storage, _release, flags, index)
    return items


@dataclass(slots=True)
class _Slot:
    storage: torch.Tensor  # uint8, shared memory: every array of one batch at aligned offsets
    views: dict[str, torch.Tensor]


class BatchPool:
    """A DataLoader worker's POOL_SLOTS shared-memory slots, written in turn; `flags[i]` is 1 while
    slot i's batch may still be in use in the main process. Shapes are static, so a slot laid out
    for the first batch fits every later one (a batch that does not fit is handed over the usual way)."""

    def __init__(self, slots: int = POOL_SLOTS) -> None:
        self.flags = torch.zeros(slots, dtype=torch.uint8).share_memory_()
        self.slots: list[_Slot | None] = [None] * slots
        self.pooled = 0  # batches handed over through a slot
        self.fallback = 0  # batches handed over the usual way (every slot busy, or a shape that does not fit)

    def put(self, tensors: dict[str, Any]) -> dict[str, Any]:
        """The batch's tensors copied into a free slot, as a SharedBatch; the dict unchanged when no slot is free."""
        arrays = {k: v for k, v in tensors.items() if isinstance(v, torch.Tensor)}
        for i, slot in enumerate(self.slots):
            if int(self.flags[i]) != 0:
                continue
            if slot is None or not _fits(slot, arrays):
                slot = self.slots[i] = _new_slot(arrays)
            for name, t in arrays.items():
                slot.views[name].copy_(t)
            self.flags[i] = 1
            batch = SharedBatch({**tensors, **slot.views})
            batch.flags, batch.index, batch.owner = self.flags, i, os.getpid()
            self.pooled += 1
            return batch
        self.fallback += 1
        return tensors


def _fits(slot: _Slot, arrays: dict[str, torch.Tensor]) -> bool:
    return slot.views.keys() == arrays.keys() and all(
        slot.views[k].shape == t.shape and slot.views[k].dtype == t.dtype for k, t in arrays.items())


def _new_slot(arrays: dict[str, torch.Tensor]) -> _Slot:
    """One shared uint8 buffer holding every array at a 64-byte aligned offset, and the typed views."""
    offsets, total = {}, 0
    for name, t in arrays.items():
        offsets[name] = total
        total += -(-t.numel() * t.element_size() // _ALIGN) * _ALIGN
    storage = torch.empty(max(total, 1), dtype=torch.uint8).share_memory_()
    views = {name: storage[offsets[name]:offsets[name] + t.numel() * t.element_size()].view(t.dtype).view(t.shape)
             for name, t in arrays.items()}
    return _Slot(storage, views)


class PatchloomDataset(IterableDataset):
    """Streams PackedBatch dicts of tensors for one rank; DataLoader workers split the rank's share.

    `as_tensors=False` yields PackedBatch objects (numpy) instead. In DataLoader workers the tensors
    are written into `pool_slots` reusable shared-memory slots per worker (see SharedBatch; 0: a new
    shared segment per batch, as torch does by default). `text_encoder` (`fn(str) ->
    list[int]`) tokenizes each batch's texts in the worker, as in Pipeline; under worker processes
    started by spawn it must be picklable (a module-level function or a picklable object).
    """

    def __init__(
        self,
        recipe: Recipe,
        shards: str | list[str] | None = None,
        *,
        rank: int = 0,
        world_size: int = 1,
        epoch: int = 0,
        as_tensors: bool = True,
        allow_shell: bool = False,
        text_encoder: TextEncoder | None = None,
        pool_slots: int = POOL_SLOTS,
    ) -> None:
        super().__init__()
        require_recipe_extras(recipe)  # here, in the main process: one line, not a worker's traceback
        self.recipe = recipe
        self.shards = shards
        self.rank, self.world_size = rank, world_size
        # Shared memory, so set_epoch reaches persistent workers, which hold their own copy.
        self._epoch = torch.tensor([epoch], dtype=torch.int64).share_memory_()
        self.as_tensors = as_tensors
        self.allow_shell = allow_shell
        self.text_encoder = text_encoder
        self.pool_slots = pool_slots
        self._pool: BatchPool | None = None  # made in each DataLoader worker on its first batch
        self._resume: dict[str, Any] | None = None
        #: Set by PatchloomLoader: each item is a dict carrying the batch and its worker's state home,
        #: and the main process (not each worker) judges the skip guard and emptiness.
        self.carry_state = False
        # Validate the shard spec now, in the main process, so errors surface before workers start.
        self.urls = Pipeline(recipe, shards, rank, world_size, epoch, allow_shell=allow_shell).shards

    def set_epoch(self, epoch: int) -> None:
        """Call before each epoch; with persistent_workers the workers see it on their next pass."""
        self._epoch[0] = epoch

    @property
    def epoch(self) -> int:
        return int(self._epoch[0])

    def set_resume(self, state: dict[str, Any] | None) -> None:
        """The PatchloomLoader state the next pass continues from (None: none, start the epoch afresh).
        Each process's copy of the dataset applies it once: a DataLoader worker to its slot's Pipeline."""
        self._resume = state

    @property
    def resume(self) -> dict[str, Any] | None:
        """The loader state given to set_resume and not yet applied in this process, else None."""
        return self._resume

    def pipeline_for_this_worker(self) -> Pipeline:
        """This DataLoader worker's Pipeline, restored from a loaded state if one applies to it."""
        info = get_worker_info()
        wid, num_workers = (0, 1) if info is None else (info.id, info.num_workers)
        if info is not None:
            _worker_init()
        resume, self._resume = self._resume, None  # this process's copy applies it once
        if resume is not None and (resume["epoch"] != self.epoch or resume["num_workers"] != num_workers):
            resume = None
        # After a resume, DataLoader worker 0 continues the slot that was due next, so the
        # round-robin order of batches continues exactly where it stopped.
        slot = (wid + (resume["next_slot"] if resume else 0)) % num_workers
        # Under a PatchloomLoader the main process judges the skip guard and emptiness over all workers.
        pipe = Pipeline(self.recipe, self.shards, self.rank, self.world_size, self.epoch,
                        worker=slot, num_workers=num_workers, allow_shell=self.allow_shell,
                        guard=not self.carry_state, text_encoder=self.text_encoder)
        if resume is not None and str(slot) in resume["slots"]:
            pipe.load_state_dict({**resume["slots"][str(slot)], "shards": resume["shards"]})
        return pipe

    def _handover(self, batch: Any) -> Any:
        """The batch as it leaves this process: tensors (in a DataLoader worker, in a reusable shared
        slot of this worker's BatchPool, unless pool_slots is 0), or the PackedBatch itself."""
        if not self.as_tensors:
            return batch
        tensors = batch.to_torch()
        if self.pool_slots <= 0 or get_worker_info() is None:
            return tensors
        if self._pool is None:
            self._pool = BatchPool(self.pool_slots)
        return self._pool.put(tensors)

    def __iter__(self) -> Iterator[Any]:
        pipe = self.pipeline_for_this_worker()
        if not self.carry_state:
            for batch in pipe:
                yield self._handover(batch)
            return
        sent = 0

        def item(batch: Any) -> dict[str, Any]:
            # The worker's state (ledger counts included) and the skips new since the last item.
            nonlocal sent
            new = pipe.ledger.skipped[sent:]
            sent += len(new)
            return {"_slot": pipe.worker, "_state": pipe.state_dict(with_shards=False),
                    "_skips": [[s.shard, s.key, s.stage, s.reason] for s in new], "batch": batch}

        for batch in pipe:
            yield item(self._handover(batch))
        yield item(None)  # the share ended: its final ledger goes home even if it made no batch


def check_loader_state(state: Any) -> None:
    """Refuse what is not a PatchloomLoader.state_dict() of this version (StateError: start afresh)."""
    if not isinstance(state, dict):
        raise StateError(f"a loader state is the dict PatchloomLoader.state_dict() returns (got "
                         f"{type(state).__name__}); pass that, or start the epoch afresh")
    version = state.get("version")
    if version != LOADER_STATE_VERSION:
        old = isinstance(version, int) and 0 < version < LOADER_STATE_VERSION
        raise StateError(
            f"loader state version {version!r} " + ("was saved by an older patchloom and cannot be resumed: "
                                                    "start the epoch afresh" if old else
                                                    f"is unknown (this patchloom reads {LOADER_STATE_VERSION}): "
                                                    "start the epoch afresh")
        )
    kinds = {"epoch": int, "num_workers": int, "next_slot": int, "shards": list, "slots": dict}
    missing = [k for k, kind in kinds.items() if not isinstance(state.get(k), kind)]
    if missing or not all(isinstance(v, dict) for v in state["slots"].values()):
        raise StateError(f"this loader state lacks {', '.join(map(repr, missing)) or 'worker states'}: it was not "
                         "written by PatchloomLoader.state_dict(); start the epoch afresh")


class PatchloomLoader:
    """A DataLoader over a PatchloomDataset that can save its position and resume it exactly.

    Each batch carries its worker's state to the main process; `state_dict()` gathers the states
    of the batches you have consumed, so a trainer can save it with its checkpoint. Call
    `load_state_dict()` before iterating (with persistent workers: before the first iteration).

    `ledger` merges the workers' ledgers. The loader judges `source.max_skip_ratio` over it after
    every batch (SkipRatioError), and at the end of the epoch the shard share and emptiness
    (EmptyEpochError when no worker got a sample through).
    """

    def __init__(self, dataset: PatchloomDataset, *, num_workers: int = 0, persistent_workers: bool = False,
                 **loader_kwargs: Any) -> None:
        if loader_kwargs.get("batch_size", None) is not None:
            raise ValueError("items are already packed batches: PatchloomLoader always uses batch_size=None")
        loader_kwargs.pop("batch_size", None)
        self.dataset = dataset
        self.num_workers = num_workers
        dataset.carry_state = True
        self._loader = DataLoader(dataset, batch_size=None, num_workers=num_workers,
                                  persistent_workers=persistent_workers and num_workers > 0, **loader_kwargs)
        self._started = False
        self._slots: dict[str, dict] = {}
        self._skips: list[Skip] = []
        self._next_slot = 0
        self._epoch = dataset.epoch
        self._identities: list[dict[str, Any]] | None = None
        self._planned: int | None = None

    def set_epoch(self, epoch: int) -> None:
        self.dataset.set_epoch(epoch)

    def __iter__(self) -> Iterator[Any]:
        resume = self.dataset.resume
        if resume is None or resume["epoch"] != self.dataset.epoch:
            self._slots, self._next_slot = {}, 0
        self._skips = []
        it = iter(self._loader)
        self._started = True
        self._epoch = self.dataset.epoch
        if self.num_workers > 0:
            self.dataset.set_resume(None)  # the workers hold their copies now
        n = max(1, self.num_workers)
        limit = self.dataset.recipe.source.max_skip_ratio
        for item in it:
            slot = int(item["_slot"])
            self._slots[str(slot)] = item["_state"]
            self._skips.extend(Skip(*s) for s in item["_skips"])
            self._next_slot = (slot + 1) % n
            check_skip_guard(self._counts(), limit, final=False)
            if item["batch"] is not None:
                yield item["batch"]
        led = self._counts()
        check_skip_guard(led, limit, final=True)
        rank = f" on rank {self.dataset.rank} of {self.dataset.world_size}" if self.dataset.world_size > 1 else ""
        check_not_empty(led, shards=len(self.dataset.urls),
                        where=f"epoch {self._epoch}{rank} ({n} DataLoader workers together)")

    @property
    def ledger(self) -> Ledger:
        """The workers' ledgers merged: counts from their latest states, skips as they arrived."""
        merged = self._counts()
        merged.skipped = list(self._skips)
        return merged

    def _counts(self) -> Ledger:
        """The merged counts alone (judged after every batch, so without copying the skip list)."""
        merged = Ledger.merged([Ledger.from_state(self._slots[k]["ledger"]) for k in sorted(self._slots, key=int)])
        merged.shards_planned = self._shards_planned()
        return merged

    def _shards_planned(self) -> int:
        """Shard tasks of all this rank's workers, also those not heard from yet (for the guard's
        early verdict, which must hold for the whole rank)."""
        if self._planned is None:
            ds, n = self.dataset, max(1, self.num_workers)
            self._planned = sum(len(split_shards(ds.urls, slot=ds.rank * n + w, slots=ds.world_size * n))
                                for w in range(n))
        return self._planned

    def shard_identities(self) -> list[dict[str, Any]]:
        """The shards' identities, kept once in the loader state for all workers."""
        if self._identities is None:
            self._identities = [shard_identity(u) for u in self.dataset.urls]
        return self._identities

    def state_dict(self) -> dict[str, Any]:
        """JSON-able: the epoch, worker count, the shards' identities, and each worker's position
        (and ledger counts) after its last consumed batch."""
        return {"version": LOADER_STATE_VERSION, "epoch": self._epoch, "num_workers": max(1, self.num_workers),
                "shards": self.shard_identities(), "slots": dict(self._slots), "next_slot": self._next_slot}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Resume from `state_dict()`; refuses (StateError) another worker count, an older or foreign
        state, or changed shards."""
        check_loader_state(state)
        for slot_state in state["slots"].values():
            check_state(slot_state)
        change = describe_identity_change(state["shards"], self.shard_identities())
        if change is not None:
            raise StateError(f"the shards differ from the ones this state was saved over: {change}. Resume over "
                             "the same shard list with the files unchanged, or start the epoch afresh")
        if state["num_workers"] != max(1, self.num_workers):
            raise StateError(
                f"state was saved with {state['num_workers']} workers, this loader has {max(1, self.num_workers)}: "
                "resume with the same num_workers (each worker's share depends on it)"
            )
        if self._started and self._loader.persistent_workers:
            raise ValueError("load_state_dict must come before the first iteration when workers are persistent")
        self.dataset.set_epoch(int(state["epoch"]))
        self.dataset.set_resume(state)
        self._slots = dict(state["slots"])
        self._next_slot = int(state["next_slot"])
        self._epoch = int(state["epoch"])
