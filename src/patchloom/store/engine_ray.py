"""Ray engine for `patchloom pack --engine ray`: each worker group of the local engine runs as one Ray Data task.

This is the only module that imports Ray (lazily: `pip install 'patchloom[ray]'`).

The work is split exactly as the local engine splits it: `--workers N` makes N groups, and group i is
the local engine's job i, `Pipeline(recipe, shards=inputs, epoch, worker=i, num_workers=N)`, run by
the same `jobs.job_pack` and writing the same `packed-w{i:03d}-*.tar` shards. Here each group is
one Ray Data task (`ray.data.from_items(...).map(...)`, one job per block), consumed through a
streaming iterator so results arrive as groups finish, in any order; the driver puts them back in
group order and writes the manifest with the code the local engine uses.

Why the output is byte-identical to `--engine local --workers N`: which samples a group reads, and
in what order, depends only on (seed, epoch, worker, num_workers) and the input list; every random
draw about one sample comes from `sample_rng(seed, epoch, key, stage)`, so its tokens depend on
nothing about the machine, the process or the moment it ran; tar headers carry a fixed time, owner
and mode. Where and when a group runs, and how often it was retried, therefore changes nothing.

Failures: a task whose worker process dies (a killed node, the OOM killer) is retried by Ray up to
`MAX_RETRIES` times, as is one that raises an `OSError` (a hiccup of shared storage). Errors that
would recur (a bad recipe, a bad sample in `on_error: raise` mode) are not retried; they end the run
with the group named. A retried group rewrites its shards from the start; every shard is written
under a `.tmp` name and renamed when complete, so a half shard never looks whole.

Resume: when a group's shards are renamed, its task writes a done-record `.groups/w{i:03d}.json`
(temporary name, then rename) holding its result (shard entries with hashes, counts, ledger) and the
key of the run's settings. The driver writes `.groups/run.json` (that key and the input hashes) as
soon as the inputs are hashed. `resume=True` (`--resume`) first re-hashes the inputs (if they
changed, or the settings differ, it refuses and asks for `--overwrite`), then keeps the groups whose
record carries this run's key, lists the shards pack writes for that group (checked like a
manifest's, before any file it names is opened) and whose shard files re-hash to the record,
removes stale `.tmp` files and the shards of the other groups, runs those groups, and writes the
manifest exactly as a fresh run would. `.groups/` is removed once the manifest is written, so a
finished folder is the local engine's folder; resuming a finished folder re-hashes its inputs and
shards and returns its manifest.

Test hook (not a user option): `PATCHLOOM_TEST_FAIL_ONCE=<group>` in the driver's environment makes
that group's first attempt kill its worker process right after writing its first batch (a marker
file in `.groups/` lets the retry through), to exercise the retry path.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import re
import sys
import threading
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ..errors import PatchloomError
from ..read import reader_tasks
from ..recipe import Recipe
from .engine_local import progress_bar
from .format import FORMAT_VERSION, GROUPS, MANIFEST, TMP, StoreError, is_pack_file, write_atomic
from .inputs import hash_input
from .jobs import job_pack
from .manifest import Fields, check_shard_entries, load_manifest

__all__ = ["FAIL_ONCE_ENV", "MAX_RETRIES", "finished_manifest", "forget_groups", "run_pack_jobs"]

FAIL_ONCE_ENV = "PATCHLOOM_TEST_FAIL_ONCE"
MAX_RETRIES = 3  # per group, for dead workers and OSErrors; deterministic errors are never retried
RUN_RECORD = "run.json"
_POLL_S = 0.5


def _import_ray():
    """`ray` with Ray Data loaded, or a StoreError saying how to install it."""
    try:
        import ray
        import ray.data
    except ImportError as exc:
        raise StoreError("--engine ray needs Ray Data, which is not installed here: pip install 'patchloom[ray]' "
                         f"(on every node of the cluster; import failed: {exc})") from None
    return ray


def _note(message: str) -> None:
    print(f"patchloom: {message}", file=sys.stderr, flush=True)


# ------------------------------------------------------------------------------------------------
# Done-records and resume
# ------------------------------------------------------------------------------------------------


def _run_key(job: dict[str, Any]) -> str:
    """Hash of the settings that decide a group's output (any job of the run gives the same key)."""
    settings = {k: job[k] for k in ("fingerprint", "shards", "epoch", "workers", "per_shard")}
    settings["format_version"] = FORMAT_VERSION
    return hashlib.sha256(json.dumps(settings, sort_keys=True).encode("utf-8")).hexdigest()


