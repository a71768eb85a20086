"""Tests for patchloom.image.chain: the stages a recipe builds (unused ones left out), one chain per
recipe, the timings and trace it fills, and SampleError naming shard, key and stage."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from patchloom import Recipe
from patchloom.image import chain
from patchloom.image.chain import SampleError, chain_for, from_pixels, process_record
from patchloom.read import Record

BASE = {"seed": 5, "sizing": {"patch_size": 8, "max_tokens": 48, "min_tokens": 4},
        "packing": {"seq_len": 64, "rows": 1, "max_images_per_row": 4}, "source": {"label_key": "cls"}}
DROP_OPS = {**BASE, "drop": {"mode": "random", "rate": 0.5}, "patch_ops": [{"name": "jitter"}],
            "output": {"dtype": "float32"}}


def png(h: int = 40, w: int = 64) -> bytes:
    arr = np.random.default_rng(0).integers(0, 256, (h, w, 3), dtype=np.uint8)
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return buf.getvalue()


def names(stages) -> tuple[str, ...]:
    return tuple(s.name for s in stages)


def test_a_plain_recipe_builds_only_the_stages_it_uses():
    c = chain_for(Recipe.from_dict(BASE))
    assert names(c.record) == ("read", "select", "decode", "sizing", "decode", "resize", "patches", "output")
    assert names(c.pixels) == ("sizing", "resize", "patches", "output")
    c = chain_for(Recipe.from_dict(DROP_OPS))
    assert names(c.record)[-4:] == ("resize", "patches", "drop", "patch_ops")
    assert "output" not in names(c.record) and "augment" not in names(c.record)


def test_augment_before_sizing_decodes_first_and_augment_after_follows_resize():
    pytest.importorskip("albumentations")
    recipe = Recipe.from_dict({**BASE, "augment": [{"name": "Transpose", "p": 1.0},
                                                   {"name": "HorizontalFlip", "p": 0.5}]})
    c = chain_for(recipe)
    assert names(c.record) == ("read", "select", "decode", "decode", "augment", "sizing", "resize", "augment",
                               "patches", "output")
    assert names(c.pixels) == ("augment", "sizing", "resize", "augment", "patches", "output")
    trace: dict = {}
    timings: dict = {}
    ps = process_record(Record("k", "mem.tar", 0, {"png": png()}), recipe, 0, trace=trace, timings=timings)
    assert set(timings) == {"header", "decode", "augment", "sizing", "resize", "patches", "output"}
    assert list(trace) == ["original", "decoded", "plan", "resized", "augmented", "patchset"]
    assert trace["original"].size == (64, 40) and trace["decoded"].size == (40, 64)  # transposed
    assert trace["patchset"] is ps


def test_the_chain_is_built_once_per_recipe():
    recipe = Recipe.from_dict(BASE)
    assert chain_for(recipe) is chain_for(recipe)
    assert chain_for(Recipe.from_dict(BASE)) is chain_for(recipe)  # an equal recipe: same fingerprint
    assert chain_for(Recipe.from_dict(DROP_OPS)) is not chain_for(recipe)


def test_timings_and_trace_name_every_stage_that_ran():
    recipe = Recipe.from_dict(DROP_OPS)
    trace: dict = {}
    timings: dict = {}
    ps = process_record(Record("k", "mem.tar", 0, {"png": png(), "cls": b"7"}), recipe, 1, trace=trace,
                        timings=timings)
    assert set(timings) == {"header", "sizing", "decode", "resize", "patches", "drop", "patch_ops"}
    assert all(v >= 0 for v in timings.values())
    assert list(trace) == ["original", "decoded", "plan", "resized", "augmented", "drop", "patchset"]
    assert trace["decoded"] is trace["original"] and trace["augmented"] is trace["resized"]
    assert trace["patchset"] is ps and ps.label == 7
    assert ps.num_tokens == trace["drop"].kept < trace["plan"].tokens
    again = process_record(Record("k", "mem.tar", 0, {"png": png(), "cls": b"7"}), recipe, 1)
    np.testing.assert_array_equal(again.patches, ps.patches)  # tracing and timing change nothing


@pytest.mark.parametrize("rec, stage", [
    (Record("k", "s.tar", 0, {"png": b""}, error="shard ended inside this sample"), "read"),
    (Record("k", "s.tar", 0, {"png": png(), "cls": b"seven"}), "select"),
    (Record("k", "s.tar", 0, {"txt": b"no image"}), "select"),
    (Record("k", "s.tar", 0, {"png": png()[:60]}), "decode"),
])
def test_a_failure_names_shard_key_and_stage(rec, stage):
    with pytest.raises(SampleError) as info:
        process_record(rec, Recipe.from_dict(BASE), 0)
    assert (info.value.shard, info.value.key, info.value.stage) == ("s.tar", "k", stage)
    assert str(info.value).startswith(f"shard s.tar, key 'k', stage {stage}: ")


def test_a_late_failure_is_named_on_records_and_comes_through_unchanged_on_pixels(monkeypatch):
    def broken(*args, **kwargs):
        raise RuntimeError("no filter")

    monkeypatch.setattr(chain, "resize_to_plan", broken)
    recipe = Recipe.from_dict(BASE)
    timings: dict = {}
    with pytest.raises(SampleError, match=r"stage resize: RuntimeError: no filter") as info:
        process_record(Record("k", "s.tar", 0, {"png": png()}), recipe, 0, timings=timings)
    assert info.value.stage == "resize" and "resize" in timings and "patches" not in timings
    with pytest.raises(RuntimeError, match="no filter"):
        from_pixels(Image.new("RGB", (30, 20)), recipe, seed=0, epoch=0, key="k", label=None, meta={})
