"""The manifest of a packed folder: built from the workers' results, written last, and read back as
untrusted input.

A packed folder may come from anywhere, so nothing in its manifest is trusted: every field is checked
(types, ranges, list lengths, shard names exactly as pack writes them, so no name leaves the folder)
before it decides what is read or how many processes run. Every problem is a StoreError naming the
file and the field.
"""

from __future__ import annotations

import json
import math
import os
import re
import sys
from pathlib import Path
from typing import Any

from ..recipe import MAX_SEED, current_names
from .format import (
    COMPRESSED_VERSION,
    COMPRESSIONS,
    FORMAT,
    FORMAT_VERSION,
    READ_VERSIONS,
    HASH_RULE,
    MANIFEST,
    PATCH_DTYPES,
    StoreError,
    is_int,
    json_text,
    open_regular,
    shard_name,
    shorten,
)

__all__ = [
    "MAX_WORKERS",
    "Fields",
    "build_manifest",
    "check_manifest",
    "check_shard_entries",
    "library_versions",
    "load_manifest",
    "manifest_bytes",
    "merge_ledgers",
]

MAX_WORKERS = 4096  # worker groups a manifest may record; at most os.cpu_count() of them run at once
_HEX64 = re.compile(r"[0-9a-f]{64}")
_MAX_DIM = 1 << 24  # largest rows, seq_len, max_images or patch_dim a manifest may record
_MANIFEST_MAX_BYTES = 512 << 20  # about 7 million batches' hashes


def library_versions() -> dict[str, str]:
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
        raise ValueError(f"{shorten(text, 20)} is out of range")
    return value


def _read_json(path: Path, what: str, limit: int) -> Any:
    """JSON of a file we did not just write: size-capped, finite numbers only, every failure a StoreError."""
    try:
        with open_regular(path, what) as f:
            if os.fstat(f.fileno()).st_size > limit:
                raise StoreError(f"{path}: the {what} is over {limit >> 20} MiB, larger than any patchloom writes")
            data = f.read()
    except OSError as exc:
        raise StoreError(f"{path}: cannot read the {what} ({exc})") from None
    try:
        return json.loads(data.decode("utf-8"), parse_constant=_refuse_constant, parse_float=_finite)
    except (UnicodeDecodeError, ValueError, RecursionError, MemoryError) as exc:  # ValueError: JSON, huge ints
        raise StoreError(f"{path}: the {what} is not valid JSON ({type(exc).__name__}: "
                         f"{shorten(str(exc), 120)})") from None


def load_manifest(out_dir: str | Path) -> dict[str, Any]:
    """Read `manifest.json` of a packed folder and check every field it holds (see check_manifest)."""
    path = Path(out_dir) / MANIFEST
    if not path.is_file():
        hint = " (an unfinished pack leaves shards without a manifest)" if Path(out_dir).is_dir() else ""
        raise StoreError(f"{out_dir}: no {MANIFEST}; not a packed folder{hint}")
    man = _read_json(path, "manifest", _MANIFEST_MAX_BYTES)
    if not isinstance(man, dict) or man.get("format") != FORMAT:
        raise StoreError(f"{path}: not a patchloom packed-shard manifest (format {man.get('format')!r})"
                         if isinstance(man, dict) else f"{path}: not a manifest object")
    version = man.get("version")
    if version not in READ_VERSIONS or isinstance(version, bool):
        newer = isinstance(version, int) and version > max(READ_VERSIONS)
        raise StoreError(f"{path}: manifest format version {version!r}; this patchloom reads versions "
                         f"{', '.join(map(str, READ_VERSIONS))}" + (" (written by a newer patchloom: upgrade)"
                                                                   if newer else ""))
    for name in ("recipe", "fingerprint", "epoch", "workers", "inputs", "shards"):
        if name not in man:
            raise StoreError(f"{path}: manifest lacks {name!r}")
    check_manifest(man, path)
    # Folders packed before the recipe keys were renamed record the old names; same fingerprint.
    man["recipe"] = current_names(man["recipe"])
    return man


class Fields:
    """Checks of one untrusted JSON document; the first failure is a StoreError naming the file and field."""

    def __init__(self, path: Path | str) -> None:
        self.path = path

    def need(self, ok: bool, name: str, want: str, got: Any) -> None:
        if not ok:
            raise StoreError(f"{self.path}: manifest field {name} must be {want}, got {shorten(repr(got))} (the "
                             "manifest was modified or damaged: restore it, or pack the folder again)")

    def integer(self, d: dict[str, Any], key: str, name: str, lo: int = 0, hi: int = 2**63 - 1) -> int:
        self.need(is_int(d.get(key), lo, hi), name, f"an integer in {lo}..{hi}", d.get(key))
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