def _record_path(out: Path, group: int) -> Path:
    return out / GROUPS / f"w{group:03d}.json"


def _read_json(path: Path) -> dict[str, Any] | None:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError, RecursionError, MemoryError):  # damaged: not a record
        return None
    return data if isinstance(data, dict) else None


def _shards_intact(out: Path, entries: list[dict[str, Any]]) -> str | None:
    """None when every shard file exists with the recorded size and sha256, else what is wrong."""
    for entry in entries:
        path = out / entry["name"]
        if not path.is_file():
            return f"{entry['name']} is missing"
        if path.stat().st_size != entry["bytes"] or hash_input(str(path), allow_shell=False)[1] != entry["file_sha256"]:
            return f"{entry['name']} does not match its recorded sha256"
    return None


def _record_problem(out: Path, group: int, result: dict[str, Any], per_shard: int) -> str | None:
    """What is wrong with a done-record's shard list (None: it is what pack writes for this group), checked
    before any file it names is opened: a record is a file in the folder, as untrusted as a manifest."""
    try:
        batches = check_shard_entries(Fields(_record_path(out, group)), result.get("shards"),
                                      workers=group + 1, per_shard=per_shard)
    except StoreError as exc:
        return str(exc)
    if not isinstance(result.get("ledger_state"), dict):
        return f"{_record_path(out, group)}: written by another patchloom version (no ledger_state)"
    if any(batches[:group]) or batches[group] != result.get("batches"):
        return f"{_record_path(out, group)}: its shards are not group {group}'s {result.get('batches')!r} batches"
    return None


def _finished_groups(out: Path, run: str, hashed: list[dict[str, Any]], groups: int,
                     per_shard: int) -> dict[int, dict[str, Any]]:
    """Results of the groups an interrupted run finished that can be kept as they are."""
    recorded = _read_json(out / GROUPS / RUN_RECORD)
    if recorded is not None and recorded.get("run") != run:
        raise StoreError(f"{out} holds an unfinished pack with other settings (recipe, inputs, workers, epoch or "
                         "max_batches_per_shard differ): resume it with its own settings, or pass --overwrite "
                         "to start again")
    records = {g: _read_json(_record_path(out, g)) for g in range(groups)}
    records = {g: r for g, r in records.items()
               if r is not None and r.get("run") == run and isinstance(r.get("result"), dict)
               and isinstance(r["result"].get("shards"), list)}
    if not records:
        return {}
    if recorded is None:
        _note(f"{out}: the interrupted run did not record its input hashes; re-running all groups")
        return {}
    if recorded.get("inputs") != hashed:
        raise StoreError(f"{out}: the input shards changed since the interrupted run, so its finished groups are "
                         "stale: pass --overwrite to pack again from scratch")
    done: dict[int, dict[str, Any]] = {}
    for g, record in sorted(records.items()):
        result = record["result"]
        problem = _record_problem(out, g, result, per_shard) or _shards_intact(out, result["shards"])
        if problem is None:
            done[g] = record["result"]
        else:
            _note(f"group {g}: {problem}; re-running the group")
    return done


def _clear_unfinished(out: Path, keep: dict[int, dict[str, Any]]) -> None:
    """Remove stale temporary files, and the shards and records of every group not kept."""
    names = {entry["name"] for result in keep.values() for entry in result["shards"]}
    for p in out.iterdir():
        if p.is_file() and is_pack_file(p) and p.name != MANIFEST and p.name not in names:
            p.unlink()
    groups = out / GROUPS
    if groups.is_dir():
        for p in groups.iterdir():
            stem = p.name.removesuffix(TMP).removesuffix(".json")
            if p.name.endswith(TMP) or (stem.startswith("w") and stem[1:].isdigit() and int(stem[1:]) not in keep):
                p.unlink()


