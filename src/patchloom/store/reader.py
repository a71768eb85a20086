"""Reading a packed folder back: each shard indexed from its tar headers (checked against the
manifest before any member is read), batches read at their offsets, and `PackedReader`, which
splits the batches between ranks and DataLoader workers in a seeded order per epoch."""

from __future__ import annotations

import os
import sys
import tarfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ..packing.batch import PackedBatch
from ..packing.text import TextEncoder, add_text_tokens
from ..recipe import MAX_SEED, Recipe
from ..seeding import stream_rng
from .format import (
    MANIFEST,
    StoreError,
    batch_digests,
    batch_key,
    decode_batch,
    expected_arrays,
    is_int,
    member_limit,
    open_regular,
    shorten,
)
from .manifest import load_manifest

__all__ = ["PackedReader", "ShardIndex", "index_shard", "read_batch", "read_packed"]


@dataclass(slots=True)
class ShardIndex:
    """Where each batch's members lie in one shard: (key, {member: (offset, size)}) in tar order."""

    batches: list[tuple[str, dict[str, tuple[int, int]]]] = field(default_factory=list)
    error: str | None = None  # the first thing wrong with the shard's structure; batches holds those before it


def _first_nonzero(f, start: int, end: int) -> int | None:
    """Offset of the first non-zero byte in [start, end) of f (a tar ends in zero blocks), or None."""
    f.seek(start)
    pos = start
    while pos < end:
        chunk = f.read(min(1 << 20, end - pos))
        if not chunk:
            return None
        rest = chunk.lstrip(b"\0")
        if rest:
            return pos + len(chunk) - len(rest)
        pos += len(chunk)
    return None


def index_shard(f, entry: dict[str, Any], shape: dict[str, Any] | None) -> ShardIndex:
    """Index one shard from its tar headers alone (no member is read): the batches must be the ones pack wrote
    for this manifest entry, in order, each member a regular file of a known name, within the size a batch
    of the manifest's shape needs, and inside the file."""
    name, out = entry["name"], ShardIndex()
    keys = [batch_key(entry["worker"], entry["first_batch"] + j) for j in range(entry["batches"])]
    expected = expected_arrays(shape) if shape is not None else {}
    last = "the start of the file"
    try:
        size = os.fstat(f.fileno()).st_size
        f.seek(0)
        with tarfile.open(fileobj=f, mode="r:") as tar:
            for info in tar:
                key, _, member = info.name.partition(".")
                if info.type not in (tarfile.REGTYPE, tarfile.AREGTYPE):
                    raise StoreError(f"{name}: tar entry {shorten(repr(info.name))} is not a regular file")
                if not out.batches or out.batches[-1][0] != key:
                    j = len(out.batches)
                    if j >= len(keys):
                        raise StoreError(f"{name}: holds more batches than the {len(keys)} the manifest says "
                                         f"(entry {shorten(repr(info.name))})")
                    if key != keys[j]:
                        raise StoreError(f"{name}: tar entry {shorten(repr(info.name))} where batch {j} ({keys[j]}) "
                                         "was expected")
                    out.batches.append((key, {}))
                members = out.batches[-1][1]
                limit = member_limit(member, expected)
                if limit is None:
                    raise StoreError(f"{name}: unexpected tar entry {shorten(repr(info.name))} (a batch of this folder "
                                     f"holds {', '.join(sorted(f'{n}.npy' for n in expected))}, keys.json "
                                     "and maybe texts.json)")
                if member in members:
                    raise StoreError(f"{name}: {info.name!r} appears twice")
                if info.size > limit:
                    raise StoreError(f"{name}: member {info.name!r} is {info.size} bytes, more than a batch of the "
                                     f"manifest's shape holds ({limit})")
                if info.offset_data + info.size > size:
                    raise StoreError(f"{name}: cut off (the file ends inside member {info.name!r})")
                members[member] = (info.offset_data, info.size)
                last = repr(info.name)
            end = tar.offset
        bad = _first_nonzero(f, end, size)
        if bad is not None:
            raise StoreError(f"{name}: the tar breaks off at byte {bad}, after member {last} (cut off or damaged)")
        if out.batches and len(out.batches[-1][1]) < len(expected) + 1:
            raise StoreError(f"{name}: cut off (the tar ends after member {last}, inside batch "
                             f"{len(out.batches) - 1})")
    except StoreError as exc:
        out.error = str(exc)
    except (tarfile.TarError, OSError, EOFError, ValueError, OverflowError, UnicodeError, MemoryError) as exc:
        out.error = f"{name}: not a readable tar after {last} ({type(exc).__name__}: {shorten(str(exc), 120)})"
    if out.error is not None:
        if out.batches and len(out.batches[-1][1]) < len(expected) + 1:
            out.batches.pop()  # the batch the error came in is not whole
    elif len(out.batches) != entry["batches"]:
        out.error = f"{name}: holds {len(out.batches)} batches, the manifest says {entry['batches']}"
    return out


