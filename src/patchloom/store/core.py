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
refuse it. Readers only open shards the manifest names. A pack whose run loses too much (the skip
guard, `source.max_skip_ratio`, judged over all workers together) or yields no batch writes no
manifest.

A packed folder may come from anywhere, so nothing in it is trusted: every manifest field is checked
(types, ranges, list lengths, shard names exactly as pack writes them, so no name leaves the folder)
before it decides what is read or how many processes run; a shard's tar headers are checked against
the manifest before any member is read, member sizes against the batch shape, and `.npy` headers
before an array is allocated. Every problem is a StoreError naming the file and what is wrong.
`verify` re-hashes an input only when it is both in the recorded input list and yielded now by the
recorded shard spec (or by `--shards`), and only regular files or the recorded URLs.

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
import math
import os
import queue as queue_mod
import re
import shutil
import signal
import stat
import sys
import tarfile
import threading
import time
import traceback
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import braceexpand
import numpy as np

from ..errors import PatchloomError
from ..pack.batch import PackedBatch
from ..pipeline import (
    EmptyEpochError,
    Ledger,
    Pipeline,
    SampleError,
    SkipRatioError,
    check_not_empty,
    check_skip_guard,
)
from ..recipe.schema import MAX_SEED, Recipe, RecipeError
from ..seeding import stream_rng
from ..read.shards import SHELL_PREFIXES, SourceError, expand_shards, open_shard

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
_DTYPES = {"segment_ids": "int32", "coords": "int32", "grids": "int32", "labels": "int64", "masked": "bool"}
_PATCH_DTYPES = ("uint8", "float16", "float32")
_MTIME = 1_700_000_000  # fixed tar member time: identical bytes run to run
_TMP = ".tmp"
_HASH_RULE = (
    "sha256; array: 'name|dtype.str|shape|' + little-endian C-order bytes; keys: 'keys|' + keys.json; "
    "batch: 'name:hex' lines in order patches, segment_ids, coords, grids, labels, masked, keys; "
    "shard: batch hex lines in tar order"
)


# Limits on what a packed folder may make us read or allocate (a folder may come from anywhere).
_SHARD_NAME = re.compile(r"packed-w[0-9]{3,}-[0-9]{6,}\.tar")
_HEX64 = re.compile(r"[0-9a-f]{64}")
_MAX_WORKERS = 4096  # worker groups a manifest may record; at most os.cpu_count() of them run at once
_MAX_DIM = 1 << 24  # largest rows, seq_len, max_images or patch_dim a manifest may record
_MANIFEST_MAX_BYTES = 512 << 20  # about 7 million batches' hashes
_KEYS_MAX_BYTES = 64 << 20  # one batch's keys.json
_NPY_HEADER_MAX = 10 + 65_535  # magic, version, header length and a version 1.0 header
_PR_SET_PDEATHSIG = 1  # linux/prctl.h
_ORPHANED = 70  # exit status of a worker process whose parent died


class StoreError(PatchloomError, ValueError):
    """A packed folder that cannot be written or read; the message names the file and the cause."""


def shard_name(worker: int, k: int) -> str:
    """File name of worker's k-th output shard: the only names a manifest may list."""
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


_SURROGATE = re.compile("[\ud800-\udfff]")


def _json_text(obj: Any, **kw: Any) -> str:
    """JSON text (UTF-8 as is) that always encodes: a lone surrogate (an undecodable byte of a file name)
    becomes a \\uXXXX escape, which reads back as the same string."""
    text = json.dumps(obj, ensure_ascii=False, **kw)
    if _SURROGATE.search(text) is None:
        return text
    escaped = _SURROGATE.sub(lambda m: f"\\u{ord(m.group()):04x}", text)
    # JSON reads an escaped high+low pair back as one character: write what reads back, so the bytes,
    # and the hash over them, are the same after a round trip.
    return _SURROGATE.sub(lambda m: f"\\u{ord(m.group()):04x}",
                          json.dumps(json.loads(escaped), ensure_ascii=False, **kw))


def _keys_bytes(keys: list[list[str]]) -> bytes:
    return _json_text(keys, separators=(",", ":")).encode("utf-8")


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
    """One batch as tar members named `{key}.{member}`: the key is ours (batch_key), never a sample's."""
    sample: dict[str, Any] = {"__key__": key}
    for name, arr in _ordered_arrays(batch):
        sample[f"{name}.npy"] = _npy_bytes(arr)
    keys = _keys_bytes(batch.keys)
    if len(keys) > _KEYS_MAX_BYTES:
        raise StoreError(f"batch {key}: its sample keys take {len(keys)} bytes of JSON, over the "
                         f"{_KEYS_MAX_BYTES >> 20} MiB a reader accepts; use shorter sample keys")
    sample["keys.json"] = keys
    return sample


def _expected_arrays(shape: dict[str, Any]) -> dict[str, tuple[tuple[int, ...], np.dtype]]:
    """Shape and (little-endian) dtype of each array a batch of the manifest's `batch_shape` holds."""
    b, length, s, d = shape["rows"], shape["seq_len"], shape["max_images"], shape["patch_dim"]
    shapes = {"patches": (b, length, d), "segment_ids": (b, length), "coords": (b, length, 2),
              "grids": (b, s, 2), "labels": (b, s), "masked": (b, length)}
    names = [n for n in ARRAYS if n != "masked" or shape["masked"]]
    return {n: (shapes[n], np.dtype(_DTYPES.get(n) or shape["dtype"]).newbyteorder("<")) for n in names}


def _member_limit(member: str, expected: dict[str, tuple[tuple[int, ...], np.dtype]]) -> int | None:
    """Most bytes a member of a batch can hold (None: no such member in a batch of this shape)."""
    if member == "keys.json":
        return _KEYS_MAX_BYTES
    name, _, ext = member.partition(".")
    if ext != "npy" or name not in expected:
        return None
    dims, dtype = expected[name]
    return _NPY_HEADER_MAX + math.prod(dims) * dtype.itemsize


