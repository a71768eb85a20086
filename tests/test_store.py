"""Pre-packed shards: pack -> read back, determinism, verify, reader split, no pickle, temp-then-rename."""

from __future__ import annotations

import argparse
import io
import json
import pickle
import shutil
import tarfile
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from patchloom import Pipeline, Recipe
from patchloom.demo.data import MIN_SAMPLES, make_demo_shards
from patchloom.store import (
    MANIFEST,
    PackedReader,
    StoreError,
    batch_digests,
    load_manifest,
    pack_to_dir,
    read_packed,
    verify_dir,
)
from patchloom.store.command import add_store_commands, cmd_verify

RECIPE = {
    "seed": 3,
    "source": {"shuffle_buffer": 8},
    "sizing": {"patch_size": 16, "max_tokens": 64, "min_tokens": 4, "max_aspect": 8.0},
    "packing": {"seq_len": 128, "rows": 2, "max_images_per_row": 8, "lookahead": 8},
}
MASKED = {**RECIPE, "drop": {"mode": "random", "rate": 0.25, "output": "mask"}}
PER_SHARD = 2  # max_batches_per_shard: several output shards per worker even on tiny data


def _arrays(batch) -> dict:
    return {**batch.to_arrays(), "keys": batch.keys}


def _same(a, b) -> bool:
    x, y = _arrays(a), _arrays(b)
    if x.keys() != y.keys():
        return False
    for name in x:
        if name == "keys":
            if x[name] != y[name]:
                return False
        elif x[name].dtype != y[name].dtype or not np.array_equal(x[name], y[name]):
            return False
    return True


def _live(recipe: Recipe, shards: str, workers: int) -> list:
    return [b for w in range(workers) for b in Pipeline(recipe, shards=shards, worker=w, num_workers=workers)]


@pytest.fixture(scope="module")
def inputs(tmp_path_factory) -> str:
    assert 2 * 12 >= MIN_SAMPLES
    folder = tmp_path_factory.mktemp("demo-in")
    make_demo_shards(folder, shards=2, per_shard=12, progress=False)
    return str(folder / "demo-*.tar")


@pytest.fixture(scope="module")
def recipe() -> Recipe:
    return Recipe.from_dict(RECIPE)


def _packed(tmp_path_factory, recipe, inputs, workers: int) -> Path:
    out = tmp_path_factory.mktemp(f"packed{workers}")
    pack_to_dir(recipe, out, shards=inputs, workers=workers, progress=False, max_batches_per_shard=PER_SHARD,
                overwrite=True)
    return out


@pytest.fixture(scope="module")
def packed1(tmp_path_factory, recipe, inputs) -> Path:
    return _packed(tmp_path_factory, recipe, inputs, 1)


@pytest.fixture(scope="module")
def packed2(tmp_path_factory, recipe, inputs) -> Path:
    return _packed(tmp_path_factory, recipe, inputs, 2)


def _rewrite_member(shard: Path, member: str, transform) -> None:
    """Replace one tar member's bytes (transform(old) -> new), keeping every other header and order."""
    with tarfile.open(shard) as tar:
        items = [(info, tar.extractfile(info).read()) for info in tar.getmembers()]
    assert any(info.name == member for info, _ in items), member
    with tarfile.open(shard, "w", format=tarfile.USTAR_FORMAT) as tar:
        for info, data in items:
            if info.name == member:
                data = transform(data)
                info.size = len(data)
            tar.addfile(info, io.BytesIO(data))


def _npy(arr) -> bytes:
    buf = io.BytesIO()
    np.save(buf, arr, allow_pickle=True)
    return buf.getvalue()


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="patchloom")
    add_store_commands(parser.add_subparsers(dest="command", required=True))
    return parser


def _cli(argv: list[str]) -> int:
    args = _parser().parse_args(argv)
    return args.func(args)


# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("spec", [RECIPE, MASKED], ids=["plain", "masked"])
def test_round_trip_one_worker_matches_live_pipeline_in_order(spec, inputs, tmp_path):
    recipe = Recipe.from_dict(spec)
    man = pack_to_dir(recipe, tmp_path / "out", shards=inputs, progress=False, max_batches_per_shard=PER_SHARD)
    live = _live(recipe, inputs, 1)
    back = list(read_packed(tmp_path / "out", shuffle=False))
    assert len(live) >= 3 and len(back) == len(live) == man["totals"]["batches"]
    assert all(_same(a, b) for a, b in zip(live, back))
    assert (back[0].masked is not None) == (spec is MASKED)
    assert len(man["shards"]) == -(-len(live) // PER_SHARD)
    assert man["totals"]["images"] == sum(b.num_images for b in live)
    assert man["ledger"]["read"] == 24 and man["ledger"]["skipped"] >= 1  # the demo's corrupt JPEG


def test_round_trip_two_workers_equals_both_worker_pipelines(packed2, recipe, inputs):
    live = _live(recipe, inputs, 2)
    back = list(read_packed(packed2, shuffle=False))
    assert len(back) == len(live) and all(_same(a, b) for a, b in zip(live, back))
    man = load_manifest(packed2)
    assert man["workers"] == 2
    assert {s["worker"] for s in man["shards"]} == {0, 1}
    assert all(s["name"].startswith(f"packed-w{s['worker']:03d}-") for s in man["shards"])
    assert man["ledger"]["read"] == 24
    assert man["ledger"]["read"] == man["ledger"]["emitted"] + man["ledger"]["skipped"]


def test_manifest_records_inputs_recipe_versions_and_hashes(packed1, recipe, inputs):
    man = load_manifest(packed1)
    assert man["fingerprint"] == recipe.fingerprint() and man["recipe"] == recipe.to_dict()
    assert [Path(i["path"]).name for i in man["inputs"]] == ["demo-000000.tar", "demo-000001.tar"]
    assert all(i["bytes"] == Path(i["path"]).stat().st_size for i in man["inputs"])
    assert {"patchloom", "numpy", "pillow", "webdataset"} <= set(man["libraries"])
    back = list(read_packed(packed1, shuffle=False))
    assert [h for s in man["shards"] for h in s["batch_sha256"]] == [batch_digests(b)[1] for b in back]
    t = man["totals"]
    assert t["tokens"] == sum(b.num_tokens for b in back)
    assert t["padding_fraction"] == pytest.approx(1 - t["tokens"] / t["slots"], abs=1e-6)


def test_packing_twice_gives_identical_bytes_and_manifest(packed1, packed2, recipe, inputs, tmp_path):
    for ref, workers in ((packed1, 1), (packed2, 2)):
        out = tmp_path / f"again{workers}"
        pack_to_dir(recipe, out, shards=inputs, workers=workers, progress=False, max_batches_per_shard=PER_SHARD)
        names = sorted(p.name for p in ref.iterdir())
        assert names == sorted(p.name for p in out.iterdir())
        for name in names:
            assert (ref / name).read_bytes() == (out / name).read_bytes(), name
    with tarfile.open(packed1 / "packed-w000-000000.tar") as tar:
        headers = {(m.mtime, m.uid, m.gid, m.uname, m.gname, m.mode) for m in tar.getmembers()}
    assert len(headers) == 1 and next(iter(headers))[0] < time.time() - 86400  # fixed, not "now"


def test_verify_passes_on_fresh_packs(packed1, packed2, capsys):
    res = verify_dir(packed1, progress=False)
    assert res.ok and not res.messages and res.batches == load_manifest(packed1)["totals"]["batches"]
    assert _cli(["verify", str(packed2), "--no-progress"]) == 0
    assert capsys.readouterr().out.startswith("OK:")


def test_verify_names_a_changed_input_shard(recipe, inputs, tmp_path, capsys):
    src = tmp_path / "in"
    src.mkdir()
    for p in sorted(Path(inputs).parent.glob("demo-*.tar")):
        shutil.copy(p, src / p.name)
    out = tmp_path / "out"
    pack_to_dir(recipe, out, shards=str(src / "demo-*.tar"), progress=False)
    assert verify_dir(out, progress=False).ok
    with open(src / "demo-000001.tar", "ab") as f:  # still a readable tar, different bytes
        f.write(b"\0" * 1024)
    res = verify_dir(out, progress=False)
    assert not res.ok
    assert res.messages[0].startswith("input shard demo-000001.tar changed since packing (sha256")
    assert not any("demo-000000.tar" in m for m in res.messages)
    assert _cli(["verify", str(out), "--no-progress"]) == 1
    assert "input shard demo-000001.tar changed" in capsys.readouterr().out
    (src / "demo-000000.tar").unlink()
    assert any(m.startswith("input shard demo-000000.tar is missing") for m in verify_dir(out, progress=False).messages)


def test_verify_names_first_tampered_batch_and_array(packed1, tmp_path, capsys):
    out = tmp_path / "copy"
    shutil.copytree(packed1, out)
    shard = out / "packed-w000-000000.tar"

    def bump(data: bytes) -> bytes:
        arr = np.load(io.BytesIO(data))
        arr[0, 0, 0] ^= 1
        return _npy(arr)

    _rewrite_member(shard, "w000-b00000001.patches.npy", bump)
    res = verify_dir(out, progress=False)
    assert not res.ok
    assert res.messages[0] == ("output shard packed-w000-000000.tar batch 1 (w000-b00000001): stored patches do not "
                               "match the manifest (the file was modified or corrupted after packing)")
    assert not any(m.startswith("re-run differs") for m in res.messages)  # the recipe still reproduces
    assert _cli(["verify", str(out), "--no-progress"]) == 1
    assert "batch 1 (w000-b00000001): stored patches" in capsys.readouterr().out
    with pytest.raises(StoreError, match=r"packed-w000-000000.tar batch 1 .*do not hash to the manifest"):
        list(read_packed(out))


def test_verify_reports_a_rerun_difference_separately(packed1, tmp_path):
    out = tmp_path / "copy"
    shutil.copytree(packed1, out)
    man = json.loads((out / MANIFEST).read_text())
    man["shards"][1]["batch_sha256"][0] = "0" * 64  # as if this environment produced other arrays
    (out / MANIFEST).write_text(json.dumps(man))
    msgs = verify_dir(out, progress=False).messages
    name = man["shards"][1]["name"]
    assert any(m.startswith(f"re-run differs from the manifest at output shard {name} batch 0") for m in msgs)


def test_verify_reruns_the_recorded_recipe_even_when_its_fingerprint_moved(packed1, tmp_path):
    out = tmp_path / "copy"
    shutil.copytree(packed1, out)
    man = json.loads((out / MANIFEST).read_text())
    man["recipe"]["seed"] += 1  # the recorded recipe no longer matches the batches
    (out / MANIFEST).write_text(json.dumps(man))
    res = verify_dir(out, progress=False)
    assert not res.ok and res.messages[0].startswith("re-run differs from the manifest at output shard")
    note = next(n for n in res.notes if "fingerprint" in n)
    assert "the same patchloom packed it, so the manifest's recipe was edited after packing" in note
    man["libraries"]["patchloom"] = "0.0.1"  # packed by another release: either cause is possible
    (out / MANIFEST).write_text(json.dumps(man))
    note = next(n for n in verify_dir(out, progress=False).notes if "fingerprint" in n)
    assert "edited after packing, or the recipe schema or defaults of patchloom" in note and "0.0.1" in note


def test_verify_and_read_usage_errors(packed1, tmp_path, capsys):
    empty = tmp_path / "empty"
    empty.mkdir()
    assert _cli(["verify", str(empty), "--no-progress"]) == 2
    assert "no manifest.json" in capsys.readouterr().err
    newer = tmp_path / "newer"
    shutil.copytree(packed1, newer)
    man = json.loads((newer / MANIFEST).read_text())
    man["version"] = 99
    (newer / MANIFEST).write_text(json.dumps(man))
    with pytest.raises(StoreError, match="version 99.*newer patchloom"):
        read_packed(newer)
    assert _cli(["verify", str(newer), "--no-progress"]) == 2


@pytest.mark.parametrize("world_size,num_workers", [(2, 2), (3, 3), (1, 5)])
def test_read_split_reads_every_batch_once(packed2, world_size, num_workers):
    n_shards = len(load_manifest(packed2)["shards"])
    assert n_shards == 4
    everything = Counter(batch_digests(b)[1] for b in read_packed(packed2))
    seen: Counter = Counter()
    for rank in range(world_size):
        for worker in range(num_workers):
            reader = PackedReader(packed2, rank=rank, world_size=world_size, worker=worker, num_workers=num_workers,
                                  equalize=False)
            mine = [batch_digests(b)[1] for b in reader]
            assert len(mine) == len(reader)
            seen.update(mine)
    assert seen == everything and sum(everything.values()) == load_manifest(packed2)["totals"]["batches"]


def test_read_takes_worker_split_from_torch(packed2, monkeypatch):
    torch_data = pytest.importorskip("torch.utils.data")

    class Info:
        id, num_workers = 1, 2

    all_keys = [b.keys for b in read_packed(packed2)]
    monkeypatch.setattr(torch_data, "get_worker_info", lambda: Info())
    second = [b.keys for b in read_packed(packed2)]
    first = [b.keys for b in read_packed(packed2, worker=0, num_workers=2)]
    assert second and first and sorted(first + second) == sorted(all_keys) and first != second


def test_reader_resumes_after_saved_batch(packed1):
    full = list(read_packed(packed1))
    reader = PackedReader(packed1)
    it = iter(reader)
    for _ in range(3):
        next(it)
    state = json.loads(json.dumps(reader.state_dict()))
    again = PackedReader(packed1)
    again.load_state_dict(state)
    rest = list(again)
    assert len(rest) == len(full) - 3 and all(_same(a, b) for a, b in zip(full[3:], rest))


def test_pickled_members_are_refused(packed1, tmp_path):
    out = tmp_path / "copy"
    shutil.copytree(packed1, out)
    shard = out / "packed-w000-000000.tar"
    _rewrite_member(shard, "w000-b00000000.labels.npy", lambda _: _npy(np.array([{"x": 1}, None], dtype=object)))
    with pytest.raises(StoreError, match=r"labels.npy refused: Object arrays cannot be loaded.*pickled data is never"):
        list(read_packed(out, check_hashes=False))
    _rewrite_member(shard, "w000-b00000000.labels.npy", lambda _: pickle.dumps([1, 2]))
    with pytest.raises(StoreError, match=r"labels.npy refused: This file contains pickled"):
        list(read_packed(out, check_hashes=False))
    res = verify_dir(out, progress=False)
    assert not res.ok and "refused" in " ".join(res.messages)


def test_no_tmp_left_and_leftover_tmp_is_not_a_shard(packed1, tmp_path):
    assert not list(packed1.glob("*.tmp"))
    out = tmp_path / "copy"
    shutil.copytree(packed1, out)
    (out / "packed-w000-000009.tar.tmp").write_bytes(b"half a shard from a killed run")
    (out / "packed-w000-000099.tar").write_bytes(b"not named by the manifest")
    assert all(_same(a, b) for a, b in zip(read_packed(packed1), read_packed(out)))
    assert len(list(read_packed(out))) == len(list(read_packed(packed1)))
    assert verify_dir(out, progress=False).ok


def test_crash_mid_pack_leaves_only_whole_shards_and_no_manifest(recipe, inputs, tmp_path, monkeypatch):
    from patchloom.store import jobs

    class Crashing(Pipeline):
        def __iter__(self):
            for n, batch in enumerate(super().__iter__()):
                if n == 3:
                    raise RuntimeError("simulated crash")
                yield batch

    monkeypatch.setattr(jobs, "Pipeline", Crashing)
    out = tmp_path / "out"
    with pytest.raises(RuntimeError, match="simulated crash"):
        pack_to_dir(recipe, out, shards=inputs, progress=False, max_batches_per_shard=PER_SHARD)
    assert sorted(p.name for p in out.iterdir()) == ["packed-w000-000000.tar"]  # the 3rd batch's shard dropped
    with tarfile.open(out / "packed-w000-000000.tar") as tar:
        assert len({m.name.split(".")[0] for m in tar.getmembers()}) == PER_SHARD
    with pytest.raises(StoreError, match="no manifest.json"):
        read_packed(out)
    monkeypatch.setattr(jobs, "Pipeline", Pipeline)
    with pytest.raises(StoreError, match="not empty"):
        pack_to_dir(recipe, out, shards=inputs, progress=False)
    (out / "packed-w000-000001.tar.tmp").write_bytes(b"junk")
    (out / "notes.txt").write_text("mine")
    with pytest.raises(StoreError, match=r"holds files pack did not write \(notes.txt\)"):
        pack_to_dir(recipe, out, shards=inputs, progress=False, overwrite=True)
    assert (out / "notes.txt").read_text() == "mine" and (out / "packed-w000-000001.tar.tmp").exists()
    (out / "notes.txt").unlink()
    man = pack_to_dir(recipe, out, shards=inputs, progress=False, overwrite=True)
    assert sorted(p.name for p in out.iterdir()) == sorted([MANIFEST, *(s["name"] for s in man["shards"])])
    assert verify_dir(out, progress=False).ok


def test_cmd_pack_summary_refusal_and_overwrite(inputs, tmp_path, capsys):
    recipe_file = tmp_path / "r.yaml"
    recipe_file.write_text(Recipe.from_dict(RECIPE).to_yaml())
    out = tmp_path / "out"
    argv = ["pack", str(recipe_file), "--out", str(out), "--shards", inputs, "--no-progress"]
    assert _cli(argv) == 0
    text = capsys.readouterr().out
    for word in ("shards written", "batches", "images", "padding", "seconds"):
        assert word in text
    assert _cli(argv) == 2
    assert "not empty" in capsys.readouterr().err
    assert _cli([*argv, "--overwrite"]) == 0
    assert _cli(["pack", str(tmp_path / "nope.yaml"), "--out", str(tmp_path / "o2"), "--no-progress"]) == 2
    assert cmd_verify(_parser().parse_args(["verify", str(out), "--no-progress"])) == 0


def test_a_folder_packed_under_the_old_key_names_still_reads_and_verifies(packed1, tmp_path):
    """Folders packed before the key renames record `packing.buffer` etc.; their fingerprint is
    unchanged, so they still read and verify."""
    old = tmp_path / "old"
    shutil.copytree(packed1, old)
    man = json.loads((old / "manifest.json").read_text())
    packing = man["recipe"]["packing"]
    packing["buffer"] = packing.pop("lookahead")
    (old / "manifest.json").write_text(json.dumps(man, indent=2, sort_keys=True))
    assert PackedReader(old).recipe.packing.lookahead == packing["buffer"]
    assert len(list(read_packed(old, shuffle=False))) == len(list(read_packed(packed1, shuffle=False)))
    assert verify_dir(old, progress=False).ok


def test_verify_follows_inputs_that_moved_when_shards_names_their_new_place(recipe, tmp_path):
    src = tmp_path / "old"
    make_demo_shards(src, shards=2, per_shard=12, progress=False)
    out = tmp_path / "packed"
    pack_to_dir(recipe, out, shards=str(src / "demo-*.tar"), progress=False, max_batches_per_shard=PER_SHARD)
    new = tmp_path / "new"
    src.rename(new)
    res = verify_dir(out, progress=False)
    assert not res.ok and "is missing" in res.messages[0] and "pass --shards naming all 2" in res.messages[0]
    res = verify_dir(out, progress=False, shards=str(new / "demo-*.tar"))
    assert res.ok, res.messages
    assert any("read where --shards names them now, paired with the recorded ones by file name" in n
               for n in res.notes)
    # by name, whatever order the spec gives them in
    res = verify_dir(out, progress=False, shards=[str(new / "demo-000001.tar"), str(new / "demo-000000.tar")])
    assert res.ok, res.messages
    # renamed: paired in order, and the note says so
    renamed = tmp_path / "renamed"
    renamed.mkdir()
    for i in range(2):
        shutil.copy(new / f"demo-00000{i}.tar", renamed / f"part-{i}.tar")
    res = verify_dir(out, progress=False, shards=str(renamed / "part-*.tar"))
    assert res.ok and any("by content, as their names differ" in n for n in res.notes), (res.messages, res.notes)
    swapped = tmp_path / "swapped"  # renamed with the order turned round: paired by content all the same
    swapped.mkdir()
    for i in range(2):
        shutil.copy(new / f"demo-00000{i}.tar", swapped / f"part-{1 - i}.tar")
    res = verify_dir(out, progress=False, shards=str(swapped / "part-*.tar"))
    assert res.ok, res.messages
    # the pairing is by order and every moved input is hashed: a changed copy is caught, named by its new path
    _rewrite_member(new / "demo-000001.tar", next(n for n in tarfile.open(new / "demo-000001.tar").getnames()
                                                   if n.endswith(".cls")), lambda b: b"7")
    res = verify_dir(out, progress=False, shards=str(new / "demo-*.tar"))
    assert not res.ok and res.messages[0].startswith("input shard demo-000001.tar changed since packing")
    assert str(new) in res.messages[0]
    # a spec that names fewer inputs than were recorded pairs nothing: the paths must then match
    res = verify_dir(out, progress=False, shards=str(new / "demo-000000.tar"))
    assert not res.ok and any("was not an input when packed" in m for m in res.messages)
    assert any("--shards pairs only when it names all 2 recorded inputs" in m for m in res.messages)
