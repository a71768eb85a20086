"""Benchmark of pre-packed data: how big a packed folder is and how fast `read_packed` reads it back.

The corpus is packed twice into temporary folders, as stored by default and with `--compress zstd`;
each is then read in one process with and without the per-batch hash check, the four readings
interleaved `repeats` times. Speed is the bytes of the batch arrays delivered per second (what a
training loop receives; for uint8 patches almost all of it is the patches), and images per second.
Numbers for people to read; nothing is asserted.
"""

from __future__ import annotations

import shutil
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

from ..read import expand_shards
from ..recipe import Recipe

__all__ = ["STORE_VARIANTS", "bench_store", "format_store_bench"]

#: name -> (pack compression, read with hash checks)
STORE_VARIANTS: dict[str, tuple[str | None, bool]] = {
    "raw, hashes checked": (None, True),
    "raw, no hash check": (None, False),
    "zstd, hashes checked": ("zstd", True),
    "zstd, no hash check": ("zstd", False),
}


def _folder_bytes(folder: Path) -> int:
    return sum(p.stat().st_size for p in folder.iterdir() if p.is_file())


def _read_once(folder: Path, check_hashes: bool) -> tuple[float, int, int]:
    """(seconds, array bytes, images) of one full read of a packed folder in stored order."""
    from ..store.reader import read_packed

    nbytes = images = 0
    t0 = time.perf_counter()
    for batch in read_packed(folder, check_hashes=check_hashes, shuffle=False):
        nbytes += sum(a.nbytes for a in batch.to_arrays().values())
        images += batch.num_images
    return time.perf_counter() - t0, nbytes, images


def bench_store(recipe: Recipe, *, shards: str | list[str] | None = None, repeats: int = 3,
                progress: bool = False, workdir: str | Path | None = None) -> dict[str, Any]:
    """Pack the corpus raw and zstd-compressed, then time read_packed on each (hash checks on and off)."""
    from ..store.writer import pack_to_dir

    if repeats < 1:
        raise ValueError(f"repeats must be >= 1 (got {repeats})")
    urls = expand_shards(shards if shards is not None else recipe.source.shards, allow_shell=False)
    paths = [Path(u.removeprefix("file:")) for u in urls]
    source_bytes = sum(p.stat().st_size for p in paths if p.is_file())
    tmp = Path(tempfile.mkdtemp(prefix="patchloom-bench-store-", dir=workdir))
    try:
        folders, packs = {}, {}
        for compress in (None, "zstd"):
            folder = tmp / (compress or "raw")
            t0 = time.perf_counter()
            man = pack_to_dir(recipe, folder, shards=urls, progress=progress, compress=compress)
            packs[compress or "raw"] = {"seconds": time.perf_counter() - t0, "bytes": _folder_bytes(folder),
                                        "images": man["totals"]["images"], "batches": man["totals"]["batches"]}
            folders[compress] = folder
        for name, (compress, check) in STORE_VARIANTS.items():  # once untimed: file cache and imports
            _read_once(folders[compress], check)
        runs: dict[str, list[dict[str, float]]] = {name: [] for name in STORE_VARIANTS}
        for _ in range(repeats):
            for name, (compress, check) in STORE_VARIANTS.items():
                seconds, nbytes, images = _read_once(folders[compress], check)
                runs[name].append({"seconds": seconds, "gb_per_s": nbytes / seconds / 1e9,
                                   "images_per_s": images / seconds})
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    images = packs["raw"]["images"]
    results = {name: {"gb_per_s": statistics.median(r["gb_per_s"] for r in rs),
                      "images_per_s": statistics.median(r["images_per_s"] for r in rs),
                      "gb_per_s_runs": [r["gb_per_s"] for r in rs]} for name, rs in runs.items()}
    return {"images": images, "source_bytes": source_bytes, "repeats": repeats, "packs": packs,
            "kb_per_image": {k: v["bytes"] / max(1, v["images"]) / 1e3 for k, v in packs.items()},
            "source_kb_per_image": source_bytes / max(1, images) / 1e3, "reads": results}


def format_store_bench(r: dict[str, Any]) -> str:
    """Sizes of both folders, then a line per reading: GB/s of batch arrays (median, range), images/s."""
    raw, zst = r["packs"]["raw"], r["packs"]["zstd"]
    lines = [f"pre-packed store: {r['images']} images, {raw['batches']} batches; source shards "
             f"{r['source_kb_per_image']:.0f} KB/image",
             f"  raw folder   {raw['bytes'] / 1e6:8.1f} MB  {r['kb_per_image']['raw']:6.0f} KB/image  "
             f"(pack {raw['seconds']:.1f} s)",
             f"  zstd folder  {zst['bytes'] / 1e6:8.1f} MB  {r['kb_per_image']['zstd']:6.0f} KB/image  "
             f"(pack {zst['seconds']:.1f} s; {raw['bytes'] / max(1, zst['bytes']):.2f}x smaller)",
             f"  read_packed in one process, median of {r['repeats']} interleaved runs:"]
    for name, v in r["reads"].items():
        runs = v["gb_per_s_runs"]
        lines.append(f"    {name:<22} {v['gb_per_s']:6.2f} GB/s (runs {min(runs):.2f} to {max(runs):.2f})  "
                     f"{v['images_per_s']:8,.0f} images/s")
    return "\n".join(lines)