def finished_manifest(out: Path, jobs: list[dict[str, Any]], *, resume: bool) -> dict[str, Any] | None:
    """With resume, the manifest of a folder this run already finished (inputs and shards re-hashed), else None.

    A finished pack of other settings is refused; one whose inputs or shards no longer match loses its
    manifest and is packed again.
    """
    if not resume or not (out / MANIFEST).is_file():
        return None
    man = load_manifest(out)
    job = jobs[0]
    mine = {"fingerprint": job["fingerprint"], "epoch": job["epoch"], "workers": job["workers"],
            "max_batches_per_shard": job["per_shard"], "inputs": job["shards"]}
    theirs = {**{k: man.get(k) for k in mine}, "inputs": [i["path"] for i in man["inputs"]]}
    if mine != theirs:
        differ = ", ".join(k for k in mine if mine[k] != theirs[k])
        raise StoreError(f"{out} holds a finished pack with other settings ({differ} differ): choose another "
                         "folder, or pass --overwrite to replace it")
    problem = next((f"input {i['path']} changed" for i in man["inputs"]
                    if hash_input(i["path"], allow_shell=job["allow_shell"])[1] != i["sha256"]), None)
    problem = problem or _shards_intact(out, man["shards"])
    if problem is None:
        _note(f"{out} is already packed with these settings (inputs and shards re-hashed); nothing to do")
        return man
    _note(f"{out}: {problem}; packing it again")
    (out / MANIFEST).unlink()
    return None


def forget_groups(out: Path) -> None:
    """Drop the done-records once the manifest is written: the finished folder is the local engine's."""
    groups = out / GROUPS
    if groups.is_dir():
        for p in groups.iterdir():
            p.unlink()
        groups.rmdir()


# ------------------------------------------------------------------------------------------------
# The task (runs on a Ray worker)
# ------------------------------------------------------------------------------------------------


class _Counter:
    """Images packed so far, summed over every task (a Ray actor: tasks on any node add to it)."""

    def __init__(self) -> None:
        self.images = 0

    def add(self, n: int) -> None:
        self.images += n

    def total(self) -> int:
        return self.images


