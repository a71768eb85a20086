"""Pre-packed store faults: untrusted manifests and shards, worker processes outliving pack, failed
inputs, odd sample keys, and equal batch counts per rank with a seeded order per epoch."""

from __future__ import annotations

import argparse
import io
import json
import math
import os
import shutil
import signal
import subprocess
import sys
import tarfile
import threading
import time
import tracemalloc
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

import test_store as store_tests
from conftest import encode_png, make_shards, random_image, write_shard

from patchloom import Recipe, pack
from patchloom.image.patches import PatchSet
from patchloom.store import (
    MANIFEST,
    PackedReader,
    StoreError,
    batch_digests,
    engine_local,
    jobs,
    load_manifest,
    pack_to_dir,
    read_packed,
    verify,
    verify_dir,
)
from patchloom.store import format as store_format
from patchloom.store import manifest as store_manifest
from patchloom.store.command import add_store_commands

# The store tests' fixtures: two demo input shards, their recipe, and the one-worker pack of them.
inputs, recipe, packed1 = store_tests.inputs, store_tests.recipe, store_tests.packed1
RECIPE, PER_SHARD = store_tests.RECIPE, store_tests.PER_SHARD
SHARD = "packed-w000-000000.tar"
LINUX = sys.platform.startswith("linux")


