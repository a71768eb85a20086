"""The packed-folder format: file names, the batch codec, the hashes the manifest records, and the
small file helpers every part of the store shares. Nothing here runs a pipeline.

A packed folder holds `packed-w{worker:03d}-{k:06d}.tar` shards and a `manifest.json` beside them.
Each tar sample is one `PackedBatch`, keyed `w{worker:03d}-b{n:08d}` (n counts that worker's
batches), with members `patches.npy`, `segment_ids.npy`, `coords.npy`, `grids.npy`, `labels.npy`,
optionally `masked.npy`, with a temporal recipe `times.npy` and `frames.npy` (the manifest's
`batch_shape.clips` is then true), `keys.json` (UTF-8), and `texts.json` (UTF-8, the segments' texts laid out
like keys.json; written only when some text of the batch is not "", so a folder without texts is
the same as before texts existed), and `groups.npy` (int32 [B, S], only when a sample of the batch
spans several segments: several images per sample). Arrays are plain `.npy` (never pickle), stored
little-endian and C-ordered; tar headers carry a fixed time, owner and mode, so the same recipe,
inputs and worker count give byte-identical shards.

Hashes (all sha256, hex), as recorded in the manifest:

- array: over `name|dtype|shape|` (dtype as numpy's `dtype.str`, shape comma-joined) followed by the
  array's little-endian C-order bytes; `keys` hashes `keys|` followed by the keys.json bytes, and
  `texts` (when texts.json is written) `texts|` followed by the texts.json bytes;
- batch: over the lines `name:array-hash`, joined by newlines, in the order patches, segment_ids,
  coords, grids, labels, masked (when present), times and frames (when present), groups (when
  written), keys, texts (when present);
- shard arrays: over the shard's batch hashes, one per line, in tar order.

Compressed folders (`pack --compress zstd`, manifest version 2, `batch_shape.compress: "zstd"`) store
each array as `{name}.npy.zst`: the same .npy bytes as a zstd frame (level 3), except that a uint8
`patches` array is first left-delta coded (each value minus the one 3 places before it in its token,
mod 256: the same channel of the previous pixel), which makes photo pixels compress about 1.7x instead
of 1.3x. Hashes are over the decoded arrays, so they do not depend on compression. Uncompressed
folders are unchanged (version 1), and a patchloom that reads only version 1 refuses a compressed
folder with a clear message.

Files are written under a `.tmp` name and renamed when complete (`write_atomic`). Decoding trusts
nothing: a member's `.npy` header is checked (dtype, order, shape, byte count) before any array is
allocated, and object arrays and pickles are refused.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import re
import stat
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import PatchloomError
from ..packing.batch import PackedBatch

__all__ = [
    "ARRAYS",
    "COMPRESSED_VERSION",
    "COMPRESSIONS",
    "READ_VERSIONS",
    "FORMAT",
    "FORMAT_VERSION",
    "GROUPS",
    "HASH_RULE",
    "MANIFEST",
    "MTIME",
    "PATCH_DTYPES",
    "TMP",
    "StoreError",
    "batch_digests",
    "batch_key",
    "decode_batch",
    "encode_batch",
    "expected_arrays",
    "is_int",
    "is_pack_file",
    "json_text",
    "keys_bytes",
    "member_limit",
    "open_regular",
    "shard_name",
    "shorten",
    "texts_bytes",
    "write_atomic",
]

FORMAT = "patchloom-packed"
FORMAT_VERSION = 1
#: The version a compressed folder's manifest records (an uncompressed folder stays FORMAT_VERSION).
COMPRESSED_VERSION = 2
#: Manifest versions this patchloom reads.
READ_VERSIONS = (FORMAT_VERSION, COMPRESSED_VERSION)
#: `pack --compress` codecs (batch_shape.compress in the manifest).
COMPRESSIONS = ("zstd",)
_ZSTD_LEVEL = 3
MANIFEST = "manifest.json"
GROUPS = ".groups"  # the Ray engine's done-records of an unfinished pack (engine_ray); gone once finished
TMP = ".tmp"  # suffix of a file still being written; renamed when complete
ARRAYS = ("patches", "segment_ids", "coords", "grids", "labels", "masked", "times", "frames")
PATCH_DTYPES = ("uint8", "float16", "float32")
MTIME = 1_700_000_000  # fixed tar member time: identical bytes run to run
HASH_RULE = (
    "sha256; array: 'name|dtype.str|shape|' + little-endian C-order bytes; keys: 'keys|' + keys.json; "
    "texts (when some text is not empty): 'texts|' + texts.json; "
    "batch: 'name:hex' lines in order patches, segment_ids, coords, grids, labels, masked, times, frames, keys, "
    "texts; "
    "shard: batch hex lines in tar order"
)
_DTYPES = {"segment_ids": "int32", "coords": "int32", "grids": "int32", "labels": "int64", "masked": "bool",
           "times": "int32", "frames": "int32"}
_SHARD_NAME = re.compile(r"packed-w[0-9]{3,}-[0-9]{6,}\.tar")
# Limits on what a packed folder may make us read or allocate (a folder may come from anywhere).
_KEYS_MAX_BYTES = 64 << 20  # one batch's keys.json
_TEXTS_MAX_BYTES = 64 << 20  # one batch's texts.json
_NPY_HEADER_MAX = 10 + 65_535  # magic, version, header length and a version 1.0 header


class StoreError(PatchloomError, ValueError):
    """A packed folder that cannot be written or read; the message names the file and the cause."""


def shard_name(worker: int, k: int) -> str:
    """File name of worker's k-th output shard: the only names a manifest may list."""
    return f"packed-w{worker:03d}-{k:06d}.tar"


