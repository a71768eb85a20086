"""Error policy: the skip-ratio guard, the per-sample byte limit, the JSON-lines ledger,
rate-limited logging, and SampleError surviving a trip through a DataLoader worker."""

from __future__ import annotations

import json
import logging

import numpy as np
import pytest

from patchloom import Pipeline, Recipe, SampleError, SkipRatioError
from patchloom.cli.main import main
from patchloom.pipeline import EmptyEpochError

from conftest import encode_png, random_image, write_shard

BASE = {"sizing": {"patch_size": 8, "max_tokens": 16}, "packing": {"seq_len": 64, "rows": 2, "lookahead": 8}}


def shard_with(tmp_path, good: int, bad: int, name="mix.tar"):
    rng = np.random.default_rng(0)
    png = encode_png(random_image(rng, 16, 16))
    samples = [(f"g{i:04d}", {"png": png, "cls": b"1"}) for i in range(good)]
    samples += [(f"b{i:04d}", {"png": b"not an image", "cls": b"1"}) for i in range(bad)]
    order = np.random.default_rng(1).permutation(len(samples))
    return str(write_shard(tmp_path / name, [samples[i] for i in order]))


def run(recipe, shard):
    pipe = Pipeline(recipe, shard)
    return pipe, sum(b.num_images for b in pipe)


def test_skip_ratio_past_the_limit_raises_with_reasons(tmp_path):
    shard = shard_with(tmp_path, good=100, bad=20)
    with pytest.raises(SkipRatioError, match=r"over source.max_skip_ratio=0.05: \d+ x decode: not a readable image"):
        run(Recipe.from_dict(BASE), shard)
    pipe, emitted = run(Recipe.from_dict({**BASE, "source": {"max_skip_ratio": None}}), shard)
    assert emitted == 100 and len(pipe.ledger.skipped) == 20
    pipe, emitted = run(Recipe.from_dict({**BASE, "source": {"max_skip_ratio": 0.2}}), shard)
    assert emitted == 100


def test_skip_ratio_under_the_limit_passes(tmp_path):
    pipe, emitted = run(Recipe.from_dict(BASE), shard_with(tmp_path, good=120, bad=3))
    assert emitted == 120 and len(pipe.ledger.skipped) == 3


def test_sample_byte_limit(tmp_path):
    shard = shard_with(tmp_path, good=3, bad=0)
    pipe = Pipeline(Recipe.from_dict({**BASE, "source": {"max_sample_bytes": 100}}), shard)
    # Every sample is over the limit: the epoch yields nothing, which is an error, not silence.
    with pytest.raises(EmptyEpochError, match="3 samples read, all skipped"):
        list(pipe)
    assert pipe.ledger.emitted == 0 and len(pipe.ledger.skipped) == 3
    # Refused from the tar header by the reader (stage read), or after reading (stage select).
    assert all("max_sample_bytes" in s.reason and s.stage in ("read", "select") for s in pipe.ledger.skipped)


def test_ledger_jsonl_from_the_command_line(tmp_path, capsys):
    shard = shard_with(tmp_path, good=10, bad=2)
    recipe = tmp_path / "r.yaml"
    recipe.write_text(Recipe.from_dict(BASE).to_yaml())
    out = tmp_path / "ledger.jsonl"
    assert main(["run", str(recipe), "--shards", shard, "--ledger", str(out), "--no-progress"]) == 0
    lines = [json.loads(line) for line in out.read_text().splitlines()]
    assert sorted(line["key"] for line in lines[:-1]) == ["b0000", "b0001"]
    assert all(line["stage"] == "decode" for line in lines[:-1])
    assert lines[-1]["summary"]["read"] == 12 and lines[-1]["summary"]["skipped"] == 2


def test_skips_are_logged_with_a_rate_limit(tmp_path, caplog):
    shard = shard_with(tmp_path, good=0, bad=40)
    with caplog.at_level(logging.WARNING, logger="patchloom"), pytest.raises(EmptyEpochError):
        run(Recipe.from_dict({**BASE, "source": {"max_skip_ratio": None}}), shard)  # nothing good: empty
    messages = [r.getMessage() for r in caplog.records if r.name == "patchloom"]
    assert sum(m.startswith("skipped shard") for m in messages) == 5
    assert 1 <= sum("more samples skipped" in m for m in messages) <= 2  # not one line per sample
    assert len(messages) < 10


def test_sample_error_rebuilds_from_its_message():
    err = SampleError("a.tar", "k1", "decode", "truncated")
    again = SampleError(message=str(err))
    assert str(again) == str(err) == "shard a.tar, key 'k1', stage decode: truncated"
