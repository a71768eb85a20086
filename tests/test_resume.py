"""Exact resume (shipped helper), equal work per rank, and epochs defined in batches or samples."""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path

import pytest

from patchloom import Pipeline, Recipe
from patchloom.demo.data import demo_shard_pattern
from patchloom.pipeline import STATE_VERSION, StateError
from patchloom.testing import check_resume

from conftest import make_shards

RECIPES = sorted((Path(__file__).parent.parent / "recipes").glob("*.yaml"))
SMALL = {"source": {"shuffle_buffer": 7},
         "sizing": {"patch_size": 8, "max_tokens": 64, "min_tokens": 4, "mode": "sampled",
                    "sampled": {"range": [8, 64]}},
         "packing": {"seq_len": 128, "rows": 2, "max_images_per_row": 6, "lookahead": 9}}


def keys_of(pipe) -> list[str]:
    return [k for b in pipe for row in b.keys for k in row]


def checked_keys(pipe) -> list[str]:
    """keys_of(pipe), checking read == emitted + skipped + in_buffer after every batch."""
    keys = []
    for b in pipe:
        led = pipe.ledger
        assert led.read == led.emitted + led.skipped_count + pipe.in_buffer, (led.to_dict(), pipe.in_buffer)
        keys += [k for row in b.keys for k in row]
    assert pipe.in_buffer == 0
    return keys


@pytest.mark.parametrize("path", RECIPES, ids=[p.name for p in RECIPES])
def test_every_recipe_resumes_exactly(path, demo_dir):
    recipe = Recipe.from_file(path).replace(packing={"rows": 2, "lookahead": 12})
    report = check_resume(lambda: Pipeline(recipe, demo_shard_pattern(demo_dir)), every=2)
    assert report.batches >= 3
    assert report.positions[0] == 0 and report.positions[-1] == report.batches  # start and end of epoch


def test_resume_at_every_batch_mid_buffer(tmp_path):
    paths = make_shards(tmp_path, 3, 15)
    recipe = Recipe.from_dict(SMALL)
    report = check_resume(lambda: Pipeline(recipe, paths, epoch=3), every=1)
    assert report.positions == list(range(report.batches + 1))
    # The state is small: buffered samples are references, not pixels.
    assert max(report.state_bytes) < 4000


def test_resume_detects_a_wrong_continuation(tmp_path):
    """The helper must be able to fail: a pipeline that resumes into another epoch is caught."""
    paths = make_shards(tmp_path, 2, 12)
    recipe = Recipe.from_dict(SMALL)
    made = []

    def make():
        made.append(1)
        pipe = Pipeline(recipe, paths)
        if len(made) > 1:
            original = pipe.load_state_dict
            start = pipe.state_dict()  # the state of a pipeline that has not begun

            def wrong(state):
                original(start)  # drop the saved position and buffers: start over instead

            pipe.load_state_dict = wrong
        return pipe

    with pytest.raises(AssertionError, match="resumed at batch"):
        check_resume(make, every=2)


def test_state_is_json_and_refuses_other_layouts(tmp_path):
    paths = make_shards(tmp_path, 2, 10)
    recipe = Recipe.from_dict(SMALL)
    pipe = Pipeline(recipe, paths)
    it = iter(pipe)
    next(it)
    state = json.loads(json.dumps(pipe.state_dict()))
    with pytest.raises(ValueError, match="world_size"):
        Pipeline(recipe, paths, rank=0, world_size=2).load_state_dict(state)
    with pytest.raises(ValueError, match="different recipe"):
        Pipeline(recipe.replace(seed=9), paths).load_state_dict(state)
    with pytest.raises(ValueError, match="version"):
        Pipeline(recipe, paths).load_state_dict({**state, "version": 99})


@pytest.mark.parametrize("world", [1, 2, 3, 8])
def test_ranks_get_disjoint_complete_shares(tmp_path, world):
    paths = make_shards(tmp_path, 5, 6)
    recipe = Recipe.from_dict(SMALL)
    single = Counter(keys_of(Pipeline(recipe, paths)))
    union: Counter = Counter()
    for rank in range(world):
        if world > 5 and rank == 0:
            with pytest.warns(UserWarning, match="readers share shards"):
                union.update(keys_of(Pipeline(recipe, paths, rank=rank, world_size=world)))
        else:
            union.update(keys_of(Pipeline(recipe, paths, rank=rank, world_size=world)))
    assert union == single and max(union.values()) == 1


