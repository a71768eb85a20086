"""Nothing lost, nothing silent: failed shards count toward the skip guard, an empty epoch is an
error, DataLoader workers' ledgers reach the main process, resume refuses changed shards, and the
resume state stays small however many samples were skipped.

Every shard is built here from bytes: small PNGs and JPEGs from Pillow in tar files in tmp_path.
"""

from __future__ import annotations

import io
import json
import logging
import os
import tarfile
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from patchloom import Pipeline, Recipe, SkipRatioError, SourceError
from patchloom.cli.main import main
from patchloom.ledger import EXAMPLES_PER_REASON, MAX_REASONS, OTHER_REASONS, EmptyEpochError, Ledger, Skip
from patchloom.summary import RunStats, format_table
from patchloom.testing import check_resume

from conftest import encode_png, random_image, write_shard

BASE = {"source": {"shuffle_buffer": 4},
        "sizing": {"patch_size": 8, "max_tokens": 16},
        "packing": {"seq_len": 64, "rows": 2, "lookahead": 8}}


def recipe(**source) -> Recipe:
    return Recipe.from_dict({**BASE, "source": {**BASE["source"], **source}})


def good_shard(path: Path, n: int, *, seed: int = 0, bad: int = 0) -> str:
    """n small PNGs (and `bad` members that are not images), keys prefixed by the file name."""
    rng = np.random.default_rng(seed)
    samples = [(f"{path.stem}-{i:04d}", {"png": encode_png(random_image(rng, 16, 16)), "cls": b"1"})
               for i in range(n)]
    samples += [(f"{path.stem}-bad{i:04d}", {"png": b"not an image", "cls": b"1"}) for i in range(bad)]
    return str(write_shard(path, samples))


def tar_bytes(n: int, seed: int = 0) -> bytes:
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode="w") as tar:
        rng = np.random.default_rng(seed)
        for i in range(n):
            data = encode_png(random_image(rng, 16, 16))
            info = tarfile.TarInfo(f"k{i:04d}.png")
            info.size, info.mtime = len(data), 0
            tar.addfile(info, io.BytesIO(data))
    return buf.getvalue()


def garbage_shard(path: Path) -> str:
    path.write_bytes(b"this is not a tar archive at all " * 40)
    return str(path)


def cut_shard(path: Path) -> str:
    """A tar cut off inside its first member's data."""
    path.write_bytes(tar_bytes(3)[:700])
    return str(path)