def _load_npy(data: bytes, name: str, where: str, dims: tuple[int, ...], dtype: np.dtype) -> np.ndarray:
    """One .npy member as an array, its header checked (dtype, order, shape, byte count) before anything is
    allocated; object arrays and pickles are refused."""
    if not data.startswith(b"\x93NUMPY"):
        what = "This file contains pickled data" if data[:1] == b"\x80" else "not a .npy array (no .npy magic)"
        raise StoreError(f"{where}: {name}.npy refused: {what} (packed shards hold plain arrays only; pickled "
                         "data is never loaded)")
    f = io.BytesIO(data)
    try:
        version = np.lib.format.read_magic(f)
        if version == (1, 0):
            got_dims, fortran, got_dtype = np.lib.format.read_array_header_1_0(f, max_header_size=_NPY_HEADER_MAX)
        elif version == (2, 0):
            got_dims, fortran, got_dtype = np.lib.format.read_array_header_2_0(f, max_header_size=_NPY_HEADER_MAX)
        else:
            raise StoreError(f"{where}: {name}.npy is .npy format {version[0]}.{version[1]}; packed shards use 1.0")
    except StoreError:
        raise
    except Exception as exc:  # noqa: BLE001 - a damaged header may fail in many ways; all mean the same here
        raise StoreError(f"{where}: {name}.npy has an unreadable .npy header ({type(exc).__name__}: "
                         f"{_short(str(exc), 120)})") from None
    if got_dtype.hasobject:
        raise StoreError(f"{where}: {name}.npy refused: Object arrays cannot be loaded (packed shards hold plain "
                         "arrays only; pickled data is never loaded)")
    if got_dtype != dtype:
        raise StoreError(f"{where}: {name}.npy has dtype {got_dtype.str}, expected {dtype.str}")
    if fortran:
        raise StoreError(f"{where}: {name}.npy is stored in Fortran order; packed shards store C order")
    if tuple(got_dims) != dims:
        raise StoreError(f"{where}: {name}.npy has shape {tuple(got_dims)}, the manifest says {dims}")
    count = math.prod(dims)
    if len(data) - f.tell() != count * dtype.itemsize:
        raise StoreError(f"{where}: {name}.npy holds {len(data) - f.tell()} bytes of array data, its shape needs "
                         f"{count * dtype.itemsize} (cut off or padded)")
    return np.frombuffer(data, dtype=dtype, count=count, offset=f.tell()).reshape(dims).copy()


def _load_keys(data: bytes, where: str, rows: int, max_images: int) -> list[list[str]]:
    try:
        keys = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError, MemoryError) as exc:
        raise StoreError(f"{where}: keys.json is not UTF-8 JSON ({type(exc).__name__}: "
                         f"{_short(str(exc), 120)})") from None
    if not (isinstance(keys, list) and len(keys) == rows
            and all(isinstance(row, list) and len(row) <= max_images and all(isinstance(k, str) for k in row)
                    for row in keys)):
        raise StoreError(f"{where}: keys.json must be a list of {rows} lists of at most {max_images} strings")
    return keys


def _decode_batch(members: dict[str, bytes], where: str, shape: dict[str, Any] | None) -> PackedBatch:
    """Members of one tar sample -> PackedBatch; refuses pickle, unknown or missing members, wrong shapes."""
    if shape is None:
        raise StoreError(f"{where}: the manifest records no batch shape, so no batch can be read")
    expected = _expected_arrays(shape)
    allowed = {f"{n}.npy" for n in expected} | {"keys.json"}
    unknown = sorted(set(members) - allowed)
    if unknown:
        raise StoreError(f"{where}: unexpected member(s) {', '.join(unknown)} (a batch of this folder holds only "
                         f"{', '.join(sorted(allowed))})")
    missing = sorted(allowed - set(members))
    if missing:
        raise StoreError(f"{where}: missing member(s) {', '.join(missing)}")
    arrays = {n: _load_npy(members[f"{n}.npy"], n, where, *expected[n]) for n in expected}
    keys = _load_keys(members["keys.json"], where, shape["rows"], shape["max_images"])
    return PackedBatch(patches=arrays["patches"], segment_ids=arrays["segment_ids"], coords=arrays["coords"],
                       grids=arrays["grids"], labels=arrays["labels"], keys=keys, masked=arrays.get("masked"))


# ------------------------------------------------------------------------------------------------
# Reading files of a packed folder (none of them trusted)
# ------------------------------------------------------------------------------------------------


def _short(text: str, limit: int = 60) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _open_regular(path: str | Path, what: str = "files"):
    """Open a local file for reading, refusing anything but a regular file (a FIFO or device could block or
    never end). Raises OSError (e.g. FileNotFoundError) or StoreError."""
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_BINARY", 0))
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise StoreError(f"{path}: not a regular file (a folder, device or pipe); {what} must be plain files")
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


@dataclass(slots=True)
class _Index:
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


def _index_shard(f, entry: dict[str, Any], shape: dict[str, Any] | None) -> _Index:
    """Index one shard from its tar headers alone (no member is read): the batches must be the ones pack wrote
    for this manifest entry, in order, each member a regular file of a known name, within the size a batch
    of the manifest's shape needs, and inside the file."""
    name, out = entry["name"], _Index()
    keys = [batch_key(entry["worker"], entry["first_batch"] + j) for j in range(entry["batches"])]
    expected = _expected_arrays(shape) if shape is not None else {}
    last = "the start of the file"
    try:
        size = os.fstat(f.fileno()).st_size
        f.seek(0)
        with tarfile.open(fileobj=f, mode="r:") as tar:
            for info in tar:
                key, _, member = info.name.partition(".")
                if info.type not in (tarfile.REGTYPE, tarfile.AREGTYPE):
                    raise StoreError(f"{name}: tar entry {_short(repr(info.name))} is not a regular file")
                if not out.batches or out.batches[-1][0] != key:
                    j = len(out.batches)
                    if j >= len(keys):
                        raise StoreError(f"{name}: holds more batches than the {len(keys)} the manifest says "
                                         f"(entry {_short(repr(info.name))})")
                    if key != keys[j]:
                        raise StoreError(f"{name}: tar entry {_short(repr(info.name))} where batch {j} ({keys[j]}) "
                                         "was expected")
                    out.batches.append((key, {}))
                members = out.batches[-1][1]
                limit = _member_limit(member, expected)
                if limit is None:
                    raise StoreError(f"{name}: unexpected tar entry {_short(repr(info.name))} (a batch of this folder "
                                     f"holds {', '.join(sorted(f'{n}.npy' for n in expected))} and keys.json)")
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
        out.error = f"{name}: not a readable tar after {last} ({type(exc).__name__}: {_short(str(exc), 120)})"
    if out.error is not None:
        if out.batches and len(out.batches[-1][1]) < len(expected) + 1:
            out.batches.pop()  # the batch the error came in is not whole
    elif len(out.batches) != entry["batches"]:
        out.error = f"{name}: holds {len(out.batches)} batches, the manifest says {entry['batches']}"
    return out


