"""PyTorch adapter: an IterableDataset whose DataLoader workers each read their own split.

Use it with `DataLoader(ds, batch_size=None, num_workers=N)`: every item is already a packed,
fixed-shape batch. A sample's tokens do not depend on num_workers (per-sample RNG rule); which
images share a batch does, since each worker packs its own share.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

try:
    import torch
    from torch.utils.data import DataLoader, IterableDataset, get_worker_info
except ImportError as exc:  # pragma: no cover - exercised only without the extra
    raise ImportError(
        "patchloom.adapters.torch needs PyTorch: pip install 'patchloom[torch]' "
        "(on CPU-only machines install torch first, e.g. pip install torch==2.13.0)"
    ) from exc

from ..pipeline import Pipeline
from ..recipe import Recipe


def _worker_init() -> None:
    """Keep each worker's decoding single-threaded (workers already run in parallel)."""
    torch.set_num_threads(1)


class PackedDataset(IterableDataset):
    """Streams PackedBatch dicts of tensors for one rank; DataLoader workers split the rank's share.

    `as_tensors=False` yields PackedBatch objects (numpy) instead.
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
    ) -> None:
        super().__init__()
        self.recipe = recipe
        self.shards = shards
        self.rank, self.world_size = rank, world_size
        # Shared memory, so set_epoch reaches persistent workers, which hold their own copy.
        self._epoch = torch.tensor([epoch], dtype=torch.int64).share_memory_()
        self.as_tensors = as_tensors
        self.allow_shell = allow_shell
        self._resume: dict[str, Any] | None = None
        self._track_state = False
        # Validate the shard spec now, in the main process, so errors surface before workers start.
        Pipeline(recipe, shards, rank, world_size, epoch, allow_shell=allow_shell)

    def set_epoch(self, epoch: int) -> None:
        """Call before each epoch; with persistent_workers the workers see it on their next pass."""
        self._epoch[0] = epoch

    @property
    def epoch(self) -> int:
        return int(self._epoch[0])

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
        pipe = Pipeline(self.recipe, self.shards, self.rank, self.world_size, self.epoch,
                        worker=slot, num_workers=num_workers, allow_shell=self.allow_shell)
        if resume is not None and str(slot) in resume["slots"]:
            pipe.load_state_dict(resume["slots"][str(slot)])
        return pipe

    def __iter__(self) -> Iterator[Any]:
        pipe = self.pipeline_for_this_worker()
        for batch in pipe:
            out = batch.to_torch() if self.as_tensors else batch
            if self._track_state:
                yield {"_slot": pipe.worker, "_state": pipe.state_dict(), "batch": out}
            else:
                yield out


class PackedLoader:
    """A DataLoader over a PackedDataset that can save its position and resume it exactly.

    Each batch carries its worker's state to the main process; `state_dict()` gathers the states
    of the batches you have consumed, so a trainer can save it with its checkpoint. Call
    `load_state_dict()` before iterating (with persistent workers: before the first iteration).
    """

    def __init__(self, dataset: PackedDataset, *, num_workers: int = 0, persistent_workers: bool = False,
                 **loader_kwargs: Any) -> None:
        if loader_kwargs.get("batch_size", None) is not None:
            raise ValueError("items are already packed batches: PackedLoader always uses batch_size=None")
        loader_kwargs.pop("batch_size", None)
        self.dataset = dataset
        self.num_workers = num_workers
        dataset._track_state = True
        self._loader = DataLoader(dataset, batch_size=None, num_workers=num_workers,
                                  persistent_workers=persistent_workers and num_workers > 0, **loader_kwargs)
        self._started = False
        self._slots: dict[str, dict] = {}
        self._next_slot = 0
        self._epoch = dataset.epoch

    def set_epoch(self, epoch: int) -> None:
        self.dataset.set_epoch(epoch)

    def __iter__(self) -> Iterator[Any]:
        resume = self.dataset._resume
        if resume is None or resume["epoch"] != self.dataset.epoch:
            self._slots, self._next_slot = {}, 0
        it = iter(self._loader)
        self._started = True
        self._epoch = self.dataset.epoch
        if self.num_workers > 0:
            self.dataset._resume = None  # the workers hold their copies now
        n = max(1, self.num_workers)
        for item in it:
            slot = int(item["_slot"])
            self._slots[str(slot)] = item["_state"]
            self._next_slot = (slot + 1) % n
            yield item["batch"]

    def state_dict(self) -> dict[str, Any]:
        """JSON-able: the epoch, worker count, and each worker's position after its last consumed batch."""
        return {"version": 1, "epoch": self._epoch, "num_workers": max(1, self.num_workers),
                "slots": dict(self._slots), "next_slot": self._next_slot}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        if state.get("version") != 1:
            raise ValueError(f"unknown loader state version {state.get('version')!r}")
        if state["num_workers"] != max(1, self.num_workers):
            raise ValueError(
                f"state was saved with {state['num_workers']} workers, this loader has {max(1, self.num_workers)}: "
                "resume with the same num_workers (each worker's share depends on it)"
            )
        if self._started and self._loader.persistent_workers:
            raise ValueError("load_state_dict must come before the first iteration when workers are persistent")
        self.dataset.set_epoch(int(state["epoch"]))
        self.dataset._resume = state
        self._slots = dict(state["slots"])
        self._next_slot = int(state["next_slot"])
        self._epoch = int(state["epoch"])
