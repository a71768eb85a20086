"""One worker group's job, the same under every engine: run its share of the recipe's Pipeline and
write its shards (`job_pack`), or hash its batches for `verify` (`job_hash`).

Job i runs `Pipeline(recipe, shards=inputs, epoch, worker=i, num_workers=N)`; its output depends only
on the job, never on where or when it runs, so the local and Ray engines write the same bytes.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import tarfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ..packing.batch import PackedBatch
from ..pipeline import Pipeline
from ..recipe import Recipe
from .format import MTIME, TMP, StoreError, batch_digests, batch_key, encode_batch, shard_name

__all__ = ["JOBS", "ShardWriter", "batch_shape", "job_hash", "job_pack"]


class _HashingFile:
    """Write-through file wrapper that hashes and counts the bytes written (tar bytes -> sha256)."""

    def __init__(self, f) -> None:
        self.f, self.h, self.size = f, hashlib.sha256(), 0

    def write(self, data) -> int:
        self.h.update(data)
        self.size += len(data)
        return self.f.write(data)

    def flush(self) -> None:
        self.f.flush()


class ShardWriter:
    """One worker's output: rolls shards every `per_shard` batches, each written as .tmp then renamed."""

    def __init__(self, out: Path, worker: int, per_shard: int, compress: str | None = None) -> None:
        self.out, self.worker, self.per_shard, self.compress = out, worker, per_shard, compress
        self.entries: list[dict[str, Any]] = []
        self._tar = self._file = self._hashing = None
        self._tmp: Path | None = None
        self._cur: dict[str, Any] = {}

    def write(self, n: int, batch: PackedBatch) -> None:
        from webdataset.writer import TarWriter

        if self._tar is None:
            name = shard_name(self.worker, len(self.entries))
            self._tmp = self.out / (name + TMP)
            self._file = open(self._tmp, "wb")  # noqa: SIM115 - stays open across write() calls
            self._hashing = _HashingFile(self._file)
            self._tar = TarWriter(self._hashing, user="", group="", mode=0o444, encoder=False, mtime=MTIME)
            self._cur = {"name": name, "worker": self.worker, "first_batch": n, "batches": 0, "images": 0,
                         "tokens": 0, "batch_sha256": []}
        self._tar.write(encode_batch(batch_key(self.worker, n), batch, self.compress))
        cur = self._cur
        cur["batches"] += 1
        cur["images"] += batch.num_images
        cur["tokens"] += batch.num_tokens
        cur["batch_sha256"].append(batch_digests(batch)[1])
        if cur["batches"] >= self.per_shard:
            self.finish()

    def finish(self) -> None:
        if self._tar is None:
            return
        self._tar.close()
        self._file.flush()
        os.fsync(self._file.fileno())
        self._file.close()
        cur = self._cur
        cur["bytes"], cur["file_sha256"] = self._hashing.size, self._hashing.h.hexdigest()
        cur["sha256"] = hashlib.sha256("\n".join(cur["batch_sha256"]).encode("ascii")).hexdigest()
        os.replace(self._tmp, self.out / cur["name"])
        self.entries.append(cur)
        self._tar = self._file = self._hashing = self._tmp = None

    def abort(self) -> None:
        """Drop the shard in progress (its .tmp), keeping the finished ones (no manifest names them)."""
        if self._tar is not None:
            with contextlib.suppress(OSError, ValueError, tarfile.TarError):  # the shard is discarded anyway
                self._tar.close()  # close the tar stream now, not at garbage collection
        if self._file is not None:
            self._file.close()
        if self._tmp is not None and self._tmp.exists():
            self._tmp.unlink()
        self._tar = self._file = self._hashing = self._tmp = None


def batch_shape(batch: PackedBatch) -> dict[str, Any]:
    """The manifest's `batch_shape` of a batch: every batch of a pack has the same."""
    return {"rows": batch.rows, "seq_len": batch.seq_len, "max_images": batch.max_images,
            "patch_dim": int(batch.patches.shape[-1]), "dtype": str(batch.patches.dtype),
            "masked": batch.masked is not None, **({"clips": True} if batch.times is not None else {})}


def _run_pipeline(job: dict[str, Any], report: Callable[[tuple], None],
                  on_batch: Callable[[int, PackedBatch], None]) -> dict[str, Any]:
    recipe = Recipe.from_dict(job["recipe"], origin="manifest recipe")
    if job["fingerprint"] is not None and recipe.fingerprint() != job["fingerprint"]:
        raise StoreError("the recipe's fingerprint changed when it was re-read (recipe schema differs)")
    w = job["worker"]
    # One worker is the whole run: its Pipeline judges the skip guard itself (and stops early). With
    # several, each reads a share and the parent judges their merged ledgers (writer).
    pipe = Pipeline(recipe, shards=job["shards"], epoch=job["epoch"], worker=w, num_workers=job["workers"],
                    allow_shell=job["allow_shell"], guard=job["workers"] == 1)
    # pack names each failed input once from the merged ledgers (writer._judge_run); a group's own
    # warnings could repeat a shard (part readers) or be folded away by a cluster's log de-duplication
    pipe.warn_shard_errors = False
    shape: dict[str, Any] | None = None
    n = images = tokens = slots = 0
    for batch in pipe:
        this = batch_shape(batch)
        if shape is None:
            shape = this
        elif this != shape:  # every batch has the same [B, L]: anything else is a library bug
            raise StoreError(f"worker {w} batch {n} has shape {this}, earlier batches {shape}")
        on_batch(n, batch)
        n += 1
        images += batch.num_images
        tokens += batch.num_tokens
        slots += batch.segment_ids.size
        report(("tick", w, batch.num_images))
    return {"worker": w, "batches": n, "images": images, "tokens": tokens, "slots": slots, "shape": shape,
            "ledger": pipe.ledger.to_dict(), "ledger_state": pipe.ledger.state_dict()}


def job_pack(job: dict[str, Any], report: Callable[[tuple], None]) -> dict[str, Any]:
    """Pack one group into its shards; its result (counts, ledger, shard entries) for the manifest."""
    writer = ShardWriter(Path(job["out"]), job["worker"], job["per_shard"], job.get("compress"))
    try:
        result = _run_pipeline(job, report, writer.write)
        writer.finish()
        if job.get("compress") and result["shape"] is not None:
            result["shape"]["compress"] = job["compress"]  # how the batches are stored, for readers
    except BaseException:
        writer.abort()
        raise
    result["shards"] = writer.entries
    return result


def job_hash(job: dict[str, Any], report: Callable[[tuple], None]) -> dict[str, Any]:
    """Re-run one group for `verify`, keeping each batch's hashes instead of writing it."""
    digests: list[tuple[dict[str, str], str]] = []
    result = _run_pipeline(job, report, lambda n, batch: digests.append(batch_digests(batch)))
    result["digests"] = digests
    return result


JOBS = {"pack": job_pack, "hash": job_hash}
