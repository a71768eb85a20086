"""The Ray engine: same bytes as the local engine, retried crashes, stale temp files, resume, clear errors.

One single-node Ray instance started here (2 CPUs, no dashboard, a small object store) serves the
whole module; nothing joins it. (Ray 2.60 turns a loopback node address into the machine's own
address, so it cannot be pinned to 127.0.0.1.)
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import shutil
import sys
from pathlib import Path

import pytest

ray = pytest.importorskip("ray")

import test_store as store_tests

from patchloom import Recipe
from patchloom.store import GROUPS, MANIFEST, StoreError, engine_ray, pack_to_dir, verify_dir, writer
from patchloom.store.command import add_store_commands

# The store tests' fixtures: inputs (two demo shards), recipe, and their local 2-worker pack, the reference.
inputs, recipe, local2 = store_tests.inputs, store_tests.recipe, store_tests.packed2
RECIPE, PER_SHARD = store_tests.RECIPE, store_tests.PER_SHARD
GROUPS_N = 2  # the Ray runs' groups = the reference's local workers


@pytest.fixture(scope="module", autouse=True)
def ray_session():
    if ray.is_initialized():  # another module's instance: ours must be the small loopback one
        ray.shutdown()
    ray.init(num_cpus=2, include_dashboard=False, object_store_memory=150 << 20, logging_level=logging.WARNING)
    yield
    ray.shutdown()


def _pack_ray(recipe: Recipe, out: Path, inputs: str, **kw) -> dict:
    return pack_to_dir(recipe, out, shards=inputs, workers=GROUPS_N, progress=False,
                       max_batches_per_shard=PER_SHARD, engine="ray", **kw)


def _assert_same_folder(ref: Path, out: Path) -> None:
    """Same file names (no .groups/, no .tmp) and the same bytes in every file, manifest included."""
    names = sorted(p.name for p in ref.iterdir())
    assert sorted(p.name for p in out.iterdir()) == names
    assert MANIFEST in names and len(names) > 3
    for name in names:
        assert (ref / name).read_bytes() == (out / name).read_bytes(), name


def _cli(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="patchloom")
    add_store_commands(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return args.func(args)


def _inodes(out: Path, group: int) -> dict[str, tuple[int, int]]:
    return {p.name: (p.stat().st_ino, p.stat().st_mtime_ns) for p in out.glob(f"packed-w{group:03d}-*.tar")}


def _crash_before_manifest(monkeypatch) -> None:
    """Make the driver die right after every group finished, before the manifest (an interrupted run)."""
    real = writer.write_atomic

    def failing(path: Path, data: bytes) -> None:
        if path.name == MANIFEST:
            raise KeyboardInterrupt("interrupted before the manifest")
        real(path, data)

    monkeypatch.setattr(writer, "write_atomic", failing)


# ---------------------------------------------------------------------------------------------


def test_cli_ray_pack_is_byte_identical_to_local_and_verifies(local2, inputs, tmp_path, capsys):
    recipe_file = tmp_path / "r.yaml"
    recipe_file.write_text(Recipe.from_dict(RECIPE).to_yaml())
    out = tmp_path / "ray"
    argv = ["pack", str(recipe_file), "--out", str(out), "--shards", inputs, "--workers", str(GROUPS_N),
            "--max-batches-per-shard", str(PER_SHARD), "--engine", "ray", "--no-progress"]
    assert _cli(argv) == 0
    assert "shards written" in capsys.readouterr().out
    _assert_same_folder(local2, out)
    assert {s["worker"] for s in json.loads((out / MANIFEST).read_text())["shards"]} == {0, 1}


def test_a_killed_task_is_retried_and_the_output_is_complete(recipe, local2, inputs, tmp_path, monkeypatch):
    monkeypatch.setenv(engine_ray.FAIL_ONCE_ENV, "1")
    monkeypatch.setattr(engine_ray, "forget_groups", lambda out: None)  # keep .groups/ to see the hook fired
    out = tmp_path / "ray"
    _pack_ray(recipe, out, inputs)
    assert (out / GROUPS / "test-failed-w001").exists() and not (out / GROUPS / "test-failed-w000").exists()
    assert not list(out.glob("*.tmp"))
    shutil.rmtree(out / GROUPS)
    _assert_same_folder(local2, out)
    res = verify_dir(out, progress=False)  # the same bytes, so `patchloom verify` accepts it as it does local output
    assert res.ok, res.messages


def test_stale_half_written_tmp_files_are_ignored_and_replaced(recipe, local2, inputs, tmp_path, capsys):
    out = tmp_path / "ray"
    out.mkdir()
    (out / "packed-w001-000000.tar.tmp").write_bytes(b"half a shard from a killed run")
    (out / "packed-w000-000009.tar.tmp").write_bytes(b"\0" * 512)
    (out / "manifest.json.tmp").write_text("{")
    _pack_ray(recipe, out, inputs, resume=True)
    assert "resume: 0 of 2 groups already done" in capsys.readouterr().err
    _assert_same_folder(local2, out)


def test_overwrite_clears_an_unfinished_ray_pack(recipe, inputs, tmp_path):
    out = tmp_path / "out"
    (out / GROUPS).mkdir(parents=True)
    (out / GROUPS / "w000.json").write_text("{}")
    (out / "packed-w003-000000.tar").write_bytes(b"from an interrupted run")
    (out / "notes.txt").write_text("mine")
    with pytest.raises(StoreError, match="not empty.*--overwrite.*--resume"):
        pack_to_dir(recipe, out, shards=inputs, progress=False)
    with pytest.raises(StoreError, match=r"holds files pack did not write \(notes.txt\)"):  # yours: never deleted
        pack_to_dir(recipe, out, shards=inputs, progress=False, overwrite=True)
    assert (out / "notes.txt").read_text() == "mine" and (out / GROUPS / "w000.json").exists()
    (out / "notes.txt").unlink()
    man = pack_to_dir(recipe, out, shards=inputs, progress=False, overwrite=True)
    assert not (out / GROUPS).exists() and not (out / "packed-w003-000000.tar").exists()
    assert sorted(p.name for p in out.iterdir()) == sorted([MANIFEST, *(s["name"] for s in man["shards"])])


def test_resume_keeps_finished_groups_and_reruns_the_rest(recipe, local2, inputs, tmp_path, monkeypatch, capsys):
    out = tmp_path / "ray"
    _crash_before_manifest(monkeypatch)
    with pytest.raises(KeyboardInterrupt):
        _pack_ray(recipe, out, inputs)
    monkeypatch.undo()
    assert not (out / MANIFEST).exists()
    assert sorted(p.name for p in (out / GROUPS).iterdir()) == ["run.json", "w000.json", "w001.json"]
    corrupt = tmp_path / "corrupt"
    shutil.copytree(out, corrupt)

    # group 1 "did not finish": no record, no shards, a half-written temp file
    (out / GROUPS / "w001.json").unlink()
    for p in out.glob("packed-w001-*.tar"):
        p.unlink()
    (out / "packed-w001-000000.tar.tmp").write_bytes(b"half")
    kept = _inodes(out, 0)
    with pytest.raises(StoreError, match="unfinished pack with other settings"):  # e.g. another --workers
        pack_to_dir(recipe, out, shards=inputs, workers=1, progress=False, max_batches_per_shard=PER_SHARD,
                    engine="ray", resume=True)
    capsys.readouterr()
    _pack_ray(recipe, out, inputs, resume=True)
    assert "resume: 1 of 2 groups already done (w000); 1 to run" in capsys.readouterr().err
    assert _inodes(out, 0) == kept and kept  # group 0's shards were not written again
    _assert_same_folder(local2, out)

    # a finished group whose shard no longer hashes to its record is packed again
    shard = corrupt / "packed-w000-000000.tar"
    data = bytearray(shard.read_bytes())
    data[700] ^= 1
    shard.write_bytes(bytes(data))
    _pack_ray(recipe, corrupt, inputs, resume=True)
    err = capsys.readouterr().err
    assert "group 0: packed-w000-000000.tar does not match its recorded sha256" in err
    assert "resume: 1 of 2 groups already done (w001)" in err
    _assert_same_folder(local2, corrupt)


def test_resume_of_a_finished_folder_checks_it_and_changes_nothing(recipe, local2, inputs, tmp_path, capsys):
    out = tmp_path / "done"
    shutil.copytree(local2, out)  # either engine's folder: they are the same
    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    man = _pack_ray(recipe, out, inputs, resume=True)
    assert "already packed with these settings" in capsys.readouterr().err
    assert man == json.loads((out / MANIFEST).read_text())
    assert {p.name: p.stat().st_mtime_ns for p in out.iterdir()} == before
    with pytest.raises(StoreError, match=r"finished pack with other settings \(fingerprint, workers differ\)"):
        pack_to_dir(Recipe.from_dict({**RECIPE, "seed": 4}), out, shards=inputs, workers=1, progress=False,
                    max_batches_per_shard=PER_SHARD, engine="ray", resume=True)


def test_a_bad_sample_in_raise_mode_fails_once_naming_group_and_key(inputs, tmp_path):
    strict = Recipe.from_dict({**RECIPE, "source": {**RECIPE["source"], "on_error": "raise"}})
    out = tmp_path / "ray"
    with pytest.raises(StoreError, match=r"the Ray pack failed: group \d: .*key '[^']+'.*decode.*--resume") as err:
        _pack_ray(strict, out, inputs)
    assert "retries" not in str(err.value) and "ray::" not in str(err.value)  # ours, plainly, not retried
    assert not (out / MANIFEST).exists()


def test_missing_ray_says_what_to_install(recipe, inputs, tmp_path, monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "ray", None)  # `import ray` now raises ImportError
    with pytest.raises(StoreError, match=r"pip install 'patchloom\[ray\]'"):
        _pack_ray(recipe, tmp_path / "a", inputs)
    recipe_file = tmp_path / "r.yaml"
    recipe_file.write_text(recipe.to_yaml())
    assert _cli(["pack", str(recipe_file), "--out", str(tmp_path / "b"), "--shards", inputs, "--engine", "ray",
                 "--no-progress"]) == 2
    assert "pip install 'patchloom[ray]'" in capsys.readouterr().err


def test_local_engine_refuses_ray_only_options(recipe, inputs, tmp_path):
    for kw in ({"resume": True}, {"address": "auto"}):
        with pytest.raises(StoreError, match="need engine='ray'"):
            pack_to_dir(recipe, tmp_path / "x", shards=inputs, progress=False, **kw)
    with pytest.raises(StoreError, match="not both"):
        pack_to_dir(recipe, tmp_path / "x", shards=inputs, progress=False, engine="ray", resume=True,
                    overwrite=True)
    assert not os.path.exists(tmp_path / "x")


def test_without_retries_the_kill_fails_the_run_naming_no_group_done(recipe, inputs, tmp_path, monkeypatch):
    # Last in the module: a killed worker makes the next run wait for Ray to start new ones.
    monkeypatch.setenv(engine_ray.FAIL_ONCE_ENV, "0")
    monkeypatch.setattr(engine_ray, "MAX_RETRIES", 0)
    out = tmp_path / "ray"
    with pytest.raises(StoreError, match=r"the Ray pack failed: WorkerCrashedError: .*after up to 0 retries.*--resume"):
        _pack_ray(recipe, out, inputs)
    assert not (out / MANIFEST).exists()
    assert not (out / GROUPS / "w000.json").exists()  # the killed group left no done-record
    assert (out / GROUPS / "test-failed-w000").exists()
    with pytest.raises(StoreError, match="not empty.*--resume"):
        _pack_ray(recipe, out, inputs)