def _first_attempt_fails(payload: dict[str, Any], out: Path, group: int) -> bool:
    """The test hook: True only on the first attempt of the group named by PATCHLOOM_TEST_FAIL_ONCE."""
    if payload.get("fail_once") != group:
        return False
    try:
        fd = os.open(out / GROUPS / f"test-failed-w{group:03d}", os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        return False
    os.close(fd)
    return True


def _group_task(row: dict[str, Any], *, counter=None) -> dict[str, Any]:
    """Ray Data map function: pack one group, write its done-record, return its result as JSON."""
    payload = json.loads(row["payload"])
    job = payload["job"]
    group, out = job["worker"], Path(job["out"])
    crash = _first_attempt_fails(payload, out, group)

    def report(event: tuple) -> None:
        if event[0] != "tick":
            return
        if crash:  # simulate a killed worker: the shard being written stays a half-written .tmp
            os._exit(70)
        if counter is not None:
            counter.add.remote(event[2])

    try:
        result = job_pack(job, report)
    except PatchloomError as exc:  # ours, so a retry would meet it again: returned (Ray retries only raises)
        return {"group": group, "result": "", "error": f"group {group}: {exc}"}
    record = {"run": payload["run"], "result": result}
    write_atomic(_record_path(out, group), json.dumps(record, sort_keys=True).encode("utf-8"))
    return {"group": group, "result": json.dumps(result), "error": ""}


# ------------------------------------------------------------------------------------------------
# The driver
# ------------------------------------------------------------------------------------------------


def _connect(ray, address: str | None) -> bool:
    """Join the cluster at `address` ($RAY_ADDRESS when None and set), else start Ray here. True if we started it."""
    if ray.is_initialized():
        return False
    try:
        if address is None and not os.environ.get("RAY_ADDRESS"):
            ray.init(num_cpus=os.cpu_count() or 1, include_dashboard=False, logging_level=logging.WARNING)
        else:
            ray.init(address=address, logging_level=logging.WARNING)
    except (ConnectionError, RuntimeError, ValueError) as exc:
        where = address or os.environ.get("RAY_ADDRESS")
        raise StoreError(f"cannot connect to the Ray cluster at {where!r} ({exc}); start its head node with "
                         "`ray start --head` and pass --address auto on that node, or HOST:PORT elsewhere") from None
    return True


def _gist(exc: BaseException) -> str:
    """One line saying what failed inside a task: Ray's wrapper text holds the task's traceback."""
    lines = [re.sub(r"\x1b\[[0-9;]*m", "", ln).strip() for ln in str(exc).splitlines()]
    lines = [ln for ln in lines if ln]
    cut = next((i for i, ln in enumerate(lines) if ln.startswith("The above exception")), len(lines))
    return f"{type(exc).__name__}: {lines[cut - 1] if cut else ''}"


def _group_inputs(job: dict[str, Any]) -> list[set[str]]:
    """The input shards each group reads (for the progress line: a shard is done when all its readers are)."""
    recipe = Recipe.from_dict(job["recipe"], origin="pack job")
    with warnings.catch_warnings():  # the few-shards warning is the pipeline's to give
        warnings.simplefilter("ignore")
        return [{t.url for t in reader_tasks(job["shards"], seed=recipe.seed, epoch=job["epoch"], worker=g,
                                             num_workers=job["workers"],
                                             shuffle_shards=recipe.source.shuffle_shards)}
                for g in range(job["workers"])]


def _fail_once() -> int | None:
    value = os.environ.get(FAIL_ONCE_ENV)
    if not value:
        return None
    try:
        return int(value)
    except ValueError:
        raise StoreError(f"{FAIL_ONCE_ENV}={value!r}: this test hook takes a group number") from None


def run_pack_jobs(jobs: list[dict[str, Any]], *, address: str | None, progress: bool, resume: bool,
                  hash_inputs: Callable[[], list[dict[str, Any]]]) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Run the pack jobs (one per group) as Ray Data tasks; (results in group order, hashed inputs).

    `hash_inputs` computes the manifest's input list; it runs in a thread while Ray works (before the
    run when resuming, since which groups can be kept depends on it).
    """
    ray = _import_ray()
    out = Path(jobs[0]["out"])
    run = _run_key(jobs[0])
    hashed: list[dict[str, Any]] = []
    done: dict[int, dict[str, Any]] = {}
    resuming = resume and (out / GROUPS / RUN_RECORD).is_file()
    if resuming:
        hashed = hash_inputs()
        done = _finished_groups(out, run, hashed, len(jobs), jobs[0]["per_shard"])
    _clear_unfinished(out, done)
    (out / GROUPS).mkdir(exist_ok=True)
    todo = [job for job in jobs if job["worker"] not in done]
    if resume:
        kept = ", ".join(f"w{g:03d}" for g in sorted(done)) or "none"
        _note(f"resume: {len(done)} of {len(jobs)} groups already done ({kept}); {len(todo)} to run")

    def record_run() -> None:
        if not hashed:
            hashed.extend(hash_inputs())
        write_atomic(out / GROUPS / RUN_RECORD, json.dumps({"run": run, "inputs": hashed}).encode("utf-8"))

    results: dict[int, dict[str, Any]] = dict(done)
    if todo:
        results.update(_run_on_ray(ray, todo, address=address, progress=progress, done=done,
                                   record_run=record_run, run=run))
    else:
        record_run()
    for g in range(len(jobs)):
        missing = [e["name"] for e in results[g]["shards"] if not (out / e["name"]).is_file()]
        if missing:
            raise StoreError(f"group {g} wrote {missing[0]}, but it is not in {out} as this machine sees it: --out "
                             "must be a folder on storage that every Ray node writes to and this machine reads")
    return [results[g] for g in range(len(jobs))], hashed


def _run_on_ray(ray, todo: list[dict[str, Any]], *, address: str | None, progress: bool,
                done: dict[int, dict[str, Any]], record_run: Callable[[], None], run: str) -> dict[int, dict[str, Any]]:
    """Submit the groups in `todo`, stream their results back as they finish, show progress meanwhile."""
    total = todo[0]["workers"]
    inputs_of = _group_inputs(todo[0])
    all_inputs = set().union(*inputs_of)
    fail = _fail_once()
    started = _connect(ray, address)
    results: dict[int, dict[str, Any]] = {}
    hash_error: list[BaseException] = []

    def hash_and_record() -> None:
        try:
            record_run()
        except BaseException as exc:  # noqa: BLE001 - re-raised in the driver after the run
            hash_error.append(exc)

    def line() -> str:
        finished = set(done) | set(results)
        shards = sum(all(g in finished for g in range(total) if url in inputs_of[g]) for url in all_inputs)
        return f"groups {len(finished)}/{total}, input shards {shards}/{len(all_inputs)}"

    quiet = {"ray.data": logging.WARNING,  # no per-dataset INFO lines around our bar
             "ray.data._internal.progress": logging.ERROR}  # nor "progress bars disabled"
    levels = {name: logging.getLogger(name).level for name in quiet}
    for name, level in quiet.items():
        logging.getLogger(name).setLevel(level)
    try:
        with warnings.catch_warnings():
            # Ray's own deprecation notes are for its developers, not for people packing shards. Ray 2.60
            # also deprecates `**ray_remote_args` for named parameters but has none for retries yet; these
            # keep working until Ray 2.64, and on every Ray the extra allows (>= 2.40).
            warnings.filterwarnings("ignore", category=DeprecationWarning, module=r"ray(\.|$)")
            warnings.filterwarnings("ignore", category=DeprecationWarning, module=__name__)
            ray.data.DataContext.get_current().enable_progress_bars = False  # our bar says what matters here
            counter = ray.remote(num_cpus=0)(_Counter).remote() if progress else None  # an actor: a process
            rows = [{"payload": json.dumps({"job": job, "run": run, "fail_once": fail})} for job in todo]
            ds = ray.data.from_items(rows, override_num_blocks=len(rows)).map(
                _group_task, fn_kwargs={"counter": counter}, num_cpus=1,
                max_retries=MAX_RETRIES, retry_exceptions=[OSError])
        hasher = threading.Thread(target=hash_and_record, name="patchloom-hash-inputs", daemon=True)
        hasher.start()
        stop = threading.Event()
        with progress_bar(progress, desc="pack (ray)", unit=" img") as bar:
            bar.set_postfix_str(line())

            def poll() -> None:
                shown = line()
                while counter is not None and not stop.wait(_POLL_S):
                    try:
                        images = ray.get(counter.total.remote())
                    except Exception:  # noqa: BLE001 - progress is best effort; the run decides
                        return
                    if images != bar.n:
                        bar.update(images - bar.n)
                    if line() != shown:
                        shown = line()
                        bar.set_postfix_str(shown)

            poller = threading.Thread(target=poll, name="patchloom-progress", daemon=True)
            poller.start()
            stream = iter(ds.iter_rows())
            failed = ""
            try:
                for row in stream:
                    if row["error"]:
                        failed = row["error"]
                        break
                    results[int(row["group"])] = json.loads(row["result"])
            except Exception as exc:  # noqa: BLE001 - a task that died or raised past its retries
                failed = f"{_gist(exc)} (after up to {MAX_RETRIES} retries)"
            finally:
                stop.set()
                poller.join()
                if hasattr(stream, "close"):  # stop the groups still running once one has failed
                    stream.close()
            if failed:
                raise StoreError(f"the Ray pack failed: {failed}; the groups that finished are kept: re-run with "
                                 "--resume to continue")
            bar.n = sum(r["images"] for r in results.values())  # the counter's last adds may still be in flight
            bar.set_postfix_str(line())
        hasher.join()
        if hash_error:
            raise hash_error[0]
    finally:
        for name, level in levels.items():
            logging.getLogger(name).setLevel(level)
        if started:
            ray.shutdown()
    lost = sorted({job["worker"] for job in todo} - set(results))
    if lost:
        raise StoreError(f"Ray returned no result for group(s) {lost}; re-run with --resume to pack them")
    return results