@pytest.mark.parametrize("world", [2, 3, 8])
def test_equalize_gives_every_rank_the_same_batch_count(tmp_path, world):
    paths = make_shards(tmp_path, 5, 6)
    recipe = Recipe.from_dict({**SMALL, "epoch": {"batches": 4, "equalize": True}})
    counts, repeated = [], []
    for rank in range(world):
        pipe = Pipeline(recipe, paths, rank=rank, world_size=world)
        counts.append(sum(1 for _ in pipe))
        repeated.append(pipe.ledger.repeated)
        led = pipe.ledger
        assert led.read == led.emitted + len(led.skipped) + pipe.in_buffer
    assert counts == [4] * world
    assert sum(repeated) > 0  # small shares were topped up by re-reading, and it was counted
    # Without equalize the same ranks yield different counts (the test can tell).
    plain = Recipe.from_dict(SMALL)
    uneven = [sum(1 for _ in Pipeline(plain, paths, rank=r, world_size=world)) for r in range(world)]
    assert len(set(uneven)) > 1 or uneven[0] != 4


def test_epoch_in_samples_reads_exactly_that_many(tmp_path):
    paths = make_shards(tmp_path, 2, 10)
    recipe = Recipe.from_dict({**SMALL, "epoch": {"samples": 13}})
    pipe = Pipeline(recipe, paths)
    assert len(keys_of(pipe)) == 13 and pipe.ledger.read == 13
    topped = Pipeline(Recipe.from_dict({**SMALL, "epoch": {"samples": 33, "equalize": True}}), paths)
    keys = keys_of(topped)
    assert len(keys) == 33 and topped.ledger.repeated == 13 and len(set(keys)) == 20


def test_equalized_epoch_resumes_exactly_across_a_top_up(tmp_path):
    paths = make_shards(tmp_path, 2, 5)
    recipe = Recipe.from_dict({**SMALL, "epoch": {"batches": 6, "equalize": True}})
    report = check_resume(lambda: Pipeline(recipe, paths, rank=1, world_size=2), every=1)
    assert report.batches == 6


def test_state_nests_one_section_per_stage(tmp_path):
    paths = make_shards(tmp_path, 2, 10)
    pipe = Pipeline(Recipe.from_dict(SMALL), paths)
    fresh = pipe.state_dict()
    it = iter(pipe)
    next(it)
    state = json.loads(json.dumps(pipe.state_dict()))
    top = {"version", "fingerprint", "epoch", "rank", "world_size", "worker", "num_workers", "batches",
           "reader", "shuffle", "packer", "ledger", "shards"}
    assert set(state) == set(fresh) == top and state["version"] == STATE_VERSION
    assert set(state["shuffle"]) == {"rng", "held"} and set(state["packer"]) == {"pending"}
    assert len(state["shuffle"]["held"]) + len(state["packer"]["pending"]) == pipe.in_buffer > 0
    assert state["ledger"]["read"] == pipe.ledger.read and state["reader"]["count"] == pipe.ledger.read
    assert all(len(ref) == 3 and ref[0] in paths for ref in state["packer"]["pending"])  # shard, index, waited


def _old_or_foreign(state: dict) -> dict[str, object]:
    v2 = {k: v for k, v in state.items() if k not in ("shuffle", "packer")}
    v2.update(version=2, shuffle_rng=state["shuffle"]["rng"], shuffle_held=[], pending=[], pending_waited=[])
    return {
        "older version": v2,
        "unknown version": {**state, "version": 99},
        "not a dict": [state],
        "section missing": {k: v for k, v in state.items() if k != "packer"},
        "section not a dict": {**state, "reader": [0, 0, 0]},
        "section malformed": {**state, "packer": {"pending": [["only-a-url"]]}},
    }


@pytest.mark.parametrize("kind", ["older version", "unknown version", "not a dict", "section missing",
                                  "section not a dict", "section malformed"])
def test_an_old_or_foreign_state_is_one_clear_error(tmp_path, kind):
    paths = make_shards(tmp_path, 2, 10)
    recipe = Recipe.from_dict(SMALL)
    pipe = Pipeline(recipe, paths)
    it = iter(pipe)
    next(it)
    bad = _old_or_foreign(json.loads(json.dumps(pipe.state_dict())))[kind]
    again = Pipeline(recipe, paths)
    with pytest.raises(StateError, match="start the epoch afresh"):
        again.load_state_dict(bad)
        list(again)  # a malformed section is found when the stages load it


def test_state_taken_after_set_epoch_starts_the_new_epoch(tmp_path):
    """A state saved between epochs (after set_epoch, before iterating) resumes the new epoch whole,
    not the finished reader of the old one."""
    shards = make_shards(tmp_path, 2, 6)
    recipe = Recipe.from_dict({"seed": 2, "source": {"shuffle_buffer": 4},
                               "sizing": {"patch_size": 16, "max_tokens": 16, "min_tokens": 1},
                               "packing": {"seq_len": 64, "rows": 1, "max_images_per_row": 8}})
    pipe = Pipeline(recipe, shards=shards)
    list(pipe)
    pipe.set_epoch(1)
    state = json.loads(json.dumps(pipe.state_dict()))
    fresh = Pipeline(recipe, shards=shards, epoch=1)
    resumed = Pipeline(recipe, shards=shards)
    resumed.load_state_dict(state)
    assert resumed.epoch == 1
    assert checked_keys(resumed) == checked_keys(fresh) and len(keys_of(fresh)) == 12
    assert resumed.ledger.to_dict() == fresh.ledger.to_dict()