def _read_batch(f, name: str, j: int, key: str, at: dict[str, tuple[int, int]],
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
    return _decode_batch(members, f"{name} batch {j} ({key})", shape)


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


def _refuse_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a number a manifest holds")


def _finite(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"{_short(text, 20)} is out of range")
    return value


def _read_json(path: Path, what: str, limit: int) -> Any:
    """JSON of a file we did not just write: size-capped, finite numbers only, every failure a StoreError."""
    try:
        with _open_regular(path, what) as f:
            if os.fstat(f.fileno()).st_size > limit:
                raise StoreError(f"{path}: the {what} is over {limit >> 20} MiB, larger than any patchloom writes")
            data = f.read()
    except OSError as exc:
        raise StoreError(f"{path}: cannot read the {what} ({exc})") from None
    try:
        return json.loads(data.decode("utf-8"), parse_constant=_refuse_constant, parse_float=_finite)
    except (UnicodeDecodeError, ValueError, RecursionError, MemoryError) as exc:  # ValueError: JSON, huge ints
        raise StoreError(f"{path}: the {what} is not valid JSON ({type(exc).__name__}: "
                         f"{_short(str(exc), 120)})") from None


def load_manifest(out_dir: str | Path) -> dict[str, Any]:
    """Read `manifest.json` of a packed folder and check every field it holds (see _check_manifest)."""
    path = Path(out_dir) / MANIFEST
    if not path.is_file():
        hint = " (an unfinished pack leaves shards without a manifest)" if Path(out_dir).is_dir() else ""
        raise StoreError(f"{out_dir}: no {MANIFEST}; not a packed folder{hint}")
    man = _read_json(path, "manifest", _MANIFEST_MAX_BYTES)
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
    _check_manifest(man, path)
    return man


def _is_int(value: Any, lo: int, hi: int) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and lo <= value <= hi


class _Fields:
    """Checks of one untrusted JSON document; the first failure is a StoreError naming the file and field."""

    def __init__(self, path: Path | str) -> None:
        self.path = path

    def need(self, ok: bool, name: str, want: str, got: Any) -> None:
        if not ok:
            raise StoreError(f"{self.path}: manifest field {name} must be {want}, got {_short(repr(got))} (the "
                             "manifest was modified or damaged: restore it, or pack the folder again)")

    def integer(self, d: dict[str, Any], key: str, name: str, lo: int = 0, hi: int = 2**63 - 1) -> int:
        self.need(_is_int(d.get(key), lo, hi), name, f"an integer in {lo}..{hi}", d.get(key))
        return d[key]

    def sha(self, d: dict[str, Any], key: str, name: str) -> str:
        value = d.get(key)
        self.need(isinstance(value, str) and _HEX64.fullmatch(value) is not None, name, "a sha256 hex string", value)
        return value

    def obj(self, value: Any, name: str) -> dict[str, Any]:
        self.need(isinstance(value, dict), name, "an object", value)
        return value

    def seq(self, value: Any, name: str) -> list[Any]:
        self.need(isinstance(value, list), name, "a list", value)
        return value


def _check_shard_entries(fields: _Fields, entries: Any, *, workers: int, per_shard: int,
                         name: str = "shards") -> list[int]:
    """The manifest's shard list, as pack writes it: worker order, names `shard_name(worker, k)` (so every
    name is a plain file name in the folder), batch numbers contiguous, one sha256 per batch. Returns the
    batches of each worker."""
    per_worker = [0] * workers
    count = [0] * workers
    previous = 0
    for i, entry in enumerate(fields.seq(entries, name)):
        at = f"{name}[{i}]"
        fields.obj(entry, at)
        w = fields.integer(entry, "worker", f"{at}.worker", previous, workers - 1)
        previous = w
        want = shard_name(w, count[w])
        fields.need(entry.get("name") == want, f"{at}.name", f"{want!r} (the names pack writes, in order)",
                    entry.get("name"))
        fields.need(entry.get("first_batch") == per_worker[w], f"{at}.first_batch",
                    f"{per_worker[w]} (the worker's batches so far)", entry.get("first_batch"))
        n = fields.integer(entry, "batches", f"{at}.batches", 1, per_shard)
        hashes = fields.seq(entry.get("batch_sha256"), f"{at}.batch_sha256")
        fields.need(len(hashes) == n, f"{at}.batch_sha256", f"a list of {n} hashes", hashes)
        for j in range(n):
            fields.sha({"h": hashes[j]}, "h", f"{at}.batch_sha256[{j}]")
        for key in ("sha256", "file_sha256"):
            fields.sha(entry, key, f"{at}.{key}")
        for key in ("bytes", "images", "tokens"):
            fields.integer(entry, key, f"{at}.{key}")
        per_worker[w] += n
        count[w] += 1
    return per_worker


def _check_manifest(man: dict[str, Any], path: Path | str) -> None:
    """Every field a reader, `verify` or a resumed pack acts on, checked before it is used: types, ranges,
    list lengths and the consistency of counts, so a damaged or hostile manifest cannot name files outside
    the folder, start processes by the thousand or crash a reader with a bare exception."""
    f = _Fields(path)
    recipe = f.obj(man["recipe"], "recipe")
    seed = recipe.get("seed", 0)
    f.need(_is_int(seed, 0, MAX_SEED), "recipe.seed", f"an integer in 0..{MAX_SEED}", seed)
    fp = man["fingerprint"]
    f.need(isinstance(fp, str) and re.fullmatch(r"[0-9a-f]{16,128}", fp) is not None, "fingerprint",
           "a hex string", fp)
    f.integer(man, "epoch", "epoch", 0, 2**31 - 1)
    workers = f.integer(man, "workers", "workers", 1, _MAX_WORKERS)
    per_shard = f.integer(man, "max_batches_per_shard", "max_batches_per_shard", 1, 2**31 - 1)
    for key in ("libraries", "ledger", "totals"):
        if key in man:
            f.obj(man[key], key)
    for i, inp in enumerate(f.seq(man["inputs"], "inputs")):
        f.obj(inp, f"inputs[{i}]")
        p = inp.get("path")
        f.need(isinstance(p, str) and 0 < len(p) <= 65536 and "\0" not in p, f"inputs[{i}].path", "a path or URL", p)
        f.integer(inp, "bytes", f"inputs[{i}].bytes")
        f.sha(inp, "sha256", f"inputs[{i}].sha256")
    if "input_spec" in man:
        spec = f.seq(man["input_spec"], "input_spec")
        f.need(all(isinstance(s, str) and s.strip() and "\0" not in s for s in spec), "input_spec",
               "a list of shard specs", spec)
    per_worker = _check_shard_entries(f, man["shards"], workers=workers, per_shard=per_shard)
    f.need(man.get("worker_batches") == per_worker, "worker_batches",
           f"the batches of each of the {workers} workers ({_short(repr(per_worker))})", man.get("worker_batches"))
    total = sum(per_worker)
    totals = man.get("totals", {})
    f.need(totals.get("batches", total) == total, "totals.batches", str(total), totals.get("batches"))
    if "images" in totals:
        f.integer(totals, "images", "totals.images")
    shape = man.get("batch_shape")
    if shape is None and total == 0:
        return
    f.obj(shape, "batch_shape")
    for key in ("rows", "seq_len", "max_images", "patch_dim"):
        f.integer(shape, key, f"batch_shape.{key}", 1, _MAX_DIM)
    f.need(shape.get("dtype") in _PATCH_DTYPES, "batch_shape.dtype", f"one of {', '.join(_PATCH_DTYPES)}",
           shape.get("dtype"))
    f.need(isinstance(shape.get("masked"), bool), "batch_shape.masked", "true or false", shape.get("masked"))


def _write_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(path.name + _TMP)
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def _manifest_bytes(man: dict[str, Any]) -> bytes:
    return (_json_text(man, indent=2, sort_keys=True) + "\n").encode("utf-8")


def _is_local(url: str) -> bool:
    return "://" not in url and not url.startswith(SHELL_PREFIXES)


def _hash_input(url: str, *, allow_shell: bool) -> tuple[int, str]:
    """(bytes, sha256) of a shard: a local one only when it is a regular file, a URL through open_shard."""
    h = hashlib.sha256()
    size = 0
    if _is_local(url):
        stream = _open_regular(url.removeprefix("file:"), "shards")
    else:
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
    return [os.path.abspath(u.removeprefix("file:")) if _is_local(u) else u for u in urls]


def _spec_items(spec: str | list[str]) -> list[str]:
    """The shard spec as pack expanded it, local items brace-expanded and made absolute (globs kept): the
    manifest's `input_spec`, which verify expands again to confirm the recorded inputs."""
    out: list[str] = []
    for item in [spec] if isinstance(spec, str) else list(spec):
        item = item.strip()
        if not _is_local(item):
            out.append(item)
            continue
        out.extend(os.path.join(os.getcwd(), os.path.expanduser(one.removeprefix("file:")))
                   for one in braceexpand.braceexpand(item))
    return out


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _merge_ledgers(ledgers: list[dict[str, Any]]) -> dict[str, Any]:
    """Sum counts, merge counted dicts, concatenate lists (worker order). Fields some ledgers lack, or of
    other types (a newer Pipeline's), are kept as they come, never a crash."""
    out: dict[str, Any] = {}
    for led in ledgers:
        for k, v in led.items():
            have = out.get(k)
            if k not in out:
                out[k] = json.loads(json.dumps(v))
            elif _is_number(v) and _is_number(have):
                out[k] = have + v
            elif isinstance(v, list) and isinstance(have, list):
                have.extend(json.loads(json.dumps(v)))
            elif isinstance(v, dict) and isinstance(have, dict):
                out[k] = _merge_ledgers([have, v])
            elif have != v:
                out[k] = [*have, v] if isinstance(have, list) else [have, v]
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
    # One worker is the whole run: its Pipeline judges the skip guard itself (and stops early). With
    # several, each reads a share and the parent judges their merged ledgers (_judge_run).
    pipe = Pipeline(recipe, shards=job["shards"], epoch=job["epoch"], worker=w, num_workers=job["workers"],
                    allow_shell=job["allow_shell"], guard=job["workers"] == 1)
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
            "ledger": pipe.ledger.to_dict(), "ledger_state": pipe.ledger.state_dict()}


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