def check_shard_entries(fields: Fields, entries: Any, *, workers: int, per_shard: int,
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


def check_manifest(man: dict[str, Any], path: Path | str) -> None:
    """Every field a reader, `verify` or a resumed pack acts on, checked before it is used: types, ranges,
    list lengths and the consistency of counts, so a damaged or hostile manifest cannot name files outside
    the folder, start processes by the thousand or crash a reader with a bare exception."""
    f = Fields(path)
    recipe = f.obj(man["recipe"], "recipe")
    seed = recipe.get("seed", 0)
    f.need(is_int(seed, 0, MAX_SEED), "recipe.seed", f"an integer in 0..{MAX_SEED}", seed)
    fp = man["fingerprint"]
    f.need(isinstance(fp, str) and re.fullmatch(r"[0-9a-f]{16,128}", fp) is not None, "fingerprint",
           "a hex string", fp)
    f.integer(man, "epoch", "epoch", 0, 2**31 - 1)
    workers = f.integer(man, "workers", "workers", 1, MAX_WORKERS)
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
    if "classes" in man:  # image folder -> class names in index order (label_key: folder)
        for folder, names in f.obj(man["classes"], "classes").items():
            f.need(isinstance(names, list) and all(isinstance(n, str) and "\0" not in n for n in names),
                   f"classes[{shorten(repr(folder), 60)}]", "a list of class names", names)
    per_worker = check_shard_entries(f, man["shards"], workers=workers, per_shard=per_shard)
    f.need(man.get("worker_batches") == per_worker, "worker_batches",
           f"the batches of each of the {workers} workers ({shorten(repr(per_worker))})", man.get("worker_batches"))
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
    f.need(shape.get("dtype") in PATCH_DTYPES, "batch_shape.dtype", f"one of {', '.join(PATCH_DTYPES)}",
           shape.get("dtype"))
    f.need(isinstance(shape.get("masked"), bool), "batch_shape.masked", "true or false", shape.get("masked"))
    f.need(shape.get("clips", True) is True, "batch_shape.clips", "true, or absent", shape.get("clips"))
    compressed = man.get("version") == COMPRESSED_VERSION
    f.need(shape.get("compress") in (COMPRESSIONS if compressed else (None,)), "batch_shape.compress",
           f"one of {', '.join(COMPRESSIONS)} in a version {COMPRESSED_VERSION} manifest, absent otherwise",
           shape.get("compress"))


def manifest_bytes(man: dict[str, Any]) -> bytes:
    """The manifest as written: indented, sorted keys, UTF-8, ending in a newline."""
    return (json_text(man, indent=2, sort_keys=True) + "\n").encode("utf-8")


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def merge_ledgers(ledgers: list[dict[str, Any]]) -> dict[str, Any]:
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
                out[k] = merge_ledgers([have, v])
            elif have != v:
                out[k] = [*have, v] if isinstance(have, list) else [have, v]
    return out


def build_manifest(recipe_dict: dict[str, Any], fingerprint: str, *, epoch: int, workers: int, per_shard: int,
                   inputs: list[dict[str, Any]], results: list[dict[str, Any]],
                   input_spec: list[str], classes: dict[str, list[str]] | None = None) -> dict[str, Any]:
    """The manifest of a finished pack from the per-worker job results (in worker order), whichever engine ran them.
    `classes`: each image folder's class names in index order (with `label_key: folder`)."""
    shapes = {json.dumps(r["shape"], sort_keys=True) for r in results if r["shape"] is not None}
    if len(shapes) > 1:
        raise StoreError(f"workers produced different batch shapes: {sorted(shapes)}")
    batches = sum(r["batches"] for r in results)
    tokens, slots = sum(r["tokens"] for r in results), sum(r["slots"] for r in results)
    man = {
        "format": FORMAT,
        "version": COMPRESSED_VERSION if any((r["shape"] or {}).get("compress") for r in results) else FORMAT_VERSION,
        "recipe": recipe_dict,
        "fingerprint": fingerprint,
        "libraries": library_versions(),
        "epoch": epoch,
        "workers": workers,
        "max_batches_per_shard": per_shard,
        "hash_rule": HASH_RULE,
        "batch_shape": next((r["shape"] for r in results if r["shape"] is not None), None),
        "inputs": inputs,
        "input_spec": input_spec,
        "shards": [entry for r in results for entry in r["shards"]],
        "worker_batches": [r["batches"] for r in results],
        "ledger": merge_ledgers([r["ledger"] for r in results]),
        "totals": {"batches": batches, "images": sum(r["images"] for r in results), "tokens": tokens,
                   "slots": slots, "padding_fraction": round(1 - tokens / slots, 6) if slots else 0.0},
    }
    if classes:
        man["classes"] = classes
    return man
