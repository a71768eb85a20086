"""`verify_dir`: check a packed folder against its inputs, its manifest and a re-run of its recipe.

`verify` re-hashes an input only when it is both in the recorded input list and yielded now by the
recorded shard spec (or by `--shards`), and only regular files or the recorded URLs, so a manifest
cannot point it at a path of its own choosing.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..read import SHELL_PREFIXES, SourceError
from ..recipe import Recipe, RecipeError
from .engine_local import progress_bar, run_jobs
from .format import MANIFEST, StoreError, batch_digests, batch_key, open_regular
from .inputs import hash_input, input_paths, is_local
from .manifest import library_versions, load_manifest, merge_ledgers
from .reader import index_shard, read_batch

__all__ = ["VerifyResult", "verify_dir"]


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
        f = open_regular(path, "packed shards")
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
            index = index_shard(f, entry, shape)
            for j, (key, at) in enumerate(index.batches):
                st.keys.append(key)
                try:
                    st.digests.append(batch_digests(read_batch(f, entry["name"], j, key, at, shape)))
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


def _confirm_inputs(recorded: list[str], spec: str | list[str] | None, *, allow_shell: bool,
                    image_keys: list[str] | None = None) -> tuple[set[str], list[str]]:
    """(recorded inputs that `spec`, expanded now as pack expanded it, also yields; problems).

    verify reads an input only when both agree, so a manifest cannot point it at a path or URL of its
    own choosing: the spec is the user's `--shards` or, failing that, the one pack recorded.
    """
    items = [] if spec is None else [spec] if isinstance(spec, str) else list(spec)
    now: list[str] = []
    for item in items:
        with contextlib.suppress(SourceError):  # a path gone since: reported as its recorded input below
            now.extend(input_paths([item], allow_shell=allow_shell, image_keys=image_keys))
    known = set(recorded)
    confirmed = known & set(now)
    problems = [f"input shard {_tail(u)} matches the shard spec but was not an input when packed ({u}): the "
                "shard list changed since packing; pack again" for u in dict.fromkeys(now) if u not in known]
    if not problems and [u for u in now if u in confirmed] != [u for u in recorded if u in confirmed]:
        problems.append("the manifest lists the inputs in another order than the shard spec gives them")
    return confirmed, problems


def _moved_inputs(inputs: list[dict[str, Any]], shards: str | list[str] | None, *, allow_shell: bool,
                  image_keys: list[str] | None,
                  hashed: dict[str, tuple[int, str]]) -> tuple[dict[str, str], bool]:
    """(recorded input -> where the user's `--shards` names it now, renamed?), when the inputs moved as
    a whole: the spec yields as many distinct inputs as were recorded (themselves distinct) and none
    of the recorded paths. They pair up by file name when the names are the recorded ones (in any
    order); renamed, by content: each new input is hashed (into `hashed`, which the caller reuses)
    and takes the recorded input of the same hash, the rest pairing in order (and then reported as
    changed). Empty otherwise (then paths must match as recorded)."""
    recorded = [inp["path"] for inp in inputs]
    if shards is None:
        return {}, False
    try:
        now = input_paths(shards, allow_shell=allow_shell, image_keys=image_keys)
    except SourceError:
        return {}, False
    if (len(now) != len(recorded) or len(set(now)) != len(now) or len(set(recorded)) != len(recorded)
            or set(now) & set(recorded)):
        return {}, False
    names = {_tail(u): u for u in now}
    if len(names) == len(now) and sorted(names) == sorted(_tail(u) for u in recorded):
        return {u: names[_tail(u)] for u in recorded}, False
    by_digest: dict[str, list[str]] = {}
    for u in now:
        try:
            hashed[u] = hash_input(u, allow_shell=allow_shell)
        except (OSError, SourceError, StoreError):
            continue  # reported when the caller reads it
        by_digest.setdefault(hashed[u][1], []).append(u)
    pairs = {inp["path"]: by_digest[inp["sha256"]].pop(0) for inp in inputs if by_digest.get(inp["sha256"])}
    rest = iter(u for u in now if u not in pairs.values())
    return {u: pairs[u] if u in pairs else next(rest) for u in recorded}, True


def _as_recorded(ledger: dict[str, Any], moved: dict[str, str]) -> dict[str, Any]:
    """A re-run's ledger with moved inputs named as recorded: failed shards by their recorded path,
    skip examples (`key (file name)`) by their recorded file name, so it compares with the manifest's."""
    if not moved:
        return ledger
    back = {now: then for then, now in moved.items()}
    names = {_tail(now): _tail(then) for now, then in back.items()}
    out = dict(ledger)
    out["shard_errors"] = [next((back[u] + line[len(u):] for u in back if line.startswith(u + ": ")), line)
                           for line in ledger.get("shard_errors") or []]
    examples = {}
    for reason, items in (ledger.get("skip_examples") or {}).items():
        fixed = []
        for item in items:
            key, sep, name = item.rpartition(" (")
            fixed.append(f"{key} ({names[name[:-1]]})" if sep and name[:-1] in names else item)
        examples[reason] = fixed
    out["skip_examples"] = examples
    return out


def _recorded_image_keys(recipe: dict[str, Any]) -> list[str] | None:
    """The recorded recipe's source.image_keys and video_keys (the files that make a folder an image
    folder), if they are lists of names."""
    source = recipe.get("source")
    keys = source.get("image_keys") if isinstance(source, dict) else None
    if not (isinstance(keys, list) and all(isinstance(k, str) for k in keys)):
        return None
    videos = source.get("video_keys") or []
    return list(dict.fromkeys(keys + videos)) if isinstance(videos, list) and all(
        isinstance(k, str) for k in videos) else keys


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
    image_keys = _recorded_image_keys(man["recipe"])
    hashed: dict[str, tuple[int, str]] = {}
    moved, renamed = _moved_inputs(man["inputs"], shards, allow_shell=allow_shell, image_keys=image_keys,
                                   hashed=hashed)
    if moved:
        confirmed, spec_problems = set(recorded), []
        how = ("by content, as their names differ from the recorded ones (sample keys taken from file names, as "
               "in Parquet files without a __key__ column, then differ too)" if renamed else "by file name")
        res.notes.append(f"the {len(moved)} input(s) are read where --shards names them now, paired with the "
                         f"recorded ones {how}; each must hash as recorded")
    else:
        confirmed, spec_problems = _confirm_inputs(recorded, spec, allow_shell=allow_shell, image_keys=image_keys)
    for inp in man["inputs"]:
        url = moved.get(inp["path"], inp["path"])
        name = _tail(url)
        if url not in confirmed and inp["path"] not in moved:
            if url.startswith(SHELL_PREFIXES) and not allow_shell:
                problems.append(f"input shard {name} runs a shell command ({url}); pass --allow-shell to re-hash "
                                "it (only for a folder you packed yourself)")
            elif is_local(url) and not os.path.lexists(url.removeprefix("file:")):
                problems.append(f"input shard {name} is missing ({url}); if the inputs moved, pass --shards "
                                f"naming all {len(recorded)} of them in their new place" if shards is None else
                                f"input shard {name} is missing ({url}), and --shards pairs only when it names "
                                f"all {len(recorded)} recorded inputs, none at a recorded path")
            else:
                problems.append(f"input shard {name} is not among the inputs the shard spec gives now, so it was "
                                f"not read ({url}); pass --shards SPEC to name the inputs yourself")
            inputs_ok = False
            continue
        try:
            size, digest = hashed[url] if url in hashed else hash_input(url, allow_shell=allow_shell)
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
            packed_with = str((man.get("libraries") or {}).get("patchloom", "an unrecorded version"))
            running = library_versions().get("patchloom", "unknown")
            why = ("the same patchloom packed it, so the manifest's recipe was edited after packing"
                   if packed_with == running else
                   f"the manifest's recipe was edited after packing, or the recipe schema or defaults of "
                   f"patchloom {running} differ from those of {packed_with}, which packed it")
            res.notes.append(f"the recorded recipe now resolves to fingerprint {recipe.fingerprint()[:16]}… "
                             f"(recorded {man['fingerprint'][:16]}…): {why}; batches compared anyway")
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
        jobs = [{"recipe": man["recipe"], "fingerprint": None, "shards": [moved.get(u, u) for u in recorded],
                 "epoch": int(man["epoch"]), "worker": w, "workers": workers, "allow_shell": allow_shell}
                for w in range(workers)]
        try:
            total_images = man.get("totals", {}).get("images")
            with progress_bar(progress, desc="verify (re-run)", unit=" img", total=total_images) as bar:
                rerun = run_jobs("hash", jobs, on_tick=bar.update, meanwhile=read_outputs)
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
        ledger = _as_recorded(merge_ledgers([r["ledger"] for r in rerun]), moved)
        packed_ledger = man.get("ledger") or {}
        if ledger != packed_ledger:
            def counts(d: dict[str, Any]) -> str:
                return "/".join(str(d.get(k)) for k in ("read", "emitted", "skipped"))

            problems.append(f"the re-run's ledger differs: read/emitted/skipped {counts(ledger)}, recorded "
                            f"{counts(packed_ledger)}")
        if differ:
            now, then = library_versions(), man.get("libraries", {})
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