def _die_with_parent(parent: int, lifeline) -> None:
    """End this worker process as soon as the process that started it ends (SIGKILL included), instead of
    packing on for nobody. Linux: the kernel sends SIGKILL (prctl PR_SET_PDEATHSIG). Everywhere: a thread
    waits on `lifeline`, a pipe whose only writing end the parent holds, and exits at its end of file."""
    if sys.platform.startswith("linux"):
        with contextlib.suppress(OSError, AttributeError):
            import ctypes

            ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
    if os.getppid() != parent:  # it died before the line above took effect
        os._exit(_ORPHANED)

    def wait() -> None:
        with contextlib.suppress(EOFError, OSError):
            while True:
                lifeline.recv_bytes()
        os._exit(_ORPHANED)

    threading.Thread(target=wait, name="patchloom-lifeline", daemon=True).start()


def _child_main(kind: str, job: dict[str, Any], q, parent: int, lifeline) -> None:
    """Entry point of a spawned worker process: run one job, send events and the result on q."""
    _die_with_parent(parent, lifeline)
    try:
        result = _JOBS[kind](job, q.put)
        q.put(("done", job["worker"], result))
        code = 0
    except BaseException as exc:  # noqa: BLE001 - report everything; the parent raises it with context
        expected = isinstance(exc, StoreError | SampleError | SourceError | RecipeError | SkipRatioError)
        q.put(("error", job["worker"], f"{type(exc).__name__}: {exc}", "" if expected else traceback.format_exc()))
        code = 1
    # Every file this worker wrote is closed and renamed; once the queue has flushed the result, skip
    # the interpreter's teardown, which takes a second or more once torch has been imported.
    q.close()
    q.join_thread()
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