def test_a_resumed_run_continues_the_ledger_at_every_batch(tmp_path):
    """After each batch, a run resumed mid-epoch has exactly the ledger of the uninterrupted run after
    the same batch (read, emitted, skipped, in buffer), and both end with every sample counted once."""
    paths = make_shards(tmp_path, 3, 10)
    recipe = Recipe.from_dict(SMALL)
    full = Pipeline(recipe, paths)
    after, states = [], []
    for _ in full:
        after.append(full.ledger.to_dict())
        states.append(json.loads(json.dumps(full.state_dict())))
    assert after[-1]["read"] == after[-1]["emitted"] == 30 and after[-1]["in_buffer"] == 0
    for start in (1, len(after) // 2):
        resumed = Pipeline(recipe, paths)
        resumed.load_state_dict(states[start - 1])
        seen = [resumed.ledger.to_dict() for _ in resumed]
        assert seen == after[start:], start


def test_check_resume_catches_a_resume_that_forgets_the_saved_ledger(tmp_path):
    """A resume that restores the reader, buffer and packer but starts the ledger from zero makes the
    same batches; check_resume must still fail, at the first batch after the resume."""
    paths = make_shards(tmp_path, 2, 12)
    recipe = Recipe.from_dict(SMALL)
    made = []

    def make():
        made.append(1)
        pipe = Pipeline(recipe, paths)
        if len(made) > 1:
            original = pipe.load_state_dict

            def forgetful(state):
                blank = Pipeline(recipe, paths).state_dict()["ledger"]
                original({**state, "ledger": {**blank, "shards_planned": state["ledger"]["shards_planned"]}})

            pipe.load_state_dict = forgetful
        return pipe

    with pytest.raises(AssertionError, match=r"resumed at batch [1-9]\d*, batch [1-9]\d*: ledger does not balance"):
        check_resume(make, every=1)


@pytest.mark.parametrize(("version", "words"), [
    (1, "older patchloom"), (STATE_VERSION - 1, "older patchloom"), (0, "unknown state version 0"),
    (-1, "unknown state version -1"), (STATE_VERSION + 1, f"unknown state version {STATE_VERSION + 1}"),
    ("3", "unknown state version '3'"), (None, "unknown state version None"),
    (True, "unknown state version True"), (float(STATE_VERSION), f"unknown state version {float(STATE_VERSION)}"),
])
def test_state_versions_at_the_edges_get_the_right_message(version, words):
    """Only 1 .. STATE_VERSION - 1 are states of an older patchloom; anything else is not ours."""
    from patchloom.pipeline import check_state_version

    check_state_version(STATE_VERSION)
    with pytest.raises(StateError, match=words):
        check_state_version(version)


def test_a_pipeline_not_started_holds_nothing_and_a_loaded_state_is_handed_back_as_loaded(tmp_path):
    paths = make_shards(tmp_path, 2, 6)
    recipe = Recipe.from_dict(SMALL)
    fresh = Pipeline(recipe, paths)
    assert fresh.in_buffer == 0 and fresh.ledger.read == 0
    pipe = Pipeline(recipe, paths)
    it = iter(pipe)
    next(it)
    state = json.loads(json.dumps(pipe.state_dict()))
    again = Pipeline(recipe, paths)
    again.load_state_dict(state)
    assert again.in_buffer == 0  # nothing is read back before the first batch is asked for
    assert again.state_dict() == state  # loaded, not iterated: the loaded state still stands
    assert again.state_dict(with_shards=False) == {k: v for k, v in state.items() if k != "shards"}
    assert "shards" not in pipe.state_dict(with_shards=False) and pipe.state_dict()["shards"] == state["shards"]


def test_an_epoch_of_more_batches_than_the_data_gives_ends_with_every_flush_batch(tmp_path):
    """epoch.batches is a cap without equalize: past the end of the data every batch the packer's
    flush makes is still yielded; a cap that falls inside the flush stops exactly there."""
    paths = make_shards(tmp_path, 2, 10)
    big_buffer = {**SMALL, "packing": {**SMALL["packing"], "lookahead": 30}}  # most batches come from flush
    natural = Pipeline(Recipe.from_dict(big_buffer), paths)
    n = sum(1 for _ in natural)
    assert n >= 3 and natural.ledger.emitted == 20
    capped = Pipeline(Recipe.from_dict({**big_buffer, "epoch": {"batches": 100}}), paths)
    assert sum(1 for _ in capped) == n and capped.ledger.emitted == 20
    cut = Pipeline(Recipe.from_dict({**big_buffer, "epoch": {"batches": n - 1}}), paths)
    assert sum(1 for _ in cut) == n - 1