def batch_key(worker: int, n: int) -> str:
    """Tar key of worker's n-th batch: ours, never a sample's key."""
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


def json_text(obj: Any, **kw: Any) -> str:
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


def keys_bytes(keys: list[list[str]]) -> bytes:
    """A batch's sample keys as the keys.json member: compact UTF-8 JSON, the bytes its hash covers."""
    return json_text(keys, separators=(",", ":")).encode("utf-8")


def texts_bytes(texts: list[list[str]]) -> bytes | None:
    """A batch's texts as the texts.json member (compact UTF-8 JSON, like keys_bytes), or None when
    every text is "" (then no member is written and no texts line is hashed)."""
    if not any(t for row in texts for t in row):
        return None
    return json_text(texts, separators=(",", ":")).encode("utf-8")


def _combine(digests: dict[str, str]) -> str:
    return hashlib.sha256("\n".join(f"{n}:{d}" for n, d in digests.items()).encode("ascii")).hexdigest()


def batch_digests(batch: PackedBatch) -> tuple[dict[str, str], str]:
    """(per-array hashes in the defined order, batch hash) of one batch."""
    digests = {name: _array_digest(name, arr) for name, arr in _ordered_arrays(batch)}
    digests["keys"] = hashlib.sha256(b"keys|" + keys_bytes(batch.keys)).hexdigest()
    texts = texts_bytes(batch.texts)
    if texts is not None:
        digests["texts"] = hashlib.sha256(b"texts|" + texts).hexdigest()
    return digests, _combine(digests)


def _ordered_arrays(batch: PackedBatch) -> list[tuple[str, np.ndarray]]:
    arrays = batch.to_arrays()
    out = [(name, arrays[name]) for name in ARRAYS if arrays.get(name) is not None]
    groups = stored_groups(batch)
    return out if groups is None else [*out, ("groups", groups)]


def stored_groups(batch: PackedBatch) -> np.ndarray | None:
    """The batch's `groups` when some sample spans several segments (several images per sample),
    else None: a folder of one-image samples stores no groups.npy and stays as it was."""
    slots = np.arange(1, batch.grids.shape[1] + 1, dtype=np.int32)
    plain = np.where(batch.grids[..., 0] > 0, slots, 0)
    return None if np.array_equal(batch.groups, plain) else batch.groups