def read_batch(f, name: str, j: int, key: str, at: dict[str, tuple[int, int]],
               shape: dict[str, Any] | None) -> PackedBatch:
    """Batch j of an indexed shard, read member by member at the indexed offsets, and decoded."""
    members: dict[str, bytes] = {}
    try:
        for member, (offset, size) in at.items():
            f.seek(offset)
            data = f.read(size)
            if len(data) != size:
                raise StoreError(f"{name}: cut off (the file ends inside member {key}.{member}; did it change "
                                 "while being read?)")
            members[member] = data
    except OSError as exc:
        raise StoreError(f"{name}: cannot read batch {j} ({exc})") from None
    return decode_batch(members, f"{name} batch {j} ({key})", shape)


def _torch_worker() -> tuple[int, int]:
    """(worker id, num_workers) inside a torch DataLoader worker, else (0, 1).

    Torch is only consulted when already imported: a DataLoader worker always has it, and importing
    it just to learn we are not in one costs seconds.
    """
    if "torch" not in sys.modules:
        return 0, 1
    try:
        from torch.utils.data import get_worker_info
    except ImportError:
        return 0, 1
    info = get_worker_info()
    return (0, 1) if info is None else (int(info.id), int(info.num_workers))


class PackedReader:
    """Batches of a packed folder for one reader slot (rank x worker), read with no re-processing.

    Order: each epoch puts all stored batches in one order, seeded by (`seed`, `epoch`) and the same on
    every rank (`seed` defaults to the recipe's; `shuffle=False` keeps the stored order; call
    `set_epoch(e)` between epochs). Rank r takes positions r, r + world_size, ... of that order, and
    its DataLoader worker w (`worker`/`num_workers`, by default torch's worker info) every
    num_workers-th of the rank's batches from w. Batches are read at their tar offsets, so any order
    costs the same.

    `equalize` (default: on when world_size > 1) gives every rank the same number of batches,
    ceil(batches / world_size), so no rank waits at a collective for one that ran dry: a rank one
    short repeats the first batch of its own share (a rank with no share at all, when there are
    fewer batches than ranks, repeats batch `rank mod batches` of the epoch's order). `repeats`
    counts the repeats this reader yields (also in `stats`). Without it every batch is read exactly
    once across all slots. With `check_hashes` each batch is hashed and compared to the manifest.
    `state_dict()` / `load_state_dict()` resume after the last batch yielded, in the same epoch and order.

    Texts: a folder stores each batch's `texts` (never tokens: the encoder is code, not part of the
    recipe). With `text_encoder` (`fn(str) -> list[int]`) each batch read gets `text_tokens` and
    `text_lengths` under the recorded recipe's `text.max_tokens`; `texts_truncated` counts the
    samples whose text this reader cut.
    """

    def __init__(self, out_dir: str | Path, *, rank: int = 0, world_size: int = 1, worker: int | None = None,
                 num_workers: int | None = None, check_hashes: bool = True, seed: int | None = None,
                 epoch: int = 0, shuffle: bool = True, equalize: bool | None = None,
                 text_encoder: TextEncoder | None = None) -> None:
        self.dir = Path(out_dir)
        self.manifest = load_manifest(self.dir)
        self.text_encoder = text_encoder
        self.texts_truncated = 0
        self._text_max = self.recipe.text.max_tokens if text_encoder is not None else 0
        if (worker is None) != (num_workers is None):
            raise ValueError("give worker and num_workers together (or neither, to use torch's worker info)")
        if worker is None or num_workers is None:
            worker, num_workers = _torch_worker()
        if not 0 <= rank < world_size:
            raise ValueError(f"rank must be in 0..{world_size - 1} (got {rank})")
        if not 0 <= worker < num_workers:
            raise ValueError(f"worker must be in 0..{num_workers - 1} (got {worker})")
        seed = self.manifest["recipe"].get("seed", 0) if seed is None else seed
        if not is_int(seed, 0, MAX_SEED) or not is_int(epoch, 0, 2**63 - 1):
            raise ValueError(f"seed and epoch must be integers >= 0 (got {seed!r}, {epoch!r})")
        self.rank, self.world_size, self.worker, self.num_workers = rank, world_size, worker, num_workers
        self.check_hashes = check_hashes
        self.seed, self.epoch, self.shuffle = seed, epoch, bool(shuffle)
        self.equalize = world_size > 1 if equalize is None else bool(equalize)
        self._entries = self.manifest["shards"]
        self._starts = np.cumsum([0] + [e["batches"] for e in self._entries])  # global number of each shard's 1st
        self._index: dict[str, ShardIndex] = {}
        self._yielded = 0
        self._skip = 0

    def set_epoch(self, epoch: int) -> None:
        """Read epoch `epoch` on the next iteration (another order; the same on every rank)."""
        if not is_int(epoch, 0, 2**63 - 1):
            raise ValueError(f"epoch must be an integer >= 0 (got {epoch!r})")
        if epoch != self.epoch:
            self._skip = 0  # a loaded position belongs to the epoch it was saved in
        self.epoch = epoch

    def _plan(self) -> tuple[np.ndarray, int]:
        """Global batch numbers this reader yields in the current epoch, in order, and how many are repeats."""
        total = int(self._starts[-1])
        order = (stream_rng(self.seed, self.epoch, "packed-batch-order").permutation(total) if self.shuffle
                 else np.arange(total))
        share = order[self.rank :: self.world_size]
        extra = 0
        if self.equalize and total:
            extra = -(-total // self.world_size) - len(share)
            if extra > 0:
                pool = share if len(share) else order[[self.rank % total]]
                share = np.concatenate([share, np.resize(pool, extra)])
        first_repeat = len(share) - max(extra, 0)
        positions = np.arange(self.worker, len(share), self.num_workers)
        return share[positions], int(np.count_nonzero(positions >= first_repeat))

    def __len__(self) -> int:
        return len(self._plan()[0])

    @property
    def repeats(self) -> int:
        """Batches this reader yields a second time this epoch so that every rank yields as many (equalize)."""
        return self._plan()[1]

    @property
    def stats(self) -> dict[str, int]:
        """This reader's epoch: batches it yields (repeats included), repeats, and batches yielded so far."""
        plan, repeats = self._plan()
        return {"epoch": self.epoch, "batches": len(plan), "repeats": repeats, "yielded": self._yielded,
                "texts_truncated": self.texts_truncated}

    @property
    def recipe(self) -> Recipe:
        return Recipe.from_dict(self.manifest["recipe"], origin=str(self.dir / MANIFEST))

    def __iter__(self) -> Iterator[PackedBatch]:
        plan, _ = self._plan()
        skip, self._skip = self._skip, 0
        self._yielded = skip
        for g in plan[skip:]:
            batch = self._batch(int(g))
            self._yielded += 1
            yield batch

    def _batch(self, g: int) -> PackedBatch:
        """Global batch g: found through its shard's index (built on first use), read, checked."""
        s = int(np.searchsorted(self._starts, g, side="right")) - 1
        entry, j = self._entries[s], g - int(self._starts[s])
        name, shape = entry["name"], self.manifest.get("batch_shape")
        try:
            f = open_regular(self.dir / name, "packed shards")
        except FileNotFoundError:
            raise StoreError(f"{self.dir}: shard {name} named in the manifest is missing") from None
        except OSError as exc:
            raise StoreError(f"{self.dir / name}: cannot open ({exc})") from None
        with f:
            index = self._index.get(name)
            if index is None:
                index = self._index[name] = index_shard(f, entry, shape)
            if index.error is not None:
                raise StoreError(index.error)
            key, at = index.batches[j]
            batch = read_batch(f, name, j, key, at, shape)
        if self.check_hashes and batch_digests(batch)[1] != entry["batch_sha256"][j]:
            raise StoreError(f"{name} batch {j} ({key}): arrays do not hash to the manifest (corrupted or modified "
                             f"after packing; `patchloom verify {self.dir}` says which)")
        if self.text_encoder is not None:
            self.texts_truncated += add_text_tokens(batch, self.text_encoder, self._text_max)
        return batch

    def state_dict(self) -> dict[str, Any]:
        return {"fingerprint": self.manifest["fingerprint"], "slot": self.rank * self.num_workers + self.worker,
                "slots": self.world_size * self.num_workers, "seed": self.seed, "epoch": self.epoch,
                "shuffle": self.shuffle, "equalize": self.equalize, "batches": self._yielded}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        """Continue after the saved batch: same folder, slot and order settings; the saved epoch is restored."""
        if state.get("fingerprint") != self.manifest["fingerprint"]:
            raise ValueError("this state was saved for a different packed folder (fingerprints differ)")
        mine = (self.rank * self.num_workers + self.worker, self.world_size * self.num_workers)
        if (state.get("slot"), state.get("slots")) != mine:
            raise ValueError(f"state was saved for slot {state.get('slot')}/{state.get('slots')}, this reader is "
                             f"{mine[0]}/{mine[1]}")
        for name in ("seed", "shuffle", "equalize"):
            if state.get(name) != getattr(self, name):
                raise ValueError(f"state was saved with {name}={state.get(name)!r}, this reader has "
                                 f"{getattr(self, name)!r}")
        epoch, batches = state.get("epoch"), state.get("batches")
        if not is_int(epoch, 0, 2**63 - 1) or not is_int(batches, 0, 2**63 - 1):
            raise ValueError(f"state has epoch {epoch!r} and batches {batches!r}; both must be integers >= 0")
        self.epoch = epoch
        self._skip = self._yielded = batches


def read_packed(out_dir: str | Path, *, rank: int = 0, world_size: int = 1, worker: int | None = None,
                num_workers: int | None = None, check_hashes: bool = True, seed: int | None = None,
                epoch: int = 0, shuffle: bool = True, equalize: bool | None = None,
                text_encoder: TextEncoder | None = None) -> Iterator[PackedBatch]:
    """Stream a packed folder's batches for one reader slot: a seeded order per epoch, the same number of
    batches on every rank when world_size > 1, texts tokenized on read by `text_encoder` (see PackedReader)."""
    return iter(PackedReader(out_dir, rank=rank, world_size=world_size, worker=worker, num_workers=num_workers,
                             check_hashes=check_hashes, seed=seed, epoch=epoch, shuffle=shuffle, equalize=equalize,
                             text_encoder=text_encoder))
