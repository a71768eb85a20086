"""Store: write a recipe's packed batches to tar shards once, stream them back with no re-processing.

A packed folder holds `packed-w{worker:03d}-{k:06d}.tar` shards and a `manifest.json` beside them.
Each tar sample is one `PackedBatch`, keyed `w{worker:03d}-b{n:08d}` (n counts that worker's
batches), with members `patches.npy`, `segment_ids.npy`, `coords.npy`, `grids.npy`, `labels.npy`,
optionally `masked.npy`, and `keys.json` (UTF-8). Arrays are plain `.npy` (never pickle), stored
little-endian and C-ordered; tar headers carry a fixed time, owner and mode, so the same recipe,
inputs and worker count give byte-identical shards.

Hashes (all sha256, hex), as recorded in the manifest:

- array: over `name|dtype|shape|` (dtype as numpy's `dtype.str`, shape comma-joined) followed by the
  array's little-endian C-order bytes; `keys` hashes `keys|` followed by the keys.json bytes;
- batch: over the lines `name:array-hash`, joined by newlines, in the order patches, segment_ids,
  coords, grids, labels, masked (when present), keys;
- shard arrays: over the shard's batch hashes, one per line, in tar order.

Shards are written under a `.tmp` name and renamed when complete; the manifest is written last (also
through a temporary name), so a folder without `manifest.json` is an unfinished pack and readers
refuse it. Readers only open shards the manifest names.

Two engines run the per-worker jobs: `local` (processes on this machine) and `ray` (one Ray Data task
per job, `engine_ray`). Both build the jobs and the manifest here, and each job runs the same
`_job_pack`, so their outputs are byte-identical for the same worker count. While a Ray pack is
unfinished the folder also holds `.groups/` (one done-record per finished job, for `--resume`); it is
removed once the manifest is written.
"""

from __future__ import annotations

import argparse
import contextlib
import hashlib
import io
import json
import os
import queue as queue_mod
import shutil
import sys
import tarfile
import time
import traceback
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .batch import PackedBatch
from .pipeline import Pipeline, SampleError
from .recipe import Recipe, RecipeError
from .sources import SourceError, expand_shards, open_shard, split_shards

__all__ = [
    "FORMAT",
    "FORMAT_VERSION",
    "PackedReader",
    "StoreError",
    "VerifyResult",
    "add_store_commands",
    "batch_digests",
    "cmd_pack",
    "cmd_verify",
    "load_manifest",
    "pack_to_dir",
    "read_packed",
    "verify_dir",
]

FORMAT = "patchloom-packed"
FORMAT_VERSION = 1
MANIFEST = "manifest.json"
ARRAYS = ("patches", "segment_ids", "coords", "grids", "labels", "masked")
_REQUIRED = ("patches", "segment_ids", "coords", "grids", "labels")
_DTYPES = {"segment_ids": "int32", "coords": "int32", "grids": "int32", "labels": "int64", "masked": "bool"}
_MEMBERS = {f"{name}.npy" for name in ARRAYS} | {"keys.json"}
_MTIME = 1_700_000_000  # fixed tar member time: identical bytes run to run
_TMP = ".tmp"
_HASH_RULE = (
    "sha256; array: 'name|dtype.str|shape|' + little-endian C-order bytes; keys: 'keys|' + keys.json; "
    "batch: 'name:hex' lines in order patches, segment_ids, coords, grids, labels, masked, keys; "
    "shard: batch hex lines in tar order"
)


class StoreError(ValueError):
    """A packed folder that cannot be written or read; the message names the file and the cause."""


def shard_name(worker: int, k: int) -> str:
    return f"packed-w{worker:03d}-{k:06d}.tar"


def batch_key(worker: int, n: int) -> str:
    return f"w{worker:03d}-b{n:08d}"


# ------------------------------------------------------------------------------------------------
# Hashing and (de)serialising one batch
# ------------------------------------------------------------------------------------------------


def _canonical(arr: np.ndarray) -> np.ndarray:
    """Little-endian, C-contiguous copy (or view) of an array: what is stored and what is hashed."""
    arr = np.asarray(arr)
    return np.ascontiguousarray(arr, dtype=arr.dtype.newbyteorder("<"))


def _array_digest(name: str, arr: np.ndarray) -> str:
    a = _canonical(arr)
    h = hashlib.sha256(f"{name}|{a.dtype.str}|{','.join(map(str, a.shape))}|".encode("ascii"))
    h.update(a.data)
    return h.hexdigest()


def _keys_bytes(keys: list[list[str]]) -> bytes:
    return json.dumps(keys, ensure_ascii=False, separators=(",", ":")).encode("utf-8")


def _combine(digests: dict[str, str]) -> str:
    return hashlib.sha256("\n".join(f"{n}:{d}" for n, d in digests.items()).encode("ascii")).hexdigest()


def batch_digests(batch: PackedBatch) -> tuple[dict[str, str], str]:
    """(per-array hashes in the defined order, batch hash) of one batch."""
    digests = {name: _array_digest(name, arr) for name, arr in _ordered_arrays(batch)}
    digests["keys"] = hashlib.sha256(b"keys|" + _keys_bytes(batch.keys)).hexdigest()
    return digests, _combine(digests)


def _ordered_arrays(batch: PackedBatch) -> list[tuple[str, np.ndarray]]:
    arrays = batch.to_arrays()
    return [(name, arrays[name]) for name in ARRAYS if arrays.get(name) is not None]