def endless_shard(path: Path) -> str:
    """A tar whose members are complete but whose end-of-archive blocks are missing."""
    data = tar_bytes(2)
    end = 0
    for _ in range(2):  # header block + data blocks of each member
        size = int(data[end + 124:end + 136].rstrip(b"\0 ") or b"0", 8)
        end += 512 + -(-size // 512) * 512
    path.write_bytes(data[:end])
    return str(path)


def empty_shard(path: Path) -> str:
    with tarfile.open(path, "w"):
        pass
    return str(path)


def drain(pipe: Pipeline) -> int:
    return sum(b.num_images for b in pipe)


# ------------------------------------------------------------------------------ failures count


def test_raise_mode_names_the_failed_shard(tmp_path):
    shards = [good_shard(tmp_path / "ok.tar", 3), garbage_shard(tmp_path / "junk.tar")]
    with pytest.raises(SourceError, match="junk.tar"):
        drain(Pipeline(recipe(on_error="raise", shuffle_shards=False), shards))


def test_three_of_four_unreadable_shards_trip_the_guard(tmp_path, caplog):
    good = good_shard(tmp_path / "ok.tar", 6)
    broken = [garbage_shard(tmp_path / "junk.tar"), cut_shard(tmp_path / "cut.tar"),
              endless_shard(tmp_path / "endless.tar")]
    pipe = Pipeline(recipe(), [good, *broken])  # default: skip, max_skip_ratio 0.05
    with caplog.at_level(logging.WARNING, logger="patchloom"), pytest.raises(SkipRatioError) as err:
        drain(pipe)
    text = str(err.value)
    assert "shards failed" in text and "source.max_skip_ratio=0.05" in text
    named = [b for b in broken if b in text]
    assert named and "ok.tar" not in text
    # Each failed shard seen is named once, with its reason, in the ledger and in one warning.
    errors = pipe.ledger.shard_errors
    assert {e.shard for e in errors} == set(named) and all(e.reason for e in errors)
    warned = [r.getMessage() for r in caplog.records if "failed" in r.getMessage()]
    assert sorted(m.split()[1] for m in warned) == sorted(named)


def test_every_shard_unreadable_fails_with_or_without_the_guard(tmp_path):
    shards = [garbage_shard(tmp_path / "a.tar"), cut_shard(tmp_path / "b.tar")]
    with pytest.raises(SkipRatioError, match="shards failed"):
        drain(Pipeline(recipe(), shards))
    # b.tar broke off inside its first sample: that one sample is read and skipped with a reason.
    with pytest.raises(EmptyEpochError, match=r"2 shards, 2 opened, 2 failed \(.*a\.tar: ShardError: .*; "
                                              r"1 samples read, all skipped \(1 x read: shard broke off"):
        drain(Pipeline(recipe(max_skip_ratio=None, shuffle_shards=False), shards))


def test_shard_share_at_the_limit_passes_and_over_it_stops_early(tmp_path):
    paths = [good_shard(tmp_path / f"s{i:02d}.tar", 1, seed=i) for i in range(20)]
    one_bad = [garbage_shard(tmp_path / "bad0.tar"), *paths[1:]]
    pipe = Pipeline(recipe(shuffle_shards=False), one_bad)
    assert drain(pipe) == 19  # 1 of 20 = 0.05: not over the limit
    assert (pipe.ledger.shards_read, pipe.ledger.shards_failed) == (20, 1)
    two_bad = [one_bad[0], garbage_shard(tmp_path / "bad1.tar"), *paths[2:]]
    pipe = Pipeline(recipe(shuffle_shards=False), two_bad)
    with pytest.raises(SkipRatioError, match="stopped after 2 of 20 shards"):
        drain(pipe)
    assert pipe.ledger.shards_read == 2  # the verdict was certain: the other 18 were not read


def test_shard_share_of_an_epoch_cut_short_is_judged_at_its_end(tmp_path):
    # An epoch of 4 samples opens 5 of the 10 shards: 1 failed of 5 opened is 20 %. The early verdict
    # (1 > 0.1 x 10) never holds; the end of the epoch judges the shards actually opened.
    shards = [garbage_shard(tmp_path / "bad.tar"), *(good_shard(tmp_path / f"s{i}.tar", 1, seed=i) for i in range(9))]
    r = Recipe.from_dict({**BASE, "source": {"shuffle_shards": False, "max_skip_ratio": 0.1},
                          "epoch": {"samples": 4}})
    pipe = Pipeline(r, shards)
    with pytest.raises(SkipRatioError, match=r"1 of 5 shards failed \(20.0 %\), over source.max_skip_ratio=0.1: "):
        drain(pipe)
    assert pipe.ledger.read == 4
    assert drain(Pipeline(r.replace(source={"max_skip_ratio": 0.2}), shards)) == 4


# ------------------------------------------------------------------------------ empty epochs


@pytest.mark.parametrize("on_error", ["skip", "raise"])
def test_an_epoch_with_no_samples_is_an_error(tmp_path, on_error):
    shards = [empty_shard(tmp_path / "e0.tar"), empty_shard(tmp_path / "e1.tar")]
    with pytest.raises(EmptyEpochError, match="epoch 0 yielded no samples: 2 shards, 2 opened; 0 samples read"):
        drain(Pipeline(recipe(on_error=on_error), shards))
    with pytest.raises(EmptyEpochError):
        list(Pipeline(recipe(on_error=on_error), shards).samples())


def test_a_worker_or_rank_with_an_empty_share(tmp_path):
    shard = good_shard(tmp_path / "one.tar", 1)
    # DataLoader worker 1 of 2 gets no sample of a one-sample shard: legitimate, judged by the loader.
    assert drain(Pipeline(recipe(), shard, worker=1, num_workers=2)) == 0
    with pytest.warns(UserWarning, match="readers share shards"):
        assert drain(Pipeline(recipe(), shard, worker=0, num_workers=2)) == 1
    # A rank is a whole epoch for its trainer: an empty one is an error that names it.
    with pytest.raises(EmptyEpochError, match="on rank 1 of 2"):
        drain(Pipeline(recipe(), shard, rank=1, world_size=2))


def test_skip_mode_gives_no_advice_to_set_skip(tmp_path, caplog):
    rng = np.random.default_rng(0)
    buf = io.BytesIO()
    Image.fromarray(random_image(rng, 64, 64)).save(buf, format="JPEG", quality=90)
    jpeg = buf.getvalue()
    samples = [(f"g{i}", {"jpg": jpeg, "cls": b"1"}) for i in range(3)] + [("cut", {"jpg": jpeg[: len(jpeg) // 2]})]
    shard = str(write_shard(tmp_path / "j.tar", samples))
    pipe = Pipeline(recipe(), shard)
    with caplog.at_level(logging.WARNING, logger="patchloom"):
        assert drain(pipe) == 3
    (skip,) = pipe.ledger.skipped
    assert skip.key == "cut" and skip.stage == "decode" and "truncated image data" in skip.reason
    assert "on_error" not in skip.reason
    assert not any("on_error: skip" in r.getMessage() for r in caplog.records)


# ------------------------------------------------------------------------------ bounded state


def test_ten_thousand_skips_keep_the_state_small(tmp_path):
    samples = [(f"b{i:05d}", {"png": b"no"}) for i in range(10_000)]
    samples += [(f"g{i}", {"png": encode_png(random_image(np.random.default_rng(i), 8, 8))}) for i in range(8)]
    shard = str(write_shard(tmp_path / "many.tar", samples))
    r = recipe(max_skip_ratio=None, shuffle_buffer=0, shuffle_shards=False)
    pipe = Pipeline(r, shard)
    it = iter(pipe)
    next(it)
    mid = json.dumps(pipe.state_dict())
    rest = list(it)
    end = json.dumps(pipe.state_dict())
    led = pipe.ledger
    assert led.skipped_count == len(led.skipped) == 10_000 and led.read == 10_008
    assert len(mid) < 4096 and len(end) < 4096  # was ~2 MB: one entry per skipped sample
    # Resumed from the small state, the counts carry on and still balance.
    again = Pipeline(r, shard)
    again.load_state_dict(json.loads(mid))
    resumed = 0
    for _ in again:
        resumed += 1
        assert again.ledger.read == again.ledger.emitted + again.ledger.skipped_count + again.in_buffer
    assert resumed == len(rest)
    assert again.ledger.to_dict() == led.to_dict()
    assert again.ledger.read == again.ledger.emitted + again.ledger.skipped_count + again.in_buffer
    assert len(again.ledger.skipped) < 10_000  # the full list lives in the first run (and its --ledger file)


def test_ledger_state_is_bounded_whatever_the_reasons():
    led = Ledger()
    for i in range(10_000):
        led.read += 1
        led.add_skip(Skip(f"/data/shard-{i % 97}.tar", f"key{i}", "decode", f"DecodeError: odd thing number {i}"))
    for i in range(500):
        led.add_shard_error(Skip(f"/data/broken-{i}.tar", "", "read", "ShardError: cut off"))
    state = led.state_dict()
    assert len(json.dumps(state)) < 8192
    # MAX_REASONS distinct reasons, then the rest counted together.
    assert len(state["skip_reasons"]) == MAX_REASONS + 1 and sum(state["skip_reasons"].values()) == 10_000
    assert state["skip_reasons"][OTHER_REASONS] == 10_000 - MAX_REASONS
    assert all(len(v) <= EXAMPLES_PER_REASON for v in state["skip_examples"].values())
    back = Ledger.from_state(json.loads(json.dumps(state)))
    assert (back.skipped_count, back.shards_failed, back.in_buffer) == (10_000, 500, 0)
    assert back.reasons() == led.reasons()


# ------------------------------------------------------------------------------ resume identity


def _state_after_one_batch(r: Recipe, shards: list[str]) -> dict:
    pipe = Pipeline(r, shards)
    next(iter(pipe))
    return json.loads(json.dumps(pipe.state_dict()))


@pytest.fixture
def four(tmp_path) -> list[str]:
    return [good_shard(tmp_path / f"p{i}.tar", 5, seed=i) for i in range(4)]


def test_resume_into_the_same_shards_works(four):
    r = recipe()
    state = _state_after_one_batch(r, four)
    assert [s["url"] for s in state["shards"]] == four and all(s["size"] for s in state["shards"])
    Pipeline(r, four).load_state_dict(state)


def test_resume_refuses_a_reordered_list(four):
    state = _state_after_one_batch(recipe(), four)
    with pytest.raises(ValueError, match="reordered"):
        Pipeline(recipe(), [four[1], four[0], *four[2:]]).load_state_dict(state)


def test_resume_refuses_a_swapped_shard(four, tmp_path):
    state = _state_after_one_batch(recipe(), four)
    other = good_shard(tmp_path / "other.tar", 5, seed=9)
    with pytest.raises(ValueError, match="other.tar"):
        Pipeline(recipe(), [*four[:3], other]).load_state_dict(state)


def test_resume_refuses_a_shard_rewritten_in_place(four):
    state = _state_after_one_batch(recipe(), four)
    good_shard(Path(four[2]), 40, seed=2)  # many more samples: the size changes
    with pytest.raises(ValueError, match=r"p2.tar was rewritten .*size"):
        Pipeline(recipe(), four).load_state_dict(state)
    state = _state_after_one_batch(recipe(), four)
    st = os.stat(four[3])
    os.utime(four[3], ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))  # same bytes, touched
    with pytest.raises(ValueError, match=r"p3.tar was rewritten .*mtime"):
        Pipeline(recipe(), four).load_state_dict(state)


def test_resume_refuses_shards_swapped_with_equal_size_and_time(tmp_path):
    """Shards copied with their times kept (`cp -p`, unpacked from one archive) and then swapped:
    size and mtime agree, the bytes do not."""
    a, b = good_shard(tmp_path / "a.tar", 5, seed=1), good_shard(tmp_path / "b.tar", 5, seed=2)
    assert os.path.getsize(a) == os.path.getsize(b)
    for path in (a, b):
        os.utime(path, ns=(1_700_000_000_000_000_000, 1_700_000_000_000_000_000))
    state = _state_after_one_batch(recipe(), [a, b])
    os.rename(a, tmp_path / "tmp.tar")
    os.rename(b, a)
    os.rename(tmp_path / "tmp.tar", b)
    for path in (a, b):
        os.utime(path, ns=(1_700_000_000_000_000_000, 1_700_000_000_000_000_000))
    with pytest.raises(ValueError, match=r"a.tar holds other bytes"):
        Pipeline(recipe(), [a, b]).load_state_dict(state)


def test_an_old_state_version_is_a_clear_error(four):
    state = _state_after_one_batch(recipe(), four)
    with pytest.raises(ValueError, match="older patchloom .*start the epoch afresh"):
        Pipeline(recipe(), four).load_state_dict({**state, "version": 1})


# ------------------------------------------------------------------------------ check_resume ledger


def test_check_resume_covers_the_ledger_with_skips_and_a_failed_shard(tmp_path):
    shards = [good_shard(tmp_path / "a.tar", 20, bad=3), cut_shard(tmp_path / "cut.tar"),
              good_shard(tmp_path / "b.tar", 15, seed=1, bad=2)]
    r = recipe(max_skip_ratio=None)
    report = check_resume(lambda: Pipeline(r, shards), every=1)
    assert report.batches >= 3


def test_check_resume_fails_when_a_resume_loses_ledger_counts(tmp_path):
    shards = [good_shard(tmp_path / "a.tar", 12, bad=4)]
    r = recipe(max_skip_ratio=None)
    made = []

    def make():
        made.append(1)
        pipe = Pipeline(r, shards)
        if len(made) > 1:
            original = pipe.load_state_dict

            def forgetful(state):  # same batches, but the skips before the resume are forgotten
                led = {**state["ledger"], "skipped": 0, "skip_reasons": {}, "read": state["ledger"]["read"]
                       - state["ledger"]["skipped"]}
                original({**state, "ledger": led})

            pipe.load_state_dict = forgetful
        return pipe

    with pytest.raises(AssertionError, match="resumed at batch .*ledger"):
        check_resume(make, every=1)


# ------------------------------------------------------------------------------ command line


def _recipe_file(tmp_path, **source) -> str:
    path = tmp_path / "r.yaml"
    path.write_text(recipe(**source).to_yaml())
    return str(path)


def test_run_warns_once_per_failed_shard_and_summarises(tmp_path, capsys, caplog):
    shards = [good_shard(tmp_path / "ok.tar", 5), garbage_shard(tmp_path / "junk.tar")]
    spec = str(tmp_path / "*.tar")
    out = tmp_path / "ledger.jsonl"
    with caplog.at_level(logging.WARNING, logger="patchloom"):
        code = main(["run", _recipe_file(tmp_path, max_skip_ratio=None), "--shards", spec, "--no-progress",
                     "--ledger", str(out)])
    assert code == 0
    warned = [r.getMessage() for r in caplog.records if r.getMessage().startswith("shard ")]
    assert len(warned) == 1 and shards[1] in warned[0]
    table = capsys.readouterr().out
    assert "shards failed   1 of 2" in table and f"shard error     {shards[1]}: " in table
    lines = [json.loads(x) for x in out.read_text().splitlines()]
    assert lines[-1]["summary"]["shards_failed"] == 1 and lines[0]["shard"] == shards[1]


def test_run_stopped_by_the_guard_still_prints_the_table(tmp_path, capsys):
    good_shard(tmp_path / "ok.tar", 5)
    garbage_shard(tmp_path / "junk.tar")
    code = main(["run", _recipe_file(tmp_path), "--shards", str(tmp_path / "*.tar"), "--no-progress"])
    captured = capsys.readouterr()
    assert code == 2
    assert "stopped by the error below" in captured.out and "shards failed   1" in captured.out
    assert "junk.tar" in captured.err and "max_skip_ratio" in captured.err


def test_summary_names_the_first_failed_shards_and_counts_the_rest():
    ledger = {"read": 4, "emitted": 4, "skipped": 0, "shards_read": 9, "shards_failed": 5,
              "shard_errors": [f"/d/s{i}.tar: ShardError: cut off" for i in range(5)]}
    text = format_table(RunStats(), ledger)
    assert "shards failed   5 of 9" in text
    assert "/d/s2.tar" in text and "/d/s3.tar" not in text and "and 2 more" in text


def test_inspect_warns_once_per_failed_shard(tmp_path, caplog, capsys):
    shards = [good_shard(tmp_path / "ok.tar", 6), cut_shard(tmp_path / "cut.tar")]
    with caplog.at_level(logging.WARNING, logger="patchloom"):
        code = main(["inspect", _recipe_file(tmp_path, max_skip_ratio=None), "--shards", str(tmp_path / "*.tar"),
                     "--samples", "1", "--out", str(tmp_path / "rep"), "--no-progress"])
    assert code in (0, 1)  # 1: flags raised (the failed shard is one)
    warned = [r.getMessage() for r in caplog.records if r.getMessage().startswith("shard ")]
    assert len(warned) == 1 and shards[1] in warned[0]
    assert "shard_error" in capsys.readouterr().out


# ------------------------------------------------------------------------------ DataLoader workers

def _loader(r: Recipe, shards: list[str], workers: int):
    pytest.importorskip("torch", reason="the torch extra is not installed")
    from patchloom.adapters.torch import PatchloomDataset, PatchloomLoader

    return PatchloomLoader(PatchloomDataset(r, shards), num_workers=workers)


def test_two_workers_trip_the_guard_in_the_main_process(tmp_path):
    shards = [good_shard(tmp_path / "ok.tar", 6), garbage_shard(tmp_path / "junk.tar"),
              cut_shard(tmp_path / "cut.tar"), endless_shard(tmp_path / "endless.tar")]
    loader = _loader(recipe(), shards, 2)
    with pytest.raises(SkipRatioError) as err:
        list(loader)
    text = str(err.value)
    assert "worker process" not in text  # judged here over the merged ledgers, not re-raised from a worker
    assert "shards failed" in text and any(s in text for s in shards[1:])
    assert loader.ledger.shards_failed >= 1


def test_a_worker_whose_shards_all_fail_still_reports(tmp_path):
    # Worker 1 gets only broken shards and makes no batch: its failures still reach the main process.
    shards = [good_shard(tmp_path / "a.tar", 6), garbage_shard(tmp_path / "junk.tar"),
              good_shard(tmp_path / "b.tar", 6, seed=1), cut_shard(tmp_path / "cut.tar")]
    loader = _loader(recipe(max_skip_ratio=None, shuffle_shards=False), shards, 2)
    assert sum(len([k for k in row if k]) for b in loader for row in b["keys"]) == 12
    led = loader.ledger
    assert (led.shards_read, led.shards_failed) == (4, 2)
    assert sorted(e.shard for e in led.shard_errors) == sorted(shards[1::2])


def test_all_workers_empty_is_an_error_one_empty_worker_is_not(tmp_path):
    one = [good_shard(tmp_path / "one.tar", 1)]
    loader = _loader(recipe(), one, 2)
    assert len(list(loader)) == 1 and loader.ledger.read == 1  # worker 1's share of it is empty
    empty = [empty_shard(tmp_path / "e0.tar"), empty_shard(tmp_path / "e1.tar")]
    with pytest.raises(EmptyEpochError, match="2 DataLoader workers together"):
        list(_loader(recipe(), empty, 2))


def test_merged_worker_ledgers_equal_the_single_process_ledger(tmp_path):
    shards = [good_shard(tmp_path / f"p{i}.tar", 6, seed=i, bad=1) for i in range(4)]
    r = recipe()
    keys = ("read", "emitted", "skipped", "in_buffer", "repeated", "skip_reasons", "shards_read",
            "shards_failed", "shard_errors")
    pipe = Pipeline(r, shards)
    drain(pipe)
    want = {k: pipe.ledger.to_dict()[k] for k in keys}
    assert want["skipped"] == 4 and want["emitted"] == 24 and want["shards_read"] == 4
    for workers in (0, 2):
        loader = _loader(r, shards, workers)
        list(loader)
        led = loader.ledger
        assert {k: led.to_dict()[k] for k in keys} == want, workers
        assert sorted(s.key for s in led.skipped) == sorted(s.key for s in pipe.ledger.skipped)


def test_loader_resume_refuses_changed_shards(tmp_path):
    shards = [good_shard(tmp_path / f"p{i}.tar", 5, seed=i) for i in range(3)]
    r = recipe()
    first = _loader(r, shards, 0)
    it = iter(first)
    next(it)
    state = json.loads(json.dumps(first.state_dict()))
    assert len(state["shards"]) == 3 and all("shards" not in s for s in state["slots"].values())
    good_shard(Path(shards[1]), 7, seed=1)
    with pytest.raises(ValueError, match="p1.tar was rewritten"):
        _loader(r, shards, 0).load_state_dict(state)