def _pool_size(jobs: int) -> int:
    """Worker processes run at once: never more than this machine's CPUs, whatever --workers or a manifest asks."""
    return max(1, min(jobs, os.cpu_count() or 1))


def _run_jobs(kind: str, jobs: list[dict[str, Any]], *, on_tick: Callable[[int], None],
              meanwhile: Callable[[], None] | None = None) -> list[dict[str, Any]]:
    """Run one job per worker; results in worker order.

    A single job runs in this process. Several run in processes started with the `spawn` method: a
    fresh interpreter holds no copied locks or thread pools (numpy/torch may have started threads in
    the parent, and forking a threaded process can deadlock), behaves the same on Linux, macOS and
    Windows, and its output can depend only on the job it is given. The cost is an interpreter start
    per worker (a few seconds). At most `_pool_size` run at once; the next starts when one finishes.
    Each ends when this process ends, even by SIGKILL (`_die_with_parent`). Scripts calling this with
    workers > 1 need the usual `if __name__ == "__main__":` guard.
    """
    if len(jobs) == 1:
        if meanwhile is not None:
            meanwhile()
        return [_JOBS[kind](jobs[0], lambda ev: on_tick(ev[2]) if ev[0] == "tick" else None)]
    import multiprocessing as mp

    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    lifeline, ours = ctx.Pipe(duplex=False)  # workers hold the reading end; ours closes when we die
    waiting = list(jobs)
    running: dict[int, Any] = {}
    results: dict[int, dict[str, Any]] = {}
    limit = _pool_size(len(jobs))
    try:
        while len(results) < len(jobs):
            while waiting and len(running) < limit:
                job = waiting.pop(0)
                p = ctx.Process(target=_child_main, args=(kind, job, q, os.getpid(), lifeline),
                                name=f"patchloom-{kind}-{job['worker']}", daemon=True)
                p.start()
                running[job["worker"]] = p
            if meanwhile is not None:
                meanwhile, work = None, meanwhile
                work()
            try:
                ev = q.get(timeout=0.5)
            except queue_mod.Empty:
                for w, p in running.items():
                    if not p.is_alive() and p.exitcode not in (0, None):
                        raise StoreError(f"worker {w} died (exit code {p.exitcode}) without a result")
                continue
            if ev[0] == "tick":
                on_tick(ev[2])
            elif ev[0] == "done":
                results[ev[1]] = ev[2]
                running.pop(ev[1]).join()
            else:
                raise StoreError(f"worker {ev[1]} failed: {ev[2]}\n{ev[3]}".rstrip())
    finally:
        for p in running.values():
            if p.is_alive():
                p.terminate()
            p.join()
        q.close()
        ours.close()
        lifeline.close()
    return [results[i] for i in range(len(jobs))]


def _bar(progress: bool, **kw):
    from tqdm import tqdm

    return tqdm(disable=not progress, file=sys.stderr, dynamic_ncols=True, leave=False, **kw)


# ------------------------------------------------------------------------------------------------
# pack
# ------------------------------------------------------------------------------------------------


GROUPS = ".groups"  # the Ray engine's done-records of an unfinished pack (engine_ray); gone once finished


def _ours(p: Path) -> bool:
    """A file pack writes: the manifest, a shard, either under its temporary name, or the `.groups/` folder."""
    if p.name == GROUPS:
        return p.is_dir() and not p.is_symlink()
    if p.is_dir() and not p.is_symlink():
        return False
    base = p.name.removesuffix(_TMP)
    return base == MANIFEST or _SHARD_NAME.fullmatch(base) is not None


def _prepare_out(out: Path, overwrite: bool, resume: bool = False) -> None:
    """Make `out` a folder fit to pack into: empty, or (overwrite) cleared of a previous pack's files.

    `overwrite` removes only what pack writes (manifest.json, packed-w*.tar shards, their .tmp names and
    the Ray engine's `.groups/`) and refuses a folder that also holds anything else, so no file of yours
    is deleted and no foreign file ends up beside a manifest. With `resume` the same check runs and the
    folder is left as it is: the Ray engine decides which of its files to keep.
    """
    if out.exists() and not out.is_dir():
        raise StoreError(f"output {out} exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    entries = sorted(out.iterdir())
    if not entries:
        return
    if not overwrite and not resume:
        raise StoreError(f"output folder {out} is not empty ({len(entries)} entries, e.g. {entries[0].name}); "
                         "choose an empty folder or pass overwrite=True (--overwrite); to continue an "
                         "interrupted `--engine ray` pack, pass resume=True (--resume)")
    foreign = [p.name + ("/" if p.is_dir() else "") for p in entries if not _ours(p)]
    if foreign:
        more = f" and {len(foreign) - 3} more" if len(foreign) > 3 else ""
        raise StoreError(f"output folder {out} holds files pack did not write ({', '.join(foreign[:3])}{more}): "
                         f"{'--overwrite' if overwrite else '--resume'} only replaces a previous pack's own files "
                         "(manifest.json, packed-w*.tar, their .tmp names, .groups/); move the others out or "
                         "choose another folder")
    if resume:
        return
    manifest = out / MANIFEST
    if manifest.exists():  # first, so the folder never looks like a finished pack of mixed shards
        manifest.unlink()
    for p in entries:
        if p.name == GROUPS and p.is_dir() and not p.is_symlink():
            shutil.rmtree(p)
        elif p.exists() or p.is_symlink():
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
                    inputs: list[dict[str, Any]], results: list[dict[str, Any]],
                    input_spec: list[str]) -> dict[str, Any]:
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
        "input_spec": input_spec,
        "shards": [entry for r in results for entry in r["shards"]],
        "worker_batches": [r["batches"] for r in results],
        "ledger": _merge_ledgers([r["ledger"] for r in results]),
        "totals": {"batches": batches, "images": sum(r["images"] for r in results), "tokens": tokens,
                   "slots": slots, "padding_fraction": round(1 - tokens / slots, 6) if slots else 0.0},
    }


