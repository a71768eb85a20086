"""`pack_to_dir`: run a recipe once and write its packed batches and manifest to a folder.

Shards are written under a `.tmp` name and renamed when complete; the manifest is written last (also
through a temporary name), so a folder without `manifest.json` is an unfinished pack and readers
refuse it. A pack whose run loses too much (the skip guard, `source.max_skip_ratio`, judged over all
workers together) or yields no batch writes no manifest.

Two engines run the per-worker jobs: `local` (processes on this machine, `engine_local`) and `ray`
(one Ray Data task per job, `engine_ray`). Both get their jobs and their manifest from here, and
each job runs the same `jobs.job_pack`, so their outputs are byte-identical for the same worker
count. While a Ray pack is unfinished the folder also holds `.groups/` (one done-record per
finished job, for `--resume`); it is removed once the manifest is written.
"""

from __future__ import annotations

import contextlib
import json
import logging
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from ..image.chain import SkipRatioError
from ..ledger import EmptyEpochError, Ledger, check_not_empty, check_skip_guard
from ..pipeline import require_recipe_extras
from ..read import FOLDER_LABEL_MEMBER, folder_classes, source_kind
from ..recipe import Recipe
from .engine_local import progress_bar, run_jobs
from .format import COMPRESSIONS, GROUPS, MANIFEST, StoreError, is_int, is_pack_file, write_atomic
from .inputs import hash_inputs, input_paths, spec_items
from .manifest import MAX_WORKERS, build_manifest, check_manifest, manifest_bytes

log = logging.getLogger("patchloom")

__all__ = ["ENGINES", "pack_to_dir"]


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
    foreign = [p.name + ("/" if p.is_dir() else "") for p in entries if not is_pack_file(p)]
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


def _unfinished(out: Path) -> str:
    return f" (no manifest written: {out} is an unfinished pack, which readers and verify refuse)"


def failed_inputs(shard_errors: list[str], inputs: list[str]) -> dict[str, str]:
    """Input shard -> its 'url: reason' line, for each one that failed (a ledger's `shard_errors`; a
    shard that several part readers read, or a failure repeated in a top-up pass, is named once)."""
    out: dict[str, str] = {}
    for line in shard_errors:
        line = str(line)
        url = next((u for u in inputs if line.startswith(u + ": ")), line.split(": ", 1)[0])
        out.setdefault(url, line)
    return out


def _judge_run(recipe: Recipe, results: list[dict[str, Any]], inputs: list[str], out: Path) -> None:
    """Refuse a run that lost too much (the skip guard over all workers' ledgers together: SkipRatioError)
    or packed nothing (EmptyEpochError, StoreError)."""
    ledger = Ledger.merged([Ledger.from_state(r["ledger_state"]) for r in results])
    lines = [line for r in results for line in (r.get("ledger") or {}).get("shard_errors") or []]
    for line in failed_inputs(lines, inputs).values():
        log.warning("input shard %s; its samples are not in the pack", line)
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


def _classes(recipe: Recipe, inputs: list[str]) -> dict[str, list[str]] | None:
    """With `label_key: folder`, each image folder's class names in index order (the manifest's `classes`)."""
    if recipe.source.label_key != FOLDER_LABEL_MEMBER:
        return None
    found = {url: folder_classes(url, recipe.source.sample_keys) for url in inputs if source_kind(url) == "folder"}
    return found or None


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
    compress: str | None = None,
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
    `compress="zstd"` stores every array zstd-compressed (store.format; manifest version 2).
    """
    if not isinstance(recipe, Recipe):
        raise TypeError(f"pack_to_dir needs a Recipe (got {type(recipe).__name__}); use Recipe.from_file(path)")
    if not is_int(workers, 1, MAX_WORKERS) or not is_int(max_batches_per_shard, 1, 2**31 - 1):
        raise StoreError(f"workers must be in 1..{MAX_WORKERS} and max_batches_per_shard >= 1 (got {workers}, "
                         f"{max_batches_per_shard})")
    if compress is not None and compress not in COMPRESSIONS:
        raise StoreError(f"unknown compression {compress!r}: use one of {', '.join(COMPRESSIONS)} (or none)")
    if engine not in ENGINES:
        raise StoreError(f"unknown engine {engine!r}; choose one of {', '.join(ENGINES)}")
    if engine == "local" and (address is not None or resume):
        raise StoreError("address and resume (--address, --resume) need engine='ray' (--engine ray); the local "
                         "engine packs from scratch (use --overwrite to replace a previous pack)")
    if overwrite and resume:
        raise StoreError("choose overwrite (start again) or resume (keep finished groups), not both")
    require_recipe_extras(recipe)  # before the output folder is touched
    spec = shards if shards is not None else recipe.source.shards
    inputs = input_paths(spec, allow_shell=allow_shell, image_keys=recipe.source.sample_keys)
    out = Path(out_dir)
    _prepare_out(out, overwrite, resume)
    recipe_dict, fingerprint = recipe.to_dict(), recipe.fingerprint()
    jobs = _pack_jobs(recipe_dict, fingerprint, inputs, out=out, workers=workers, epoch=epoch,
                      allow_shell=allow_shell, per_shard=max_batches_per_shard)
    if compress is not None:  # only then, so the jobs of an uncompressed pack are what they always were
        jobs = [{**job, "compress": compress} for job in jobs]
    if engine == "ray":
        from . import engine_ray

        finished = engine_ray.finished_manifest(out, jobs, resume=resume)
        if finished is not None:
            return finished
        results, hashed = engine_ray.run_pack_jobs(jobs, address=address, progress=progress, resume=resume,
                                                   hash_inputs=lambda: hash_inputs(inputs, allow_shell=allow_shell))
    else:
        hashed = []
        with progress_bar(progress, desc="pack", unit=" img") as bar, _no_manifest_note(out):
            results = run_jobs("pack", jobs, on_tick=bar.update,
                               meanwhile=lambda: hashed.extend(hash_inputs(inputs, allow_shell=allow_shell)))
    _judge_run(recipe, results, inputs, out)
    man = build_manifest(recipe_dict, fingerprint, epoch=epoch, workers=workers, per_shard=max_batches_per_shard,
                         inputs=hashed, results=results, input_spec=spec_items(spec),
                         classes=_classes(recipe, inputs))
    data = manifest_bytes(man)
    check_manifest(json.loads(data), out / MANIFEST)  # never write a manifest a reader would refuse
    write_atomic(out / MANIFEST, data)
    if engine == "ray":
        engine_ray.forget_groups(out)
    return man