def _npy_bytes(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.lib.format.write_array(buf, _canonical(arr), allow_pickle=False)
    return buf.getvalue()


def _zstd():
    """The zstandard module, or an error saying how to get it."""
    try:
        import zstandard
    except ImportError:
        raise StoreError("compressed packed folders need the zstandard package: pip install 'patchloom[compress]' "
                         "(or pack without --compress)") from None
    return zstandard


def _delta(arr: np.ndarray) -> np.ndarray:
    """uint8 [..., D] with D a multiple of 3: each value minus the one 3 before it (mod 256)."""
    out = arr.copy()
    out[..., 3:] -= arr[..., :-3]
    return out


def _undelta(arr: np.ndarray) -> np.ndarray:
    """The inverse of _delta: running sums mod 256 over each channel's values."""
    return np.cumsum(arr.reshape(*arr.shape[:-1], -1, 3), axis=-2, dtype=np.uint8).reshape(arr.shape)


def _delta_coded(name: str, arr: np.ndarray) -> bool:
    return name == "patches" and arr.dtype == np.uint8 and arr.shape[-1] % 3 == 0


def encode_batch(key: str, batch: PackedBatch, compress: str | None = None) -> dict[str, Any]:
    """One batch as tar members named `{key}.{member}`: the key is ours (batch_key), never a sample's.
    With `compress="zstd"` the arrays become `.npy.zst` members (see the module notes)."""
    if compress is not None and compress not in COMPRESSIONS:
        raise StoreError(f"unknown compression {compress!r}: use one of {', '.join(COMPRESSIONS)} (or none)")
    sample: dict[str, Any] = {"__key__": key}
    coder = _zstd().ZstdCompressor(level=_ZSTD_LEVEL) if compress else None
    for name, arr in _ordered_arrays(batch):
        if coder is None:
            sample[f"{name}.npy"] = _npy_bytes(arr)
        else:
            sample[f"{name}.npy.zst"] = coder.compress(_npy_bytes(_delta(arr) if _delta_coded(name, arr) else arr))
    keys = keys_bytes(batch.keys)
    if len(keys) > _KEYS_MAX_BYTES:
        raise StoreError(f"batch {key}: its sample keys take {len(keys)} bytes of JSON, over the "
                         f"{_KEYS_MAX_BYTES >> 20} MiB a reader accepts; use shorter sample keys")
    sample["keys.json"] = keys
    texts = texts_bytes(batch.texts)
    if texts is not None:
        if len(texts) > _TEXTS_MAX_BYTES:
            raise StoreError(f"batch {key}: its texts take {len(texts)} bytes of JSON, over the "
                             f"{_TEXTS_MAX_BYTES >> 20} MiB a reader accepts; use shorter texts or fewer "
                             "rows (packing.rows)")
        sample["texts.json"] = texts
    return sample


def expected_arrays(shape: dict[str, Any]) -> dict[str, tuple[tuple[int, ...], np.dtype]]:
    """Shape and (little-endian) dtype of each array a batch of the manifest's `batch_shape` holds."""
    b, length, s, d = shape["rows"], shape["seq_len"], shape["max_images"], shape["patch_dim"]
    shapes = {"patches": (b, length, d), "segment_ids": (b, length), "coords": (b, length, 2),
              "grids": (b, s, 2), "labels": (b, s), "masked": (b, length), "times": (b, length), "frames": (b, s)}
    optional = {"masked": shape["masked"], "times": shape.get("clips", False), "frames": shape.get("clips", False)}
    names = [n for n in ARRAYS if optional.get(n, True)]
    return {n: (shapes[n], np.dtype(_DTYPES.get(n) or shape["dtype"]).newbyteorder("<")) for n in names}


def member_limit(member: str, expected: dict[str, tuple[tuple[int, ...], np.dtype]]) -> int | None:
    """Most bytes a member of a batch can hold (None: no such member in a batch of this shape)."""
    if member == "keys.json":
        return _KEYS_MAX_BYTES
    if member == "texts.json":
        return _TEXTS_MAX_BYTES
    name, _, ext = member.partition(".")
    if name == "groups" and "grids" in expected:  # optional: [B, S] int32, beside grids [B, S, 2]
        expected = {"groups": (expected["grids"][0][:2], np.dtype("<i4"))}
    if ext not in ("npy", "npy.zst") or name not in expected:
        return None
    dims, dtype = expected[name]
    raw = _NPY_HEADER_MAX + math.prod(dims) * dtype.itemsize
    return raw if ext == "npy" else raw + raw // 128 + (1 << 20)  # zstd's worst case is a little over raw


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
                         f"{shorten(str(exc), 120)})") from None
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


def _load_compressed(data: bytes, name: str, where: str, dims: tuple[int, ...], dtype: np.dtype) -> np.ndarray:
    """One `.npy.zst` member: decompressed (never past the size its shape allows), checked as a .npy member,
    and left-delta decoded when it is uint8 patches."""
    zstandard = _zstd()
    limit = _NPY_HEADER_MAX + math.prod(dims) * dtype.itemsize
    try:
        size = zstandard.frame_content_size(data)
        if size > limit:
            raise StoreError(f"{where}: {name}.npy.zst would decompress to {size} bytes, more than a {dims} "
                             f"{dtype.str} array needs")
        raw = zstandard.ZstdDecompressor().decompress(data, max_output_size=limit)
    except zstandard.ZstdError as exc:
        raise StoreError(f"{where}: {name}.npy.zst is not a readable zstd frame ({shorten(str(exc), 120)})") from None
    arr = _load_npy(raw, name, where, dims, dtype)
    return _undelta(arr) if _delta_coded(name, arr) else arr


def _load_keys(data: bytes, where: str, rows: int, max_images: int) -> list[list[str]]:
    try:
        keys = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError, MemoryError) as exc:
        raise StoreError(f"{where}: keys.json is not UTF-8 JSON ({type(exc).__name__}: "
                         f"{shorten(str(exc), 120)})") from None
    if not (isinstance(keys, list) and len(keys) == rows
            and all(isinstance(row, list) and len(row) <= max_images and all(isinstance(k, str) for k in row)
                    for row in keys)):
        raise StoreError(f"{where}: keys.json must be a list of {rows} lists of at most {max_images} strings")
    return keys