def _cli(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="patchloom")
    add_store_commands(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return args.func(args)


def _copy(packed: Path, tmp_path: Path) -> Path:
    out = tmp_path / "copy"
    shutil.copytree(packed, out)
    return out


def _edit_manifest(folder: Path, edit) -> None:
    man = json.loads((folder / MANIFEST).read_text())
    edit(man)
    (folder / MANIFEST).write_text(json.dumps(man))


def _npy_header(shape: tuple, descr: str = "<i4", fortran: bool = False) -> bytes:
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(buf, {"descr": descr, "fortran_order": fortran, "shape": shape})
    return buf.getvalue()


def _assert_refused(folder: Path, names: str, capsys) -> None:
    """Reading and verifying `folder` fail with a StoreError naming `names`, never another exception or OK."""
    with pytest.raises(StoreError) as err:
        list(read_packed(folder))
    assert names in str(err.value), str(err.value)
    try:
        res = verify_dir(folder, progress=False)
    except StoreError as exc:
        assert names in str(exc), str(exc)
    else:
        assert not res.ok and any(names in m for m in res.messages), res.messages
    capsys.readouterr()
    assert _cli(["verify", str(folder), "--no-progress"]) in (1, 2)
    assert "OK" not in capsys.readouterr().out


# ---------------------------------------------------------------------------------------------
# 1. every manifest field is untrusted


def _set(path: str, value):
    """An edit setting one manifest field, addressed as 'a.b.0.c'."""
    def edit(man: dict) -> None:
        *parents, last = path.split(".")
        node = man
        for p in parents:
            node = node[int(p)] if isinstance(node, list) else node[p]
        if isinstance(node, list):
            node[int(last)] = value
        else:
            node[last] = value
    return edit


FIELD_TAMPERINGS = {
    "workers 16": (_set("workers", 16), "worker_batches"),
    "workers as text": (_set("workers", "2"), "workers"),
    "workers true": (_set("workers", True), "workers"),
    "workers a million": (_set("workers", 10**6), "workers"),
    "shard name leaves the folder": (_set("shards.0.name", "../outside/x.tar"), "shards[0].name"),
    "absolute shard name": (_set("shards.0.name", "/etc/hostname"), "shards[0].name"),
    "shard name with a slash": (_set("shards.0.name", "sub/packed-w000-000000.tar"), "shards[0].name"),
    "shard listed twice": (lambda m: m["shards"].insert(1, m["shards"][0]), "shards[1].name"),
    "shards as an object": (_set("shards", {"a": 1}), "shards"),
    "hash list too short": (lambda m: m["shards"][0]["batch_sha256"].pop(), "shards[0].batch_sha256"),
    "first_batch moved": (_set("shards.1.first_batch", 7), "shards[1].first_batch"),
    "batches negative": (_set("shards.0.batches", -1), "shards[0].batches"),
    "huge batch shape": (_set("batch_shape.seq_len", 2**40), "batch_shape.seq_len"),
    "object dtype": (_set("batch_shape.dtype", "object"), "batch_shape.dtype"),
    "negative epoch": (_set("epoch", -1), "epoch"),
    "input path a number": (_set("inputs.0.path", 5), "inputs[0].path"),
    "recipe seed text": (_set("recipe.seed", "3"), "recipe.seed"),
    "worker_batches missing": (lambda m: m.pop("worker_batches"), "worker_batches"),
    "ledger a list": (_set("ledger", [1, 2]), "ledger"),
}


@pytest.mark.parametrize("case", list(FIELD_TAMPERINGS))
def test_tampered_manifest_fields_are_refused_naming_the_field(case, packed1, tmp_path, capsys):
    edit, field_name = FIELD_TAMPERINGS[case]
    out = _copy(packed1, tmp_path)
    _edit_manifest(out, edit)
    with pytest.raises(StoreError, match=r"manifest.json: manifest field .*must be") as err:
        load_manifest(out)
    assert f"field {field_name} " in str(err.value)
    _assert_refused(out, "manifest.json", capsys)


def test_at_most_cpu_count_worker_processes_run_at_once(recipe, inputs, tmp_path, monkeypatch):
    import multiprocessing.context as mpc

    alive: list = []
    peak = [0]
    start = mpc.SpawnProcess.start

    def counted(self):
        peak[0] = max(peak[0], 1 + sum(p.is_alive() for p in alive))
        alive.append(self)
        start(self)

    monkeypatch.setattr(mpc.SpawnProcess, "start", counted)
    monkeypatch.setattr(engine_local.os, "cpu_count", lambda: 1)
    assert engine_local.pool_size(16) == 1
    out = tmp_path / "out"
    man = pack_to_dir(recipe, out, shards=inputs, workers=2, progress=False, max_batches_per_shard=PER_SHARD)
    assert len(alive) == 2 and peak[0] == 1  # two jobs, one process at a time
    assert {s["worker"] for s in man["shards"]} == {0, 1}
    monkeypatch.setattr(engine_local.os, "cpu_count", lambda: None)
    assert engine_local.pool_size(3) == 1


def _own_inputs(tmp_path: Path) -> tuple[Path, str]:
    src = tmp_path / "in"
    src.mkdir()
    make_shards(src, 2, 8)
    return src, str(src / "part-*.tar")


def test_verify_reads_only_inputs_the_shard_spec_confirms(recipe, tmp_path, monkeypatch):
    src, spec = _own_inputs(tmp_path)
    out = tmp_path / "out"
    pack_to_dir(recipe, out, shards=spec, progress=False)
    assert load_manifest(out)["input_spec"] == [spec]
    secret = tmp_path / "elsewhere" / "secret.tar"
    secret.parent.mkdir()
    shutil.copy(src / "part-000.tar", secret)
    hashed: list[str] = []
    real = verify.hash_input
    monkeypatch.setattr(verify, "hash_input", lambda url, **kw: hashed.append(url) or real(url, **kw))

    _edit_manifest(out, _set("inputs.0.path", str(secret)))  # the recorded list points elsewhere
    res = verify_dir(out, progress=False)
    assert not res.ok and str(secret) not in hashed
    assert res.messages[0].startswith("input shard secret.tar is not among the inputs the shard spec gives now")
    assert any("part-000.tar matches the shard spec but was not an input" in m for m in res.messages)

    _edit_manifest(out, _set("input_spec", [str(secret)]))  # both point elsewhere: the user's --shards decides
    hashed.clear()
    res = verify_dir(out, progress=False, shards=spec)
    assert not res.ok and str(secret) not in hashed and str(src / "part-001.tar") in hashed


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs named pipes")
def test_verify_never_opens_a_fifo_named_by_the_manifest(recipe, tmp_path):
    _, spec = _own_inputs(tmp_path)
    out = tmp_path / "out"
    pack_to_dir(recipe, out, shards=spec, progress=False)
    fifo = tmp_path / "fifo.tar"
    os.mkfifo(fifo)
    glob = str(tmp_path / "fifo*.tar")  # a glob matches it, so it is confirmed, and must still not be opened
    _edit_manifest(out, lambda m: (_set("inputs.0.path", str(fifo))(m), _set("input_spec", [glob])(m)))
    found: list = []
    t = threading.Thread(target=lambda: found.append(verify_dir(out, progress=False)), daemon=True)
    t.start()
    t.join(timeout=120)
    assert not t.is_alive(), "verify blocked on a FIFO"
    assert not found[0].ok and any("fifo.tar cannot be read" in m and "not a regular file" in m
                                   for m in found[0].messages), found[0].messages


def test_verify_reports_an_input_added_to_the_spec_since_packing(recipe, tmp_path):
    src, spec = _own_inputs(tmp_path)
    out = tmp_path / "out"
    pack_to_dir(recipe, out, shards=spec, progress=False)
    assert verify_dir(out, progress=False).ok
    shutil.copy(src / "part-000.tar", src / "part-002.tar")
    res = verify_dir(out, progress=False)
    assert not res.ok and any(m.startswith("input shard part-002.tar matches the shard spec but was not an input")
                              for m in res.messages)


# ---------------------------------------------------------------------------------------------
# 2. every store error names the file: a parametrised list of damage


def _truncate(fraction: float):
    def damage(folder: Path) -> None:
        p = folder / SHARD
        data = p.read_bytes()
        p.write_bytes(data[: int(len(data) * fraction)])
    return damage


def _cut_at_member_end(folder: Path) -> None:
    """Cut right after a member's data (a 512-byte boundary): a shorter, well-formed tar."""
    p = folder / SHARD
    with tarfile.open(p) as tar:
        members = tar.getmembers()
    m = members[len(members) // 2]
    p.write_bytes(p.read_bytes()[: m.offset_data + -(-m.size // 512) * 512])


def _flip_header_byte(folder: Path) -> None:
    p = folder / SHARD
    with tarfile.open(p) as tar:
        offset = tar.getmembers()[3].offset
    data = bytearray(p.read_bytes())
    data[offset + 10] ^= 0x55  # inside the name: the header checksum no longer matches
    p.write_bytes(bytes(data))


def _write(name: str, data: bytes):
    def damage(folder: Path) -> None:
        (folder / name).write_bytes(data)
    return damage


def _member(member: str, transform):
    def damage(folder: Path) -> None:
        store_tests._rewrite_member(folder / SHARD, f"w000-b00000000.{member}", transform)
    return damage


def _symlink_to(target: str):
    def damage(folder: Path) -> None:
        (folder / SHARD).unlink()
        (folder / SHARD).symlink_to(target)
    return damage


def _extra_member(folder: Path) -> None:
    with tarfile.open(folder / SHARD, "a") as tar:
        info = tarfile.TarInfo("w000-b00000000.extra.bin")
        info.size = 3
        tar.addfile(info, io.BytesIO(b"abc"))


DAMAGE = {
    # the manifest
    "manifest cut in half": (lambda f: (f / MANIFEST).write_bytes((f / MANIFEST).read_bytes()[:200]), MANIFEST),
    "manifest deeply nested": (_write(MANIFEST, b"[" * 100_000 + b"]" * 100_000), MANIFEST),
    "manifest huge integer": (_write(MANIFEST, b'{"format": ' + b"9" * 10_000 + b"}"), MANIFEST),
    "manifest NaN": (_write(MANIFEST, b'{"format": NaN}'), MANIFEST),
    "manifest 1e999": (_write(MANIFEST, b'{"format": 1e999}'), MANIFEST),
    "manifest not an object": (_write(MANIFEST, b"[1, 2, 3]"), MANIFEST),
    "manifest empty": (_write(MANIFEST, b""), MANIFEST),
    "manifest binary": (_write(MANIFEST, bytes(range(256)) * 4), MANIFEST),
    # a shard
    "shard cut at 1/2": (_truncate(0.5), SHARD),
    "shard cut at 1/3": (_truncate(1 / 3), SHARD),
    "shard cut inside the first header": (_truncate(0.0005), SHARD),
    "shard cut at a member's end": (_cut_at_member_end, SHARD),
    "shard empty": (_write(SHARD, b""), SHARD),
    "shard garbage": (_write(SHARD, np.random.default_rng(0).bytes(20_000)), SHARD),
    "shard header checksum": (_flip_header_byte, SHARD),
    "shard is a folder": (lambda f: ((f / SHARD).unlink(), (f / SHARD).mkdir()), SHARD),
    "shard links to /dev/zero": (_symlink_to("/dev/zero"), SHARD),
    "shard extra member": (_extra_member, SHARD),
    "npy shape 10^12 elements": (_member("segment_ids.npy", lambda _: _npy_header((10**6, 10**6))), SHARD),
    "npy header garbage": (_member("segment_ids.npy", lambda d: d[:10] + b"{'descr': ((((((" + d[26:]), SHARD),
    "npy big-endian": (_member("segment_ids.npy",
                               lambda d: d.replace(b"'<i4'", b"'>i4'", 1)), SHARD),
    "npy fortran order": (_member("coords.npy", lambda d: d.replace(b"False", b"True ", 1)), SHARD),
    "npy cut": (_member("labels.npy", lambda d: d[:-5]), SHARD),
    "npy version 9": (_member("labels.npy", lambda d: d[:6] + b"\x09\x00" + d[8:]), SHARD),
    "keys deeply nested": (_member("keys.json", lambda _: b"[" * 100_000 + b"]" * 100_000), SHARD),
    "keys not UTF-8": (_member("keys.json", lambda _: b'[["\xff\xfe"]]'), SHARD),
    "keys wrong rows": (_member("keys.json", lambda _: b'[["a"]]'), SHARD),
}


@pytest.mark.parametrize("case", list(DAMAGE))
def test_every_damage_is_a_store_error_naming_the_file(case, packed1, tmp_path, capsys):
    damage, names = DAMAGE[case]
    if "/dev/zero" in case and not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero here")
    out = _copy(packed1, tmp_path)
    damage(out)
    _assert_refused(out, names, capsys)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs named pipes")
def test_a_fifo_in_place_of_a_shard_is_refused_not_waited_on(packed1, tmp_path, capsys):
    out = _copy(packed1, tmp_path)
    (out / SHARD).unlink()
    os.mkfifo(out / SHARD)
    _assert_refused(out, SHARD, capsys)


def test_a_npy_header_claiming_a_huge_shape_allocates_nothing(packed1, tmp_path):
    out = _copy(packed1, tmp_path)
    # 200 MB claimed by a member of a few bytes, in a manifest whose shape says the same
    shape = load_manifest(out)["batch_shape"]
    rows, length = 50_000, 1_000
    _edit_manifest(out, lambda m: m["batch_shape"].update(rows=rows, seq_len=length))
    store_tests._rewrite_member(out / SHARD, "w000-b00000000.segment_ids.npy",
                                lambda _: _npy_header((rows, length)) + b"\0" * 64)
    tracemalloc.start()
    try:
        with pytest.raises(StoreError, match=rf"{SHARD}.*\.npy"):
            PackedReader(out, shuffle=False)._batch(0)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 20 << 20, f"{peak} bytes allocated"
    assert shape["rows"] != rows  # the test really moved the shape


# ---------------------------------------------------------------------------------------------
# 3. pack's worker processes end with it; --overwrite leaves only the new pack


def _proc_children(pid: int) -> dict[int, str]:
    """{child pid: start time} of pack's spawned worker processes (from /proc)."""
    out = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
            cmd = (entry / "cmdline").read_bytes()
        except OSError:
            continue
        fields = stat.rsplit(")", 1)[1].split()
        if int(fields[1]) == pid and b"spawn_main" in cmd:
            out[int(entry.name)] = fields[19]
    return out


def _running(pid: int, started: str) -> bool:
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return False
    return fields[19] == started and fields[0] != "Z"


@pytest.mark.skipif(not LINUX, reason="reads /proc")
def test_killed_pack_takes_its_workers_with_it_and_overwrite_cleans_up(tmp_path, capsys):
    _, spec = _own_inputs(tmp_path)
    long = Recipe.from_dict({**RECIPE, "epoch": {"samples": 400_000, "equalize": True}})  # re-reads: minutes of work
    recipe_file = tmp_path / "long.yaml"
    recipe_file.write_text(long.to_yaml())
    out = tmp_path / "out"
    argv = [sys.executable, "-m", "patchloom.cli.main", "pack", str(recipe_file), "--out", str(out), "--shards", spec,
            "--workers", "2", "--max-batches-per-shard", "2", "--no-progress"]
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    workers: dict[int, str] = {}
    try:
        deadline = time.monotonic() + 180
        while time.monotonic() < deadline and proc.poll() is None:
            workers = _proc_children(proc.pid)
            if len(workers) == 2 and out.is_dir() and any(out.glob("packed-w*")):
                break  # both workers run and write shards
            time.sleep(0.2)
        assert len(workers) == 2 and proc.poll() is None, "the pack did not get going"
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    deadline = time.monotonic() + 15
    while time.monotonic() < deadline and any(_running(p, s) for p, s in workers.items()):
        time.sleep(0.1)
    left = [p for p, s in workers.items() if _running(p, s)]
    for p in left:  # a failing run: do not leave them packing for minutes
        os.kill(p, signal.SIGKILL)
    assert not left, "worker processes outlived pack"
    assert not (out / MANIFEST).exists()

    recipe_file.write_text(Recipe.from_dict(RECIPE).to_yaml())
    assert _cli(["pack", str(recipe_file), "--out", str(out), "--shards", spec, "--no-progress"]) == 2  # not empty
    assert _cli(["pack", str(recipe_file), "--out", str(out), "--shards", spec, "--no-progress",
                 "--overwrite"]) == 0
    man = load_manifest(out)
    assert sorted(p.name for p in out.iterdir()) == sorted([MANIFEST, *(s["name"] for s in man["shards"])])


def _lifeline_child(lifeline) -> None:
    engine_local.die_with_parent(os.getppid(), lifeline)
    time.sleep(120)


def test_a_worker_ends_when_its_lifeline_closes(tmp_path):
    import multiprocessing as mp

    ctx = mp.get_context("spawn")
    lifeline, ours = ctx.Pipe(duplex=False)
    child = ctx.Process(target=_lifeline_child, args=(lifeline,), daemon=True)
    child.start()
    try:
        time.sleep(0.5)
        ours.close()  # what the kernel does for a parent that died on a platform without PR_SET_PDEATHSIG
        child.join(timeout=60)
        assert child.exitcode == engine_local.ORPHANED_EXIT
    finally:
        if child.is_alive():
            child.kill()
        lifeline.close()


def test_overwrite_refuses_a_folder_with_foreign_files(recipe, inputs, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "packed-w000-000000.tar.tmp").write_bytes(b"half")
    (out / "packed-w000-000003.tar").write_bytes(b"old")
    (out / "packed-old.tar").write_bytes(b"not a name pack writes")
    with pytest.raises(StoreError, match=r"holds files pack did not write \(packed-old.tar\).*--overwrite only"):
        pack_to_dir(recipe, out, shards=inputs, progress=False, overwrite=True)
    assert len(list(out.iterdir())) == 3  # nothing removed
    (out / "packed-old.tar").unlink()
    man = pack_to_dir(recipe, out, shards=inputs, progress=False, overwrite=True,
                      max_batches_per_shard=PER_SHARD)
    assert sorted(p.name for p in out.iterdir()) == sorted([MANIFEST, *(s["name"] for s in man["shards"])])


# ---------------------------------------------------------------------------------------------
# 4. failed input shards


def _inputs_with_bad(tmp_path: Path, bad: int, good: int = 2, per_shard: int = 8) -> list[str]:
    src = tmp_path / "in"
    src.mkdir()
    paths = make_shards(src, good, per_shard)
    rng = np.random.default_rng(1)
    for i in range(bad):
        bad_path = src / f"broken-{i}.tar"
        bad_path.write_bytes(rng.bytes(4096))
        paths.append(str(bad_path))
    return paths


def _recipe_file(tmp_path: Path, **source) -> Path:
    path = tmp_path / "r.yaml"
    path.write_text(Recipe.from_dict({**RECIPE, "source": {**RECIPE["source"], **source}}).to_yaml())
    return path


@pytest.mark.parametrize("workers", [1, 4])  # 4 groups over 3 shards: part readers share each shard
def test_pack_warns_once_per_failed_input_shard_and_sums_up(tmp_path, capfd, caplog, workers):
    paths = _inputs_with_bad(tmp_path, bad=1)
    out = tmp_path / "out"
    spec = "{" + ",".join(paths) + "}"  # one brace spec naming the three shards
    assert _cli(["pack", str(_recipe_file(tmp_path, max_skip_ratio=0.5)), "--out", str(out), "--shards", spec,
                 "--workers", str(workers), "--no-progress"]) == 0
    captured = capfd.readouterr()  # worker processes' output too
    said = captured.err.splitlines() + [r.getMessage() for r in caplog.records]  # printed, and logged
    named = [ln for ln in said if "broken-0.tar" in ln]
    assert len(named) == 1, said  # named once, as it failed; not again in the summary
    assert "1 of 3 input shards failed" in captured.err
    assert "inputs failed    1 of 3" in captured.out
    assert _cli(["verify", str(out), "--no-progress"]) == 0
    assert "input shard failure(s) were recorded" in capfd.readouterr().out


@pytest.mark.parametrize("workers", [1, 2])
def test_pack_over_the_skip_guard_exits_nonzero_and_writes_no_manifest(workers, tmp_path, capsys):
    paths = _inputs_with_bad(tmp_path, bad=1)
    out = tmp_path / "out"
    argv = ["pack", str(_recipe_file(tmp_path)), "--out", str(out), "--shards", "{" + ",".join(paths) + "}",
            "--workers", str(workers), "--no-progress"]
    assert _cli(argv) == 2
    err = capsys.readouterr().err
    assert "max_skip_ratio" in err and "no manifest written" in err and "broken-0.tar" in err
    assert not (out / MANIFEST).exists()
    assert _cli(["verify", str(out), "--no-progress"]) == 2
    assert "OK" not in capsys.readouterr().out


def test_skipped_samples_are_judged_over_all_workers_together(tmp_path, capsys):
    # 2 shards of 60 samples, 10 corrupt in each: each worker reads 60 (< the guard's 100), together 120
    src = tmp_path / "in"
    src.mkdir()
    rng = np.random.default_rng(2)
    for s in range(2):
        samples = [(f"s{s}-{i:03d}", {"png": encode_png(random_image(rng, 12, 12)) if i % 6 else b"not a png"})
                   for i in range(60)]
        write_shard(src / f"part-{s}.tar", samples)
    out = tmp_path / "out"
    argv = ["pack", str(_recipe_file(tmp_path)), "--out", str(out), "--shards", str(src / "part-*.tar"),
            "--workers", "2", "--no-progress"]
    assert _cli(argv) == 2
    assert "20 of 120 samples skipped" in capsys.readouterr().err
    assert not (out / MANIFEST).exists()


def test_all_unreadable_inputs_pack_nothing_and_never_verify(tmp_path, capsys):
    paths = _inputs_with_bad(tmp_path, bad=2, good=0)
    out = tmp_path / "out"
    assert _cli(["pack", str(_recipe_file(tmp_path, max_skip_ratio=None)), "--out", str(out), "--shards",
                 "{" + ",".join(paths) + "}", "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert "no samples" in err and "broken-0.tar" in err and "no manifest written" in err
    assert not (out / MANIFEST).exists()
    assert _cli(["verify", str(out), "--no-progress"]) == 2


def test_a_manifest_of_zero_batches_never_verifies(packed1, tmp_path, capsys):
    out = _copy(packed1, tmp_path)

    def empty(man: dict) -> None:
        man.update(shards=[], worker_batches=[0], batch_shape=None)
        man["totals"]["batches"] = 0
    _edit_manifest(out, empty)
    assert list(read_packed(out)) == []
    res = verify_dir(out, progress=False)
    assert not res.ok and res.messages[0].startswith("the manifest records no batch")
    assert _cli(["verify", str(out), "--no-progress"]) == 1
    assert "OK" not in capsys.readouterr().out


# ---------------------------------------------------------------------------------------------
# 5. odd sample keys


ODD_KEYS = ["caf\udce9-\udcff", "a/b/../c", "line\nbreak", "k" * 5000, "x\x00y", "日本-🙂", ""]


def _odd_batch():
    rng = np.random.default_rng(3)
    sets = [PatchSet(patches=rng.integers(0, 256, (4, 12), dtype=np.uint8),
                     coords=np.array([[0, 0], [0, 1], [1, 0], [1, 1]], dtype=np.int32), grid=(2, 2), key=k, label=i)
            for i, k in enumerate(ODD_KEYS)]
    return pack(sets, seq_len=16, rows=2)


def test_odd_sample_keys_are_stored_and_read_back_exactly():
    batch = _odd_batch()
    assert sorted(k for row in batch.keys for k in row) == sorted(ODD_KEYS)
    sample = store_format.encode_batch(store_format.batch_key(0, 0), batch)
    data = sample["keys.json"]
    data.decode("utf-8")  # always valid UTF-8
    members = {k: v for k, v in sample.items() if k != "__key__"}
    back = store_format.decode_batch(members, "test", jobs.batch_shape(batch))
    assert back.keys == batch.keys and batch_digests(back) == batch_digests(batch)


def test_odd_keys_go_through_a_shard_writer_and_the_manifest(tmp_path):
    batch = _odd_batch()
    writer = jobs.ShardWriter(tmp_path, 0, 4)
    writer.write(0, batch)
    writer.finish()
    with tarfile.open(tmp_path / SHARD) as tar:
        assert [m.name.split(".")[0] for m in tar.getmembers()] == ["w000-b00000000"] * 6  # our names only
    text = store_manifest.manifest_bytes({"ledger": {"skip_examples": {"decode": [ODD_KEYS[0]]}}}).decode("utf-8")
    assert json.loads(text)["ledger"]["skip_examples"]["decode"] == [ODD_KEYS[0]]
    once = store_format.keys_bytes([["\ud83d\ude00"]])
    assert once == store_format.keys_bytes(json.loads(once))


def test_pack_reads_a_tar_with_non_utf8_member_names(tmp_path):
    rng = np.random.default_rng(4)
    path = tmp_path / "odd.tar"
    with tarfile.open(path, "w", format=tarfile.GNU_FORMAT, encoding="utf-8", errors="surrogateescape") as tar:
        for i in range(6):
            data = encode_png(random_image(rng, 40, 30))
            info = tarfile.TarInfo((b"caf\xe9-%02d" % i).decode("utf-8", "surrogateescape") + ".png")
            info.size = len(data)
            tar.addfile(info, io.BytesIO(data))
    r = Recipe.from_dict(RECIPE)
    pack_to_dir(r, tmp_path / "out", shards=str(path), progress=False)
    from patchloom import Pipeline

    live = [b.keys for b in Pipeline(r, shards=str(path))]
    assert [b.keys for b in read_packed(tmp_path / "out", shuffle=False)] == live
    assert verify_dir(tmp_path / "out", progress=False).ok


# ---------------------------------------------------------------------------------------------
# 6. ranks and epochs on pre-packed data


@pytest.fixture(scope="module")
def two_shards(tmp_path_factory, recipe, inputs) -> Path:
    """A pack of exactly two output shards (one worker)."""
    probe = tmp_path_factory.mktemp("probe")
    total = pack_to_dir(recipe, probe, shards=inputs, progress=False, max_batches_per_shard=1000)["totals"]["batches"]
    out = tmp_path_factory.mktemp("two")
    man = pack_to_dir(recipe, out, shards=inputs, progress=False, max_batches_per_shard=math.ceil(total / 2))
    assert len(man["shards"]) == 2 and total >= 5
    return out


def _hashes(reader) -> list[str]:
    return [batch_digests(b)[1] for b in reader]


@pytest.mark.parametrize("world_size", [3, 4])
def test_every_rank_yields_as_many_batches_and_all_are_read(two_shards, world_size):
    man = load_manifest(two_shards)
    stored = Counter(h for s in man["shards"] for h in s["batch_sha256"])
    total = sum(stored.values())
    per_rank = [PackedReader(two_shards, rank=r, world_size=world_size, worker=0, num_workers=1)
                for r in range(world_size)]
    got = [_hashes(rd) for rd in per_rank]
    assert {len(g) for g in got} == {math.ceil(total / world_size)}
    assert [len(rd) for rd in per_rank] == [len(g) for g in got]
    read = Counter(h for g in got for h in g)
    repeats = sum(rd.repeats for rd in per_rank)
    assert set(read) == set(stored)  # every stored batch read at least once
    assert sum(read.values()) == total + repeats and repeats == world_size * math.ceil(total / world_size) - total
    assert sum(n - 1 for n in read.values()) == repeats  # nothing read twice but the counted repeats
    assert all(rd.stats["repeats"] == rd.repeats and rd.stats["yielded"] == len(g) for rd, g in zip(per_rank, got))
    # DataLoader workers within a rank split the rank's batches; the rank total is unchanged
    for r in range(world_size):
        halves = [_hashes(PackedReader(two_shards, rank=r, world_size=world_size, worker=w, num_workers=2))
                  for w in range(2)]
        assert sorted(halves[0] + halves[1]) == sorted(got[r])
    unequal = [len(PackedReader(two_shards, rank=r, world_size=world_size, worker=0, num_workers=1, equalize=False))
               for r in range(world_size)]
    assert sum(unequal) == total


def test_more_ranks_than_batches_still_yield_one_each(two_shards):
    total = load_manifest(two_shards)["totals"]["batches"]
    world = total + 2
    counts = [len(list(read_packed(two_shards, rank=r, world_size=world, worker=0, num_workers=1)))
              for r in range(world)]
    assert counts == [1] * world


def test_order_is_seeded_per_epoch_and_the_same_on_every_rank(two_shards):
    stored = [h for s in load_manifest(two_shards)["shards"] for h in s["batch_sha256"]]
    e0, e0_again, e1 = (_hashes(read_packed(two_shards, epoch=e)) for e in (0, 0, 1))
    assert e0 == e0_again and e0 != e1 and sorted(e0) == sorted(e1) == sorted(stored)
    assert _hashes(read_packed(two_shards, shuffle=False)) == stored
    assert _hashes(read_packed(two_shards, seed=99)) != e0
    reader = PackedReader(two_shards)
    reader.set_epoch(1)
    assert _hashes(reader) == e1
    # one order shared by all ranks: their shares are disjoint and together the whole epoch
    shares = [_hashes(read_packed(two_shards, rank=r, world_size=2, worker=0, num_workers=1, epoch=1, equalize=False))
              for r in range(2)]
    assert sorted(shares[0] + shares[1]) == sorted(stored)
    interleaved = [h for pair in zip(*shares) for h in pair] + shares[0][len(shares[1]):]
    assert interleaved == e1


def test_resume_continues_the_shuffled_order_of_the_saved_epoch(two_shards):
    kw = {"rank": 1, "world_size": 3, "worker": 0, "num_workers": 1}
    full = _hashes(PackedReader(two_shards, epoch=2, **kw))
    reader = PackedReader(two_shards, epoch=2, **kw)
    it = iter(reader)
    next(it)
    state = json.loads(json.dumps(reader.state_dict()))
    again = PackedReader(two_shards, **kw)  # epoch 0 until the state says 2
    again.load_state_dict(state)
    assert again.epoch == 2 and _hashes(again) == full[1:]
    again.load_state_dict(state)
    again.set_epoch(3)  # another epoch: the saved position does not apply
    assert len(_hashes(again)) == len(full)
    with pytest.raises(ValueError, match="seed"):
        PackedReader(two_shards, seed=5, **kw).load_state_dict(state)
