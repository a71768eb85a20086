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
    from torch.utils.data import IterableDataset, get_worker_info
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
        # Validate the shard spec now, in the main process, so errors surface before workers start.
        Pipeline(recipe, shards, rank, world_size, epoch, allow_shell=allow_shell)

    def set_epoch(self, epoch: int) -> None:
        """Call before each epoch; with persistent_workers the workers see it on their next pass."""
        self._epoch[0] = epoch

    @property
    def epoch(self) -> int:
        return int(self._epoch[0])

    def pipeline_for_this_worker(self) -> Pipeline:
        info = get_worker_info()
        worker, num_workers = (0, 1) if info is None else (info.id, info.num_workers)
        if info is not None:
            _worker_init()
        return Pipeline(self.recipe, self.shards, self.rank, self.world_size, self.epoch,
                        worker=worker, num_workers=num_workers, allow_shell=self.allow_shell)

    def __iter__(self) -> Iterator[Any]:
        for batch in self.pipeline_for_this_worker():
            yield batch.to_torch() if self.as_tensors else batch