def _load_texts(data: bytes, where: str, keys: list[list[str]]) -> list[list[str]]:
    """texts.json, laid out exactly like the batch's keys (one string per segment), not all empty."""
    try:
        texts = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError, MemoryError) as exc:
        raise StoreError(f"{where}: texts.json is not UTF-8 JSON ({type(exc).__name__}: "
                         f"{shorten(str(exc), 120)})") from None
    if not (isinstance(texts, list) and len(texts) == len(keys)
            and all(isinstance(row, list) and len(row) == len(k) and all(isinstance(t, str) for t in row)
                    for row, k in zip(texts, keys))):
        raise StoreError(f"{where}: texts.json must hold one string per segment, laid out like keys.json "
                         f"({[len(k) for k in keys]} per row)")
    if texts_bytes(texts) is None:
        raise StoreError(f"{where}: texts.json holds only empty texts (pack writes it only when some text "
                         "is not empty)")
    return texts


def decode_batch(members: dict[str, bytes], where: str, shape: dict[str, Any] | None) -> PackedBatch:
    """Members of one tar sample -> PackedBatch; refuses pickle, unknown or missing members, wrong shapes."""
    if shape is None:
        raise StoreError(f"{where}: the manifest records no batch shape, so no batch can be read")
    expected = expected_arrays(shape)
    ext = "npy.zst" if shape.get("compress") else "npy"
    required = {f"{n}.{ext}" for n in expected} | {"keys.json"}
    unknown = sorted(set(members) - required - {"texts.json", f"groups.{ext}"})
    if unknown:
        raise StoreError(f"{where}: unexpected member(s) {', '.join(unknown)} (a batch of this folder holds only "
                         f"{', '.join(sorted(required))} and maybe texts.json and groups.{ext})")
    missing = sorted(required - set(members))
    if missing:
        raise StoreError(f"{where}: missing member(s) {', '.join(missing)}")
    if shape.get("compress"):
        arrays = {n: _load_compressed(members[f"{n}.{ext}"], n, where, *expected[n]) for n in expected}
    else:
        arrays = {n: _load_npy(members[f"{n}.npy"], n, where, *expected[n]) for n in expected}
    keys = _load_keys(members["keys.json"], where, shape["rows"], shape["max_images"])
    texts = _load_texts(members["texts.json"], where, keys) if "texts.json" in members else []
    groups = None
    if f"groups.{ext}" in members:
        dims = (shape["rows"], shape["max_images"])
        load = _load_compressed if shape.get("compress") else _load_npy
        groups = load(members[f"groups.{ext}"], "groups", where, dims, np.dtype("<i4"))
        _check_groups(groups, arrays["grids"], where)
    return PackedBatch(patches=arrays["patches"], segment_ids=arrays["segment_ids"], coords=arrays["coords"],
                       grids=arrays["grids"], labels=arrays["labels"], keys=keys, masked=arrays.get("masked"),
                       times=arrays.get("times"), frames=arrays.get("frames"),
                       texts=texts, groups=groups)


def _check_groups(groups: np.ndarray, grids: np.ndarray, where: str) -> None:
    """Stored groups must number a row's samples 1, 2, ... in segment order, 0 on empty slots."""
    present = grids[..., 0] > 0  # segments fill a row's slots from the first
    steps = np.diff(groups, axis=1)[present[:, 1:]]
    if (np.any(groups[~present] != 0) or np.any(groups[present[:, 0], 0] != 1)
            or np.any((steps != 0) & (steps != 1))):
        raise StoreError(f"{where}: groups.npy does not number the row's samples 1, 2, ... in segment order "
                         "with 0 on empty slots")



# ------------------------------------------------------------------------------------------------
# Small helpers shared by the store's modules
# ------------------------------------------------------------------------------------------------


def shorten(text: str, limit: int = 60) -> str:
    """`text` cut to `limit` characters (with ...), for quoting untrusted values in a message."""
    return text if len(text) <= limit else text[: limit - 3] + "..."


def open_regular(path: str | Path, what: str = "files"):
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


def is_int(value: Any, lo: int, hi: int) -> bool:
    """True for an int (not a bool) in lo..hi: how every count read from a folder is checked."""
    return isinstance(value, int) and not isinstance(value, bool) and lo <= value <= hi


def write_atomic(path: Path, data: bytes) -> None:
    """Write `data` to `path` through a temporary name and rename it, so no reader sees half a file."""
    tmp = path.with_name(path.name + TMP)
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def is_pack_file(p: Path) -> bool:
    """A file pack writes: the manifest, a shard, either under its temporary name, or the `.groups/` folder."""
    if p.name == GROUPS:
        return p.is_dir() and not p.is_symlink()
    if p.is_dir() and not p.is_symlink():
        return False
    base = p.name.removesuffix(TMP)
    return base == MANIFEST or _SHARD_NAME.fullmatch(base) is not None