def _unfinished(out: Path) -> str:
    return f" (no manifest written: {out} is an unfinished pack, which readers and verify refuse)"


def _judge_run(recipe: Recipe, results: list[dict[str, Any]], inputs: list[str], out: Path) -> None:
    """Refuse a run that lost too much (the skip guard over all workers' ledgers together: SkipRatioError)
    or packed nothing (EmptyEpochError, StoreError)."""
    ledger = Ledger.merged([Ledger.from_state(r["ledger_state"]) for r in results])
    with _no_manifest_note(out):
        check_skip_guard(ledger, recipe.source.max_skip_ratio, final=True)
        check_not_empty(ledger, shards=len(inputs), where="the pack")
    if not any(r["batches"] for r in results):
        raise StoreError(f"the pack made no batch from {len(inputs)} input shard(s){_unfinished(out)}")


@contextlib.contextmanager
def _no_manifest_note(out: Path) -> Iterator[None]:
    """Add to a run's refusal by the skip guard or for an empty epoch that the folder got no manifest."""
    try:
        yield
    except (SkipRatioError, EmptyEpochError) as exc:
        raise type(exc)(f"{exc}{_unfinished(out)}") from None


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
    refused unless `overwrite` (which removes a previous pack's files, and refuses a folder holding
    any other file) or, for the Ray engine, `resume` (which keeps the groups an interrupted run
    finished). At most os.cpu_count() worker processes run at once; they end if this process dies.
    A run over `source.max_skip_ratio` (all workers' ledgers together) raises SkipRatioError and one
    that packs nothing EmptyEpochError or StoreError, both before any manifest is written.
    """
    if not isinstance(recipe, Recipe):
        raise TypeError(f"pack_to_dir needs a Recipe (got {type(recipe).__name__}); use Recipe.from_file(path)")
    if not _is_int(workers, 1, _MAX_WORKERS) or not _is_int(max_batches_per_shard, 1, 2**31 - 1):
        raise StoreError(f"workers must be in 1..{_MAX_WORKERS} and max_batches_per_shard >= 1 (got {workers}, "
                         f"{max_batches_per_shard})")
    if engine not in ENGINES:
        raise StoreError(f"unknown engine {engine!r}; choose one of {', '.join(ENGINES)}")
    if engine == "local" and (address is not None or resume):
        raise StoreError("address and resume (--address, --resume) need engine='ray' (--engine ray); the local "
                         "engine packs from scratch (use --overwrite to replace a previous pack)")
    if overwrite and resume:
        raise StoreError("choose overwrite (start again) or resume (keep finished groups), not both")
    spec = shards if shards is not None else recipe.source.shards
    inputs = _input_paths(spec, allow_shell=allow_shell)
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
        with _bar(progress, desc="pack", unit=" img") as bar, _no_manifest_note(out):
            results = _run_jobs("pack", jobs, on_tick=bar.update,
                                meanwhile=lambda: hashed.extend(_hash_inputs(inputs, allow_shell=allow_shell)))
    _judge_run(recipe, results, inputs, out)
    man = _build_manifest(recipe_dict, fingerprint, epoch=epoch, workers=workers, per_shard=max_batches_per_shard,
                          inputs=hashed, results=results, input_spec=_spec_items(spec))
    data = _manifest_bytes(man)
    _check_manifest(json.loads(data), out / MANIFEST)  # never write a manifest a reader would refuse
    _write_atomic(out / MANIFEST, data)
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
    """

    def __init__(self, out_dir: str | Path, *, rank: int = 0, world_size: int = 1, worker: int | None = None,
                 num_workers: int | None = None, check_hashes: bool = True, seed: int | None = None,
                 epoch: int = 0, shuffle: bool = True, equalize: bool | None = None) -> None:
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
        seed = self.manifest["recipe"].get("seed", 0) if seed is None else seed
        if not _is_int(seed, 0, MAX_SEED) or not _is_int(epoch, 0, 2**63 - 1):
            raise ValueError(f"seed and epoch must be integers >= 0 (got {seed!r}, {epoch!r})")
        self.rank, self.world_size, self.worker, self.num_workers = rank, world_size, worker, num_workers
        self.check_hashes = check_hashes
        self.seed, self.epoch, self.shuffle = seed, epoch, bool(shuffle)
        self.equalize = world_size > 1 if equalize is None else bool(equalize)
        self._entries = self.manifest["shards"]
        self._starts = np.cumsum([0] + [e["batches"] for e in self._entries])  # global number of each shard's 1st
        self._index: dict[str, _Index] = {}
        self._yielded = 0
        self._skip = 0

    def set_epoch(self, epoch: int) -> None:
        """Read epoch `epoch` on the next iteration (another order; the same on every rank)."""
        if not _is_int(epoch, 0, 2**63 - 1):
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
        return {"epoch": self.epoch, "batches": len(plan), "repeats": repeats, "yielded": self._yielded}

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
            f = _open_regular(self.dir / name, "packed shards")
        except FileNotFoundError:
            raise StoreError(f"{self.dir}: shard {name} named in the manifest is missing") from None
        except OSError as exc:
            raise StoreError(f"{self.dir / name}: cannot open ({exc})") from None
        with f:
            index = self._index.get(name)
            if index is None:
                index = self._index[name] = _index_shard(f, entry, shape)
            if index.error is not None:
                raise StoreError(index.error)
            key, at = index.batches[j]
            batch = _read_batch(f, name, j, key, at, shape)
        if self.check_hashes and batch_digests(batch)[1] != entry["batch_sha256"][j]:
            raise StoreError(f"{name} batch {j} ({key}): arrays do not hash to the manifest (corrupted or modified "
                             f"after packing; `patchloom verify {self.dir}` says which)")
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
        if not _is_int(epoch, 0, 2**63 - 1) or not _is_int(batches, 0, 2**63 - 1):
            raise ValueError(f"state has epoch {epoch!r} and batches {batches!r}; both must be integers >= 0")
        self.epoch = epoch
        self._skip = self._yielded = batches


def read_packed(out_dir: str | Path, *, rank: int = 0, world_size: int = 1, worker: int | None = None,
                num_workers: int | None = None, check_hashes: bool = True, seed: int | None = None,
                epoch: int = 0, shuffle: bool = True, equalize: bool | None = None) -> Iterator[PackedBatch]:
    """Stream a packed folder's batches for one reader slot: a seeded order per epoch, the same number of
    batches on every rank when world_size > 1 (see PackedReader)."""
    return iter(PackedReader(out_dir, rank=rank, world_size=world_size, worker=worker, num_workers=num_workers,
                             check_hashes=check_hashes, seed=seed, epoch=epoch, shuffle=shuffle, equalize=equalize))


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


def _read_stored(path: Path, entry: dict[str, Any], shape: dict[str, Any] | None) -> _Stored:
    """One output shard as stored: file hash, and each batch's hashes (None where it cannot be read)."""
    st = _Stored()
    try:
        f = _open_regular(path, "packed shards")
    except FileNotFoundError:
        st.error = "missing"
        return st
    except (OSError, StoreError) as exc:
        st.error = f"cannot read: {exc}"
        return st
    with f:
        try:
            h = hashlib.sha256()
            while chunk := f.read(1 << 20):
                h.update(chunk)
                st.size += len(chunk)
            st.sha256 = h.hexdigest()
            index = _index_shard(f, entry, shape)
            for j, (key, at) in enumerate(index.batches):
                st.keys.append(key)
                try:
                    st.digests.append(batch_digests(_read_batch(f, entry["name"], j, key, at, shape)))
                except StoreError as exc:
                    st.digests.append(None)
                    st.error = st.error or str(exc)
            st.error = st.error or index.error
        except OSError as exc:
            st.error = f"cannot read: {exc}"
    return st


def _which(a: dict[str, str] | None, b: dict[str, str] | None) -> str:
    if a is None or b is None:
        return "arrays"
    names = [n for n in dict.fromkeys([*a, *b]) if a.get(n) != b.get(n)]
    return ", ".join(names) if names else "arrays"


def _confirm_inputs(recorded: list[str], spec: str | list[str] | None, *,
                    allow_shell: bool) -> tuple[set[str], list[str]]:
    """(recorded inputs that `spec`, expanded now as pack expanded it, also yields; problems).

    verify reads an input only when both agree, so a manifest cannot point it at a path or URL of its
    own choosing: the spec is the user's `--shards` or, failing that, the one pack recorded.
    """
    items = [] if spec is None else [spec] if isinstance(spec, str) else list(spec)
    now: list[str] = []
    for item in items:
        with contextlib.suppress(SourceError):  # a path gone since: reported as its recorded input below
            now.extend(_input_paths([item], allow_shell=allow_shell))
    known = set(recorded)
    confirmed = known & set(now)
    problems = [f"input shard {_tail(u)} matches the shard spec but was not an input when packed ({u}): the "
                "shard list changed since packing; pack again" for u in dict.fromkeys(now) if u not in known]
    if not problems and [u for u in now if u in confirmed] != [u for u in recorded if u in confirmed]:
        problems.append("the manifest lists the inputs in another order than the shard spec gives them")
    return confirmed, problems


def _tail(url: str) -> str:
    return url.rstrip("/").rsplit("/", 1)[-1]


def verify_dir(out_dir: str | Path, *, progress: bool = True, allow_shell: bool = False,
               shards: str | list[str] | None = None) -> VerifyResult:
    """Check a packed folder: inputs unchanged, stored arrays as recorded, and a re-run reproduces them.

    1. each input shard is re-hashed; a missing or changed one is reported as such and the re-run is
       skipped (its differences would only reflect the changed input). Only confirmed inputs are read:
       those in the manifest's input list that the shard spec, expanded again now, also yields (the
       spec is `shards` when given, else the one pack recorded), and locally only regular files;
    2. each output shard's stored arrays are hashed and compared with the manifest (corruption);
    3. the recipe is re-run with the recorded epoch and worker count (at most os.cpu_count()
       processes at once) and each batch's hash compared with the manifest; the first differing
       batch is named with the arrays that differ.
    """
    out = Path(out_dir)
    man = load_manifest(out)
    res = VerifyResult(ok=True)
    problems = res.messages
    total = sum(s["batches"] for s in man["shards"])
    if total == 0:
        problems.append("the manifest records no batch: nothing was packed (pack it again; a pack that "
                        "yields nothing now fails)")

    # 1. inputs
    inputs_ok = True
    recorded = [inp["path"] for inp in man["inputs"]]
    spec = shards if shards is not None else man.get("input_spec")
    if spec is None:  # a manifest written before input_spec: the recipe's own spec
        source = man["recipe"].get("source")
        spec = source.get("shards") if isinstance(source, dict) else None
        spec = spec if isinstance(spec, str) or (isinstance(spec, list) and all(isinstance(s, str) for s in spec)) \
            else None
    confirmed, spec_problems = _confirm_inputs(recorded, spec, allow_shell=allow_shell)
    for inp in man["inputs"]:
        url = inp["path"]
        name = _tail(url)
        if url not in confirmed:
            if url.startswith(SHELL_PREFIXES) and not allow_shell:
                problems.append(f"input shard {name} runs a shell command ({url}); pass --allow-shell to re-hash "
                                "it (only for a folder you packed yourself)")
            elif _is_local(url) and not os.path.lexists(url.removeprefix("file:")):
                problems.append(f"input shard {name} is missing ({url})")
            else:
                problems.append(f"input shard {name} is not among the inputs the shard spec gives now, so it was "
                                f"not read ({url}); pass --shards SPEC to name the inputs yourself")
            inputs_ok = False
            continue
        try:
            size, digest = _hash_input(url, allow_shell=allow_shell)
        except (OSError, SourceError, StoreError) as exc:
            problems.append(f"input shard {name} cannot be read ({exc})")
            inputs_ok = False
            continue
        if digest != inp["sha256"]:
            problems.append(f"input shard {name} changed since packing (sha256 now {digest[:16]}…, recorded "
                            f"{inp['sha256'][:16]}…; {size} bytes, recorded {inp['bytes']}): re-pack it, or "
                            f"restore the original to verify ({url})")
            inputs_ok = False
    problems.extend(spec_problems)
    inputs_ok = inputs_ok and not spec_problems

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
            stored[entry["name"]] = _read_stored(out / entry["name"], entry, shape)

    rerun: list[dict[str, Any]] | None = None
    if inputs_ok and recipe is not None:
        workers = man["workers"]
        jobs = [{"recipe": man["recipe"], "fingerprint": None, "shards": [i["path"] for i in man["inputs"]],
                 "epoch": int(man["epoch"]), "worker": w, "workers": workers, "allow_shell": allow_shell}
                for w in range(workers)]
        try:
            with _bar(progress, desc="verify (re-run)", unit=" img", total=man.get("totals", {}).get("images")) as bar:
                rerun = _run_jobs("hash", jobs, on_tick=bar.update, meanwhile=read_outputs)
        except Exception as exc:  # noqa: BLE001 - any failure of the re-run is a finding, named with its type
            problems.append(f"re-running the recipe failed: {exc}" if isinstance(exc, StoreError)
                            else f"re-running the recipe failed: {type(exc).__name__}: {exc}")
            rerun = None
        if len(stored) < len(man["shards"]):  # the re-run failed before the outputs were read
            read_outputs()
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
        if st.error:
            problems.append(f"output shard {st.error}" if st.error.startswith(name + ":")
                            else f"output shard {name}: {st.error}")
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
    failed = (man.get("ledger") or {}).get("shard_errors")
    if isinstance(failed, list) and failed:
        res.notes.append(f"{len(failed)} input shard failure(s) were recorded when packing; their samples are not "
                         "in the pack (manifest.json ledger.shard_errors)")
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
            from ..cli.main import DEMO_RECIPE
            from ..demo.data import demo_shard_pattern

            recipe = Recipe.from_dict(DEMO_RECIPE, origin="built-in demo recipe")
            shards = shards or demo_shard_pattern("patchloom-demo")
        else:
            recipe = Recipe.from_file(args.recipe)
        man = pack_to_dir(recipe, args.out, shards=shards, workers=args.workers, epoch=args.epoch,
                          progress=not args.no_progress, allow_shell=args.allow_shell,
                          max_batches_per_shard=args.max_batches_per_shard, overwrite=args.overwrite,
                          engine=args.engine, address=args.address, resume=args.resume)
    except (StoreError, RecipeError, SourceError, SampleError, SkipRatioError) as err:
        print(f"patchloom: error: {err}", file=sys.stderr)
        return 2
    t = man["totals"]
    led = man["ledger"]
    failed = _failed_inputs(led, [i["path"] for i in man["inputs"]])
    for line in failed.values():
        print(f"patchloom: warning: input shard {line}; its samples are not in the pack", file=sys.stderr)
    if failed:
        print(f"patchloom: warning: {len(failed)} of {len(man['inputs'])} input shards failed (under "
              "source.max_skip_ratio, so the pack went on); manifest.json lists them under ledger.shard_errors",
              file=sys.stderr)
    print(f"packed {args.out}  (recipe {man['fingerprint'][:12]}, epoch {man['epoch']}, {man['workers']} worker(s))")
    print(f"  shards written   {len(man['shards'])}")
    print(f"  batches          {t['batches']}")
    print(f"  images           {t['images']}  (read {led.get('read')}, skipped {led.get('skipped')})")
    if failed:
        print(f"  inputs failed    {len(failed)} of {len(man['inputs'])}")
    print(f"  tokens           {t['tokens']}")
    print(f"  padding          {100 * t['padding_fraction']:.1f} %")
    print(f"  seconds          {time.perf_counter() - started:.2f}")
    return 0


def _failed_inputs(ledger: dict[str, Any], inputs: list[str]) -> dict[str, str]:
    """Input shard -> 'url: reason' for each one that failed (a shard several workers read is named once)."""
    out: dict[str, str] = {}
    for line in ledger.get("shard_errors") or []:
        line = str(line)
        url = next((u for u in inputs if line.startswith(u + ": ")), line.split(": ", 1)[0])
        out.setdefault(url, line)
    return out


def cmd_verify(args: argparse.Namespace) -> int:
    """`patchloom verify DIR`: exit 0 when everything matches, 1 on a mismatch, 2 on usage errors."""
    started = time.perf_counter()
    try:
        res = verify_dir(args.dir, progress=not args.no_progress, allow_shell=args.allow_shell, shards=args.shards)
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
    pack.add_argument("--overwrite", action="store_true",
                      help="replace a previous pack in --out (removes only pack's own files; refuses a folder "
                           "that holds others)")
    pack.add_argument("--resume", action="store_true",
                      help="with --engine ray: continue an interrupted pack in --out, keeping the groups it "
                           "finished (same recipe, inputs, --workers, --epoch and --max-batches-per-shard)")
    pack.add_argument("--allow-shell", action="store_true",
                      help="allow pipe: shard URLs, which run shell commands (only for shard lists you wrote)")
    pack.add_argument("--no-progress", action="store_true", help="no progress bar")
    pack.set_defaults(func=cmd_pack)

    verify = subparsers.add_parser("verify", help="check a packed folder against its inputs and a re-run")
    verify.add_argument("dir", help="packed folder (holds manifest.json)")
    verify.add_argument("--shards", default=None,
                        help="shard spec naming the inputs (default: the spec recorded when packing); only "
                             "inputs both this spec and the manifest name are read")
    verify.add_argument("--allow-shell", action="store_true",
                        help="allow pipe: input shard URLs (they run commands: only for folders you packed)")
    verify.add_argument("--no-progress", action="store_true", help="no progress bar")
    verify.set_defaults(func=cmd_verify)