def _npy_bytes(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.lib.format.write_array(buf, _canonical(arr), allow_pickle=False)
    return buf.getvalue()


def _encode_batch(key: str, batch: PackedBatch) -> dict[str, Any]:
    sample: dict[str, Any] = {"__key__": key}
    for name, arr in _ordered_arrays(batch):
        sample[f"{name}.npy"] = _npy_bytes(arr)
    sample["keys.json"] = _keys_bytes(batch.keys)
    return sample


def _decode_batch(members: dict[str, bytes], where: str, shape: dict[str, Any] | None) -> PackedBatch:
    """Members of one tar sample -> PackedBatch; refuses pickle, unknown members and wrong shapes."""
    unknown = sorted(set(members) - _MEMBERS)
    if unknown:
        raise StoreError(f"{where}: unexpected member(s) {', '.join(unknown)} (a packed batch holds only "
                         f"{', '.join(sorted(_MEMBERS))})")
    missing = [f"{n}.npy" for n in _REQUIRED if f"{n}.npy" not in members] + (
        ["keys.json"] if "keys.json" not in members else [])
    if missing:
        raise StoreError(f"{where}: missing member(s) {', '.join(missing)}")
    arrays: dict[str, np.ndarray] = {}
    for name in ARRAYS:
        data = members.get(f"{name}.npy")
        if data is None:
            continue
        try:
            arr = np.load(io.BytesIO(data), allow_pickle=False)
        except ValueError as exc:
            raise StoreError(f"{where}: {name}.npy refused: {exc.args[0].split('.')[0]} "
                             "(packed shards hold plain arrays only; pickled data is never loaded)") from None
        except (EOFError, OSError, TypeError) as exc:
            raise StoreError(f"{where}: {name}.npy is not a readable .npy array "
                             f"({type(exc).__name__}: {exc})") from None
        if not isinstance(arr, np.ndarray) or arr.dtype.hasobject:
            raise StoreError(f"{where}: {name}.npy is not a plain numeric array")
        want = _DTYPES.get(name) or (shape or {}).get("dtype")
        if want is not None and arr.dtype != np.dtype(want):
            raise StoreError(f"{where}: {name}.npy has dtype {arr.dtype}, expected {want}")
        arrays[name] = arr
    try:
        keys = json.loads(members["keys.json"].decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise StoreError(f"{where}: keys.json is not UTF-8 JSON ({exc})") from None
    b, length = arrays["segment_ids"].shape if arrays["segment_ids"].ndim == 2 else (-1, -1)
    if shape is not None:
        b, length = shape["rows"], shape["seq_len"]
        s, d = shape["max_images"], shape["patch_dim"]
        expect = {"patches": (b, length, d), "segment_ids": (b, length), "coords": (b, length, 2),
                  "grids": (b, s, 2), "labels": (b, s), "masked": (b, length)}
        for name, arr in arrays.items():
            if arr.shape != expect[name]:
                raise StoreError(f"{where}: {name}.npy has shape {arr.shape}, the manifest says {expect[name]}")
        if bool(shape.get("masked")) != ("masked" in arrays):
            raise StoreError(f"{where}: masked.npy is {'missing' if shape.get('masked') else 'unexpected'}")
    if not (isinstance(keys, list) and len(keys) == b
            and all(isinstance(row, list) and all(isinstance(k, str) for k in row) for row in keys)):
        raise StoreError(f"{where}: keys.json must be a list of {b} lists of strings")
    return PackedBatch(patches=arrays["patches"], segment_ids=arrays["segment_ids"], coords=arrays["coords"],
                       grids=arrays["grids"], labels=arrays["labels"], keys=keys, masked=arrays.get("masked"))


def _tar_samples(path: Path) -> Iterator[tuple[str, dict[str, bytes]]]:
    """(key, {member: bytes}) of one packed shard in tar order. Plain tarfile: only regular files."""
    with open(path, "rb") as f, tarfile.open(fileobj=f, mode="r|") as tar:
        key: str | None = None
        members: dict[str, bytes] = {}
        for info in tar:
            if not info.isfile():
                raise StoreError(f"{path.name}: tar entry {info.name!r} is not a regular file")
            k, dot, member = info.name.partition(".")
            if not dot or "/" in info.name:
                raise StoreError(f"{path.name}: unexpected tar entry {info.name!r}")
            if k != key:
                if key is not None:
                    yield key, members
                key, members = k, {}
            if member in members:
                raise StoreError(f"{path.name}: {info.name!r} appears twice")
            fobj = tar.extractfile(info)
            members[member] = fobj.read() if fobj is not None else b""
        if key is not None:
            yield key, members


# ------------------------------------------------------------------------------------------------
# Manifest
# ------------------------------------------------------------------------------------------------


def _versions() -> dict[str, str]:
    """Versions of the libraries that shape the output (installed distributions only)."""
    from importlib import metadata

    out = {"python": ".".join(map(str, sys.version_info[:3]))}
    for dist in ("patchloom", "numpy", "pillow", "webdataset", "pydantic", "torch", "albumentations"):
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            continue
    return out


def load_manifest(out_dir: str | Path) -> dict[str, Any]:
    """Read and check `manifest.json` of a packed folder (format name and version)."""
    path = Path(out_dir) / MANIFEST
    if not path.is_file():
        hint = " (an unfinished pack leaves shards without a manifest)" if Path(out_dir).is_dir() else ""
        raise StoreError(f"{out_dir}: no {MANIFEST}; not a packed folder{hint}")
    try:
        man = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise StoreError(f"{path}: cannot read the manifest ({exc})") from None
    if not isinstance(man, dict) or man.get("format") != FORMAT:
        raise StoreError(f"{path}: not a patchloom packed-shard manifest (format {man.get('format')!r})"
                         if isinstance(man, dict) else f"{path}: not a manifest object")
    version = man.get("version")
    if version != FORMAT_VERSION:
        newer = isinstance(version, int) and version > FORMAT_VERSION
        raise StoreError(f"{path}: manifest format version {version!r}; this patchloom reads version "
                         f"{FORMAT_VERSION}" + (" (written by a newer patchloom: upgrade)" if newer else ""))
    for name in ("recipe", "fingerprint", "epoch", "workers", "inputs", "shards"):
        if name not in man:
            raise StoreError(f"{path}: manifest lacks {name!r}")
    return man


def _write_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(path.name + _TMP)
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def _manifest_bytes(man: dict[str, Any]) -> bytes:
    return (json.dumps(man, indent=2, sort_keys=True, ensure_ascii=False) + "\n").encode("utf-8")


def _hash_input(url: str, *, allow_shell: bool) -> tuple[int, str]:
    h = hashlib.sha256()
    size = 0
    stream = open_shard(url, allow_shell=allow_shell)
    try:
        while chunk := stream.read(1 << 20):
            h.update(chunk)
            size += len(chunk)
    finally:
        stream.close()
    return size, h.hexdigest()


def _input_paths(spec: str | list[str] | None, *, allow_shell: bool) -> list[str]:
    """Expanded shard list, local paths made absolute (a sample's tokens depend on its key, not its path)."""
    urls = expand_shards(spec, allow_shell=allow_shell)
    return [u if "://" in u or u.startswith("pipe:") else os.path.abspath(u.removeprefix("file:")) for u in urls]


def _merge_ledgers(ledgers: list[dict[str, Any]]) -> dict[str, Any]:
    """Sum counts, merge counted dicts, concatenate lists (worker order)."""
    out: dict[str, Any] = {}
    for led in ledgers:
        for k, v in led.items():
            if k not in out:
                out[k] = json.loads(json.dumps(v))
            elif isinstance(v, bool) or not isinstance(v, int | float | dict | list):
                if out[k] != v:
                    out[k] = [out[k], v] if not isinstance(out[k], list) else [*out[k], v]
            elif isinstance(v, int | float):
                out[k] += v
            elif isinstance(v, list):
                out[k].extend(v)
            else:
                out[k] = _merge_ledgers([out[k], v])
    return out


# ------------------------------------------------------------------------------------------------
# Worker jobs (run in this process for workers=1, else one spawned process each)
# ------------------------------------------------------------------------------------------------


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


class _ShardWriter:
    """One worker's output: rolls shards every `per_shard` batches, each written as .tmp then renamed."""

    def __init__(self, out: Path, worker: int, per_shard: int) -> None:
        self.out, self.worker, self.per_shard = out, worker, per_shard
        self.entries: list[dict[str, Any]] = []
        self._tar = self._file = self._hashing = None
        self._tmp: Path | None = None
        self._cur: dict[str, Any] = {}

    def write(self, n: int, batch: PackedBatch) -> None:
        from webdataset.writer import TarWriter

        if self._tar is None:
            name = shard_name(self.worker, len(self.entries))
            self._tmp = self.out / (name + _TMP)
            self._file = open(self._tmp, "wb")  # noqa: SIM115 - stays open across write() calls
            self._hashing = _HashingFile(self._file)
            self._tar = TarWriter(self._hashing, user="", group="", mode=0o444, encoder=False, mtime=_MTIME)
            self._cur = {"name": name, "worker": self.worker, "first_batch": n, "batches": 0, "images": 0,
                         "tokens": 0, "batch_sha256": []}
        self._tar.write(_encode_batch(batch_key(self.worker, n), batch))
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


def _batch_shape(batch: PackedBatch) -> dict[str, Any]:
    return {"rows": batch.rows, "seq_len": batch.seq_len, "max_images": batch.max_images,
            "patch_dim": int(batch.patches.shape[-1]), "dtype": str(batch.patches.dtype),
            "masked": batch.masked is not None}


def _run_pipeline(job: dict[str, Any], report: Callable[[tuple], None],
                  on_batch: Callable[[int, PackedBatch], None]) -> dict[str, Any]:
    recipe = Recipe.from_dict(job["recipe"], origin="manifest recipe")
    if job["fingerprint"] is not None and recipe.fingerprint() != job["fingerprint"]:
        raise StoreError("the recipe's fingerprint changed when it was re-read (recipe schema differs)")
    w = job["worker"]
    pipe = Pipeline(recipe, shards=job["shards"], epoch=job["epoch"], worker=w, num_workers=job["workers"],
                    allow_shell=job["allow_shell"])
    shape: dict[str, Any] | None = None
    n = images = tokens = slots = 0
    for batch in pipe:
        this = _batch_shape(batch)
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
            "ledger": pipe.ledger.to_dict()}


def _job_pack(job: dict[str, Any], report: Callable[[tuple], None]) -> dict[str, Any]:
    writer = _ShardWriter(Path(job["out"]), job["worker"], job["per_shard"])
    try:
        result = _run_pipeline(job, report, writer.write)
        writer.finish()
    except BaseException:
        writer.abort()
        raise
    result["shards"] = writer.entries
    return result


def _job_hash(job: dict[str, Any], report: Callable[[tuple], None]) -> dict[str, Any]:
    digests: list[tuple[dict[str, str], str]] = []
    result = _run_pipeline(job, report, lambda n, batch: digests.append(batch_digests(batch)))
    result["digests"] = digests
    return result


_JOBS = {"pack": _job_pack, "hash": _job_hash}


def _child_main(kind: str, job: dict[str, Any], q) -> None:
    """Entry point of a spawned worker process: run one job, send events and the result on q."""
    try:
        result = _JOBS[kind](job, q.put)
        q.put(("done", job["worker"], result))
        code = 0
    except BaseException as exc:  # noqa: BLE001 - report everything; the parent raises it with context
        expected = isinstance(exc, StoreError | SampleError | SourceError | RecipeError)  # message says it all
        q.put(("error", job["worker"], f"{type(exc).__name__}: {exc}", "" if expected else traceback.format_exc()))
        code = 1
    # Every file this worker wrote is closed and renamed; once the queue has flushed the result, skip
    # the interpreter's teardown, which takes a second or more once torch has been imported.
    q.close()
    q.join_thread()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


def _run_jobs(kind: str, jobs: list[dict[str, Any]], *, on_tick: Callable[[int], None],
              meanwhile: Callable[[], None] | None = None) -> list[dict[str, Any]]:
    """Run one job per worker; results in worker order.

    A single job runs in this process. Several run in processes started with the `spawn` method: a
    fresh interpreter holds no copied locks or thread pools (numpy/torch may have started threads in
    the parent, and forking a threaded process can deadlock), behaves the same on Linux, macOS and
    Windows, and its output can depend only on the job it is given. The cost is an interpreter start
    per worker (a few seconds). Scripts calling this with workers > 1 need the usual
    `if __name__ == "__main__":` guard.
    """
    if len(jobs) == 1:
        if meanwhile is not None:
            meanwhile()
        return [_JOBS[kind](jobs[0], lambda ev: on_tick(ev[2]) if ev[0] == "tick" else None)]
    import multiprocessing as mp

    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    procs = [ctx.Process(target=_child_main, args=(kind, job, q), name=f"patchloom-{kind}-{job['worker']}",
                         daemon=True) for job in jobs]
    results: dict[int, dict[str, Any]] = {}
    try:
        for p in procs:
            p.start()
        if meanwhile is not None:
            meanwhile()
        while len(results) < len(jobs):
            try:
                ev = q.get(timeout=0.5)
            except queue_mod.Empty:
                for i, p in enumerate(procs):
                    if i not in results and not p.is_alive() and p.exitcode not in (0, None):
                        raise StoreError(f"worker {i} died (exit code {p.exitcode}) without a result")
                continue
            if ev[0] == "tick":
                on_tick(ev[2])
            elif ev[0] == "done":
                results[ev[1]] = ev[2]
            else:
                raise StoreError(f"worker {ev[1]} failed: {ev[2]}\n{ev[3]}".rstrip())
        for p in procs:
            p.join()
    finally:
        for p in procs:
            if p.is_alive():
                p.terminate()
                p.join()
        q.close()
    return [results[i] for i in range(len(jobs))]


def _bar(progress: bool, **kw):
    from tqdm import tqdm

    return tqdm(disable=not progress, file=sys.stderr, dynamic_ncols=True, leave=False, **kw)


# ------------------------------------------------------------------------------------------------
# pack
# ------------------------------------------------------------------------------------------------


GROUPS = ".groups"  # the Ray engine's done-records of an unfinished pack (engine_ray); gone once finished


def _ours(p: Path) -> bool:
    name = p.name
    if name in (MANIFEST, MANIFEST + _TMP, GROUPS):
        return True
    return name.startswith("packed-w") and name.endswith((".tar", ".tar" + _TMP))


def _prepare_out(out: Path, overwrite: bool, resume: bool = False) -> None:
    """Make `out` a folder fit to pack into: empty, or (overwrite) cleared of a previous pack's files.

    With `resume` the folder is left as it is: the Ray engine decides which of its files to keep.
    """
    if out.exists() and not out.is_dir():
        raise StoreError(f"output {out} exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    entries = sorted(out.iterdir())
    if not entries or resume:
        return
    if not overwrite:
        raise StoreError(f"output folder {out} is not empty ({len(entries)} entries, e.g. {entries[0].name}); "
                         "choose an empty folder or pass overwrite=True (--overwrite); to continue an "
                         "interrupted `--engine ray` pack, pass resume=True (--resume)")
    manifest = out / MANIFEST
    if manifest.exists():  # first, so the folder never looks like a finished pack of mixed shards
        manifest.unlink()
    for p in entries:
        if p.name == GROUPS and p.is_dir() and not p.is_symlink():
            shutil.rmtree(p)
        elif p.is_file() and _ours(p) and p.exists():
            p.unlink()


def _pack_jobs(recipe_dict: dict[str, Any], fingerprint: str, inputs: list[str], *, out: Path, workers: int,
               epoch: int, allow_shell: bool, per_shard: int) -> list[dict[str, Any]]:
    """One job per worker (group): job i packs `Pipeline(..., worker=i, num_workers=workers)` into out."""
    return [{"recipe": recipe_dict, "fingerprint": fingerprint, "shards": inputs, "epoch": epoch, "worker": i,
             "workers": workers, "allow_shell": allow_shell, "out": str(out), "per_shard": per_shard}
            for i in range(workers)]


def _hash_inputs(inputs: list[str], *, allow_shell: bool) -> list[dict[str, Any]]:
    """The manifest's `inputs`: path, byte count and sha256 of each input shard, in input order."""
    hashed = []
    for url in inputs:
        size, digest = _hash_input(url, allow_shell=allow_shell)
        hashed.append({"path": url, "bytes": size, "sha256": digest})
    return hashed


def _build_manifest(recipe_dict: dict[str, Any], fingerprint: str, *, epoch: int, workers: int, per_shard: int,
                    inputs: list[dict[str, Any]], results: list[dict[str, Any]]) -> dict[str, Any]:
    """The manifest of a finished pack from the per-worker job results (in worker order), whichever engine ran them."""
    shapes = {json.dumps(r["shape"], sort_keys=True) for r in results if r["shape"] is not None}
    if len(shapes) > 1:
        raise StoreError(f"workers produced different batch shapes: {sorted(shapes)}")
    batches = sum(r["batches"] for r in results)
    tokens, slots = sum(r["tokens"] for r in results), sum(r["slots"] for r in results)
    return {
        "format": FORMAT,
        "version": FORMAT_VERSION,
        "recipe": recipe_dict,
        "fingerprint": fingerprint,
        "libraries": _versions(),
        "epoch": epoch,
        "workers": workers,
        "max_batches_per_shard": per_shard,
        "hash_rule": _HASH_RULE,
        "batch_shape": next((r["shape"] for r in results if r["shape"] is not None), None),
        "inputs": inputs,
        "shards": [entry for r in results for entry in r["shards"]],
        "worker_batches": [r["batches"] for r in results],
        "ledger": _merge_ledgers([r["ledger"] for r in results]),
        "totals": {"batches": batches, "images": sum(r["images"] for r in results), "tokens": tokens,
                   "slots": slots, "padding_fraction": round(1 - tokens / slots, 6) if slots else 0.0},
    }


ENGINES = ("local", "ray")


def pack_to_dir(
    recipe: Recipe,
    out_dir: str | Path,
    *,
    shards: str | list[str] | None = None,
    workers: int = 1,
    epoch: int = 0,
    progress: bool = True,
    allow_shell: bool = False,
    max_batches_per_shard: int = 64,
    overwrite: bool = False,
    engine: str = "local",
    address: str | None = None,
    resume: bool = False,
) -> dict[str, Any]:
    """Run the recipe over its shards (or `shards`) and write the batches to `out_dir`; return the manifest.

    `workers=N` splits the work into N groups, group i packing `Pipeline(..., worker=i, num_workers=N)`
    into `packed-w{i:03d}-*.tar`; the result depends only on (recipe, inputs, workers, epoch,
    max_batches_per_shard), not on the engine. `engine="local"` runs the groups as processes on this
    machine; `engine="ray"` runs each group as one Ray Data task on the Ray cluster at `address`
    (see `engine_ray`), with the same shards and manifest byte for byte. A non-empty `out_dir` is
    refused unless `overwrite` (which removes only a previous pack's files) or, for the Ray engine,
    `resume` (which keeps the groups an interrupted run finished).
    """
    if not isinstance(recipe, Recipe):
        raise TypeError(f"pack_to_dir needs a Recipe (got {type(recipe).__name__}); use Recipe.from_file(path)")
    if workers < 1 or max_batches_per_shard < 1:
        raise StoreError(f"workers and max_batches_per_shard must be >= 1 (got {workers}, {max_batches_per_shard})")
    if engine not in ENGINES:
        raise StoreError(f"unknown engine {engine!r}; choose one of {', '.join(ENGINES)}")
    if engine == "local" and (address is not None or resume):
        raise StoreError("address and resume (--address, --resume) need engine='ray' (--engine ray); the local "
                         "engine packs from scratch (use --overwrite to replace a previous pack)")
    if overwrite and resume:
        raise StoreError("choose overwrite (start again) or resume (keep finished groups), not both")
    inputs = _input_paths(shards if shards is not None else recipe.source.shards, allow_shell=allow_shell)
    out = Path(out_dir)
    _prepare_out(out, overwrite, resume)
    recipe_dict, fingerprint = recipe.to_dict(), recipe.fingerprint()
    jobs = _pack_jobs(recipe_dict, fingerprint, inputs, out=out, workers=workers, epoch=epoch,
                      allow_shell=allow_shell, per_shard=max_batches_per_shard)
    if engine == "ray":
        from . import engine_ray

        finished = engine_ray.finished_manifest(out, jobs, resume=resume)
        if finished is not None:
            return finished
        results, hashed = engine_ray.run_pack_jobs(jobs, address=address, progress=progress, resume=resume,
                                                   hash_inputs=lambda: _hash_inputs(inputs, allow_shell=allow_shell))
    else:
        hashed = []
        with _bar(progress, desc="pack", unit=" img") as bar:
            results = _run_jobs("pack", jobs, on_tick=bar.update,
                                meanwhile=lambda: hashed.extend(_hash_inputs(inputs, allow_shell=allow_shell)))
    man = _build_manifest(recipe_dict, fingerprint, epoch=epoch, workers=workers, per_shard=max_batches_per_shard,
                          inputs=hashed, results=results)
    _write_atomic(out / MANIFEST, _manifest_bytes(man))
    if engine == "ray":
        engine_ray.forget_groups(out)
    return man


# ------------------------------------------------------------------------------------------------
# read
# ------------------------------------------------------------------------------------------------


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

    Output shards are split across `world_size * num_workers` slots as `sources.split_shards` does:
    with enough shards each slot takes whole shards, otherwise slots sharing a shard keep every k-th
    batch of it; every batch is read by exactly one slot. `worker`/`num_workers` default to torch's
    DataLoader worker info. With `check_hashes` each batch is hashed and compared to the manifest.
    `state_dict()` / `load_state_dict()` resume after the last batch yielded.
    """

    def __init__(self, out_dir: str | Path, *, rank: int = 0, world_size: int = 1, worker: int | None = None,
                 num_workers: int | None = None, check_hashes: bool = True) -> None:
        self.dir = Path(out_dir)
        self.manifest = load_manifest(self.dir)
        if (worker is None) != (num_workers is None):
            raise ValueError("give worker and num_workers together (or neither, to use torch's worker info)")
        if worker is None or num_workers is None:
            worker, num_workers = _torch_worker()
        if not 0 <= rank < world_size:
            raise ValueError(f"rank must be in 0..{world_size - 1} (got {rank})")
        if not 0 <= worker < num_workers:
            raise ValueError(f"worker must be in 0..{num_workers - 1} (got {worker})")
        self.rank, self.world_size, self.worker, self.num_workers = rank, world_size, worker, num_workers
        self.check_hashes = check_hashes
        self._entries = {s["name"]: s for s in self.manifest["shards"]}
        self.tasks = split_shards([s["name"] for s in self.manifest["shards"]],
                                  slot=rank * num_workers + worker, slots=world_size * num_workers)
        self._yielded = 0
        self._skip = 0

    def __len__(self) -> int:
        return sum(len(range(t.part, self._entries[t.url]["batches"], t.parts)) for t in self.tasks)

    @property
    def recipe(self) -> Recipe:
        return Recipe.from_dict(self.manifest["recipe"], origin=str(self.dir / MANIFEST))

    def __iter__(self) -> Iterator[PackedBatch]:
        shape = self.manifest.get("batch_shape")
        skip, self._skip = self._skip, 0
        self._yielded = skip
        for task in self.tasks:
            entry = self._entries[task.url]
            mine = len(range(task.part, entry["batches"], task.parts))
            if skip >= mine:
                skip -= mine
                continue
            path = self.dir / task.url
            if not path.is_file():
                raise StoreError(f"{self.dir}: shard {task.url} named in the manifest is missing")
            count = 0
            for index, (key, members) in enumerate(_tar_samples(path)):
                count += 1
                if index % task.parts != task.part:
                    continue
                if skip:
                    skip -= 1
                    continue
                where = f"{task.url} batch {index} ({key})"
                batch = _decode_batch(members, where, shape)
                if self.check_hashes:
                    want = entry["batch_sha256"][index] if index < len(entry["batch_sha256"]) else None
                    if batch_digests(batch)[1] != want:
                        raise StoreError(f"{where}: arrays do not hash to the manifest (corrupted or modified "
                                         f"after packing; `patchloom verify {self.dir}` says which)")
                self._yielded += 1
                yield batch
            if count != entry["batches"]:
                raise StoreError(f"{task.url}: holds {count} batches, the manifest says {entry['batches']}")

    def state_dict(self) -> dict[str, Any]:
        return {"fingerprint": self.manifest["fingerprint"], "slot": self.rank * self.num_workers + self.worker,
                "slots": self.world_size * self.num_workers, "batches": self._yielded}

    def load_state_dict(self, state: dict[str, Any]) -> None:
        if state.get("fingerprint") != self.manifest["fingerprint"]:
            raise ValueError("this state was saved for a different packed folder (fingerprints differ)")
        mine = (self.rank * self.num_workers + self.worker, self.world_size * self.num_workers)
        if (state.get("slot"), state.get("slots")) != mine:
            raise ValueError(f"state was saved for slot {state.get('slot')}/{state.get('slots')}, this reader is "
                             f"{mine[0]}/{mine[1]}")
        self._skip = self._yielded = int(state["batches"])


def read_packed(out_dir: str | Path, *, rank: int = 0, world_size: int = 1, worker: int | None = None,
                num_workers: int | None = None, check_hashes: bool = True) -> Iterator[PackedBatch]:
    """Stream a packed folder's batches for one reader slot (see PackedReader)."""
    return iter(PackedReader(out_dir, rank=rank, world_size=world_size, worker=worker, num_workers=num_workers,
                             check_hashes=check_hashes))


# ------------------------------------------------------------------------------------------------
# verify
# ------------------------------------------------------------------------------------------------


@dataclass(slots=True)
class VerifyResult:
    """Outcome of verify_dir: ok only when inputs, stored outputs and a re-run all match the manifest."""

    ok: bool
    messages: list[str] = field(default_factory=list)  # problems, the first difference first
    notes: list[str] = field(default_factory=list)  # facts that do not make the result fail
    batches: int = 0
    differing: int = 0


@dataclass(slots=True)
class _Stored:
    keys: list[str] = field(default_factory=list)
    digests: list[tuple[dict[str, str], str] | None] = field(default_factory=list)
    error: str | None = None
    size: int = 0
    sha256: str = ""


def _read_stored(path: Path, shape: dict[str, Any] | None) -> _Stored:
    st = _Stored()
    if not path.is_file():
        st.error = "missing"
        return st
    st.size = path.stat().st_size
    st.sha256 = _hash_input(str(path), allow_shell=False)[1]
    try:
        for index, (key, members) in enumerate(_tar_samples(path)):
            st.keys.append(key)
            try:
                st.digests.append(batch_digests(_decode_batch(members, f"{path.name} batch {index} ({key})", shape)))
            except StoreError as exc:
                st.digests.append(None)
                st.error = st.error or str(exc)
    except (tarfile.TarError, OSError, StoreError) as exc:
        st.error = f"cannot read: {exc}"
    return st


def _which(a: dict[str, str] | None, b: dict[str, str] | None) -> str:
    if a is None or b is None:
        return "arrays"
    names = [n for n in dict.fromkeys([*a, *b]) if a.get(n) != b.get(n)]
    return ", ".join(names) if names else "arrays"


def verify_dir(out_dir: str | Path, *, progress: bool = True, allow_shell: bool = False) -> VerifyResult:
    """Check a packed folder: inputs unchanged, stored arrays as recorded, and a re-run reproduces them.

    1. each input shard is re-hashed; a missing or changed one is reported as such and the re-run is
       skipped (its differences would only reflect the changed input);
    2. each output shard's stored arrays are hashed and compared with the manifest (corruption);
    3. the recipe is re-run with the recorded epoch and worker count and each batch's hash compared
       with the manifest; the first differing batch is named with the arrays that differ.
    """
    out = Path(out_dir)
    man = load_manifest(out)
    res = VerifyResult(ok=True)
    problems = res.messages

    # 1. inputs
    inputs_ok = True
    for inp in man["inputs"]:
        url, name = inp["path"], inp["path"].rsplit("/", 1)[-1]
        local = "://" not in url and not url.startswith("pipe:")
        if local and not os.path.isfile(url):
            problems.append(f"input shard {name} is missing ({url})")
            inputs_ok = False
            continue
        try:
            size, digest = _hash_input(url, allow_shell=allow_shell)
        except (OSError, SourceError) as exc:
            problems.append(f"input shard {name} cannot be read ({exc})")
            inputs_ok = False
            continue
        if digest != inp["sha256"]:
            problems.append(f"input shard {name} changed since packing (sha256 now {digest[:16]}…, recorded "
                            f"{inp['sha256'][:16]}…; {size} bytes, recorded {inp['bytes']}): re-pack it, or "
                            f"restore the original to verify ({url})")
            inputs_ok = False

    head = len(problems)  # the first differing batch goes right after any input problem

    # recipe as recorded
    recipe: Recipe | None = None
    try:
        recipe = Recipe.from_dict(man["recipe"], origin=str(out / MANIFEST))
        if recipe.fingerprint() != man["fingerprint"]:  # the batches below decide; this alone is no failure
            res.notes.append(f"the recorded recipe now resolves to fingerprint {recipe.fingerprint()[:16]}… "
                             f"(recorded {man['fingerprint'][:16]}…): this patchloom's recipe schema or "
                             "defaults differ from the packing one; batches compared anyway")
    except RecipeError as exc:
        problems.append(f"the manifest's recipe no longer validates: {exc}")

    # 2 and 3: stored outputs (read while the re-run workers work) and the re-run
    shape = man.get("batch_shape")
    stored: dict[str, _Stored] = {}

    def read_outputs() -> None:
        for entry in man["shards"]:
            stored[entry["name"]] = _read_stored(out / entry["name"], shape)

    rerun: list[dict[str, Any]] | None = None
    total = sum(s["batches"] for s in man["shards"])
    if inputs_ok and recipe is not None:
        workers = int(man["workers"])
        jobs = [{"recipe": man["recipe"], "fingerprint": None, "shards": [i["path"] for i in man["inputs"]],
                 "epoch": int(man["epoch"]), "worker": w, "workers": workers, "allow_shell": allow_shell}
                for w in range(workers)]
        try:
            with _bar(progress, desc="verify (re-run)", unit=" img", total=man.get("totals", {}).get("images")) as bar:
                rerun = _run_jobs("hash", jobs, on_tick=bar.update, meanwhile=read_outputs)
        except (StoreError, SourceError, SampleError) as exc:
            problems.append(f"re-running the recipe failed: {exc}")
            rerun = None
    else:
        read_outputs()
        problems.append("re-run skipped: " + ("input shards changed" if not inputs_ok else "recipe unusable"))

    first_corrupt: str | None = None
    first_rerun: str | None = None
    corrupt = differ = 0
    for entry in man["shards"]:
        name, w, first = entry["name"], entry["worker"], entry.get("first_batch", 0)
        st = stored[name]
        if st.error == "missing":
            problems.append(f"output shard {name} is missing")
            corrupt += entry["batches"]
            continue
        if len(st.digests) != entry["batches"]:
            problems.append(f"output shard {name} holds {len(st.digests)} batches, the manifest says "
                            f"{entry['batches']}")
        if st.error:
            problems.append(f"output shard {name}: {st.error}")
        shard_ok = True
        for j, want in enumerate(entry["batch_sha256"]):
            res.batches += 1
            key = batch_key(w, first + j)
            got = st.digests[j] if j < len(st.digests) else None
            again = None
            if rerun is not None:
                digests = rerun[w]["digests"]
                again = digests[first + j] if first + j < len(digests) else None
            stored_ok = got is not None and got[1] == want
            rerun_ok = rerun is None or (again is not None and again[1] == want)
            if not stored_ok:
                shard_ok = False
                corrupt += 1
                if first_corrupt is None:
                    arrays = _which(got[0] if got else None, again[0] if again and again[1] == want else None)
                    first_corrupt = (f"output shard {name} batch {j} ({key}): stored {arrays} do not match the "
                                     "manifest (the file was modified or corrupted after packing)")
            if not rerun_ok:
                differ += 1
                if first_rerun is None:
                    what = ("the re-run produced no such batch" if again is None else
                            f"{_which(again[0], got[0] if stored_ok and got else None)} differ")
                    first_rerun = f"re-run differs from the manifest at output shard {name} batch {j} ({key}): {what}"
        if st.size and st.sha256 != entry.get("file_sha256", st.sha256) and shard_ok:
            res.notes.append(f"output shard {name}: file bytes differ from the recorded file sha256 but every "
                             "batch's arrays match")
    if first_corrupt:
        problems.insert(head, first_corrupt)
        problems.append(f"{corrupt} of {total} stored batches do not match the manifest")
    if first_rerun:
        problems.insert(head + 1 if first_corrupt else head, first_rerun)
        problems.append(f"{differ} of {total} re-run batches differ from the manifest")
    if rerun is not None:
        for w, r in enumerate(rerun):
            want = (man.get("worker_batches") or [None] * len(rerun))[w]
            if want is not None and r["batches"] != want:
                problems.append(f"worker {w}: the re-run made {r['batches']} batches, the manifest records {want}")
        ledger = _merge_ledgers([r["ledger"] for r in rerun])
        recorded = man.get("ledger") or {}
        if ledger != recorded:
            def counts(d: dict[str, Any]) -> str:
                return "/".join(str(d.get(k)) for k in ("read", "emitted", "skipped"))

            problems.append(f"the re-run's ledger differs: read/emitted/skipped {counts(ledger)}, recorded "
                            f"{counts(recorded)}")
        if differ:
            now, then = _versions(), man.get("libraries", {})
            changed = [f"{k} {then.get(k)} -> {now.get(k)}" for k in sorted(set(now) | set(then))
                       if now.get(k) != then.get(k)]
            res.notes.append("library versions changed since packing: " + ", ".join(changed) if changed
                             else "library versions are the same as when packed")
    res.differing = max(corrupt, differ)
    res.ok = not problems
    return res


# ------------------------------------------------------------------------------------------------
# command line
# ------------------------------------------------------------------------------------------------


def cmd_pack(args: argparse.Namespace) -> int:
    """`patchloom pack RECIPE --out DIR`: exit 0 on success, 2 on usage, recipe or input errors."""
    started = time.perf_counter()
    shards = args.shards
    try:
        if args.recipe == "demo" and not Path(args.recipe).exists():
            from .cli import DEMO_RECIPE
            from .demodata import demo_shard_pattern

            recipe = Recipe.from_dict(DEMO_RECIPE, origin="built-in demo recipe")
            shards = shards or demo_shard_pattern("patchloom-demo")
        else:
            recipe = Recipe.from_file(args.recipe)
        man = pack_to_dir(recipe, args.out, shards=shards, workers=args.workers, epoch=args.epoch,
                          progress=not args.no_progress, allow_shell=args.allow_shell,
                          max_batches_per_shard=args.max_batches_per_shard, overwrite=args.overwrite,
                          engine=args.engine, address=args.address, resume=args.resume)
    except (StoreError, RecipeError, SourceError, SampleError) as err:
        print(f"patchloom: error: {err}", file=sys.stderr)
        return 2
    t = man["totals"]
    led = man["ledger"]
    print(f"packed {args.out}  (recipe {man['fingerprint'][:12]}, epoch {man['epoch']}, {man['workers']} worker(s))")
    print(f"  shards written   {len(man['shards'])}")
    print(f"  batches          {t['batches']}")
    print(f"  images           {t['images']}  (read {led.get('read')}, skipped {led.get('skipped')})")
    print(f"  tokens           {t['tokens']}")
    print(f"  padding          {100 * t['padding_fraction']:.1f} %")
    print(f"  seconds          {time.perf_counter() - started:.2f}")
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    """`patchloom verify DIR`: exit 0 when everything matches, 1 on a mismatch, 2 on usage errors."""
    started = time.perf_counter()
    try:
        res = verify_dir(args.dir, progress=not args.no_progress, allow_shell=args.allow_shell)
    except StoreError as err:
        print(f"patchloom: error: {err}", file=sys.stderr)
        return 2
    seconds = time.perf_counter() - started
    if res.ok:
        print(f"OK: {args.dir}: inputs unchanged; {res.batches} batches match the manifest, stored and re-run "
              f"({seconds:.2f} s)")
    else:
        print(f"MISMATCH: {args.dir}: {res.messages[0]}")
        for msg in res.messages[1:]:
            print(f"  {msg}")
    for note in res.notes:
        print(f"  note: {note}")
    return 0 if res.ok else 1


def add_store_commands(subparsers) -> None:
    """Add `pack` and `verify` to the `patchloom` command's subparsers."""
    pack = subparsers.add_parser("pack", help="run a recipe once and write its packed batches as tar shards")
    pack.add_argument("recipe", help="recipe YAML file, or `demo` for the built-in demo recipe")
    pack.add_argument("--out", required=True, help="output folder (must be empty unless --overwrite)")
    pack.add_argument("--shards", help="shard spec overriding the recipe's source.shards")
    pack.add_argument("--workers", type=int, default=1,
                      help="worker groups: processes (local) or Ray tasks (ray); the output depends on this "
                           "number, not on the engine (default: %(default)s)")
    pack.add_argument("--epoch", type=int, default=0)
    pack.add_argument("--max-batches-per-shard", type=int, default=64, help="(default: %(default)s)")
    pack.add_argument("--engine", choices=list(ENGINES), default="local",
                      help="where the worker groups run: local processes, or tasks on a Ray cluster (needs "
                           "pip install 'patchloom[ray]'); same output either way (default: %(default)s)")
    pack.add_argument("--address", default=None,
                      help="with --engine ray: the Ray cluster to use (`auto`, or HOST:PORT of the head node); "
                           "default: $RAY_ADDRESS if set, else start Ray on this machine with all its CPUs")
    pack.add_argument("--overwrite", action="store_true", help="replace a previous pack in --out")
    pack.add_argument("--resume", action="store_true",
                      help="with --engine ray: continue an interrupted pack in --out, keeping the groups it "
                           "finished (same recipe, inputs, --workers, --epoch and --max-batches-per-shard)")
    pack.add_argument("--allow-shell", action="store_true",
                      help="allow pipe: shard URLs, which run shell commands (only for shard lists you wrote)")
    pack.add_argument("--no-progress", action="store_true", help="no progress bar")
    pack.set_defaults(func=cmd_pack)

    verify = subparsers.add_parser("verify", help="check a packed folder against its inputs and a re-run")
    verify.add_argument("dir", help="packed folder (holds manifest.json)")
    verify.add_argument("--allow-shell", action="store_true", help="allow pipe: input shard URLs")
    verify.add_argument("--no-progress", action="store_true", help="no progress bar")
    verify.set_defaults(func=cmd_verify)
