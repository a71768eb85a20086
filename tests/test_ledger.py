"""The ledger on its own: counts, bounded reasons and examples, its resume state, merging workers'
ledgers, and the guards at their exact thresholds (SKIP_RATIO_MIN_READ reads, a share equal to
max_skip_ratio, an empty epoch). Every expected count is worked out by hand in the test."""

from __future__ import annotations

import json

import numpy as np
import pytest

from patchloom import Pipeline, Recipe, SkipRatioError
from patchloom.ledger import (
    EXAMPLES_PER_REASON,
    MAX_REASONS,
    OTHER_REASONS,
    SHARD_ERRORS_KEPT,
    SKIP_RATIO_MIN_READ,
    EmptyEpochError,
    Ledger,
    Skip,
    check_not_empty,
    check_skip_guard,
    gist,
)

from conftest import encode_png, random_image, write_shard


def ledger(read: int, skipped: int, **counts) -> Ledger:
    led = Ledger(read=read, **counts)
    for i in range(skipped):
        led.add_skip(Skip("/d/s.tar", f"k{i}", "decode", "DecodeError: not a readable image"))
    return led


# ------------------------------------------------------------------------------ the sample guard


def test_the_sample_guard_judges_from_exactly_min_read_samples():
    """README: the share of skipped samples is judged once SKIP_RATIO_MIN_READ (100) are read."""
    assert SKIP_RATIO_MIN_READ == 100
    check_skip_guard(ledger(99, 99), 0.05, final=True)  # 99 reads: too few to judge, even all skipped
    with pytest.raises(SkipRatioError, match=r"6 of 100 samples skipped \(6.0 %\)"):
        check_skip_guard(ledger(100, 6), 0.05, final=False)


def test_a_share_equal_to_the_limit_passes_and_one_more_skip_trips():
    check_skip_guard(ledger(100, 5), 0.05, final=True)  # 5 % is not over 5 %
    check_skip_guard(ledger(200, 10), 0.05, final=True)
    with pytest.raises(SkipRatioError, match="11 of 200"):
        check_skip_guard(ledger(200, 11), 0.05, final=True)
    check_skip_guard(ledger(1000, 1000), None, final=True)  # null turns the guard off
    check_skip_guard(ledger(100, 0), 0.0, final=True)  # a zero limit with no skip passes
    with pytest.raises(SkipRatioError):
        check_skip_guard(ledger(100, 1), 0.0, final=True)


def test_the_shard_guard_at_its_thresholds():
    """Failed / opened over the limit trips at the end of the epoch; before the end only when the
    failures alone exceed limit x the shards planned. Equal to the limit passes."""
    at_limit = Ledger(shards_planned=10, shards_read=10, shards_failed=1)
    check_skip_guard(at_limit, 0.1, final=True)  # 1 of 10 = 10 %: not over
    over = Ledger(shards_planned=10, shards_read=9, shards_failed=1)
    check_skip_guard(over, 0.1, final=False)  # not certain yet: 1 is not over 0.1 x 10
    with pytest.raises(SkipRatioError, match=r"1 of 9 shards failed \(11.1 %\)"):
        check_skip_guard(over, 0.1, final=True)
    certain = Ledger(shards_planned=10, shards_read=2, shards_failed=2)  # 2 > 0.1 x 10 already
    with pytest.raises(SkipRatioError, match=r"stopped after 2 of 10 shards"):
        check_skip_guard(certain, 0.1, final=False)
    check_skip_guard(Ledger(shards_planned=10, shards_read=10), 0.0, final=True)  # no failure: nothing to judge


def _shard(tmp_path, good: int, bad: int) -> str:
    rng = np.random.default_rng(0)
    samples = [(f"g{i:03d}", {"png": encode_png(random_image(rng, 16, 16))}) for i in range(good)]
    samples += [(f"b{i:03d}", {"png": b"not an image"}) for i in range(bad)]
    return str(write_shard(tmp_path / f"s{good}-{bad}.tar", samples))


@pytest.mark.parametrize(("good", "trips"), [(94, True), (93, False)])
def test_a_pipeline_is_judged_at_its_hundredth_read(tmp_path, good, trips):
    """6 bad samples after `good` good ones: 100 reads (6 %) trip max_skip_ratio 0.05 at the end of the
    epoch; 99 reads are too few to judge, so the epoch ends normally."""
    recipe = Recipe.from_dict({"source": {"shuffle_buffer": 0, "shuffle_shards": False, "max_skip_ratio": 0.05},
                               "sizing": {"patch_size": 8, "max_tokens": 16},
                               "packing": {"seq_len": 64, "rows": 2, "lookahead": 8}})
    pipe = Pipeline(recipe, _shard(tmp_path, good, 6))
    if trips:
        with pytest.raises(SkipRatioError, match="6 of 100 samples skipped"):
            list(pipe)
    else:
        images = sum(b.num_images for b in pipe)
        assert (pipe.ledger.read, pipe.ledger.skipped_count, images) == (99, 6, 93)


# ------------------------------------------------------------------------------ counts and reasons


def test_counts_balance_and_reasons_are_counted_by_gist():
    led = Ledger(read=10, emitted=4)
    led.add_skip(Skip("/d/a.tar", "x", "decode", "DecodeError: truncated image data (OSError: x); more"))
    led.add_skip(Skip("/d/b.tar", "y", "decode", "DecodeError: truncated image data"))
    led.add_skip(Skip("/d/b.tar", "z", "select", "no image member"))
    assert (led.skipped_count, len(led.skipped), led.in_buffer) == (3, 3, 3)  # 10 = 4 + 3 + 3
    assert led.reasons() == {"decode: truncated image data": 2, "select: no image member": 1}
    assert led.examples() == {"decode: truncated image data": ["x (a.tar)", "y (b.tar)"],
                              "select: no image member": ["z (b.tar)"]}
    assert led.examples(per_reason=1)["decode: truncated image data"] == ["x (a.tar)"]


def test_examples_and_reasons_stop_at_exactly_their_limits():
    led = Ledger()
    for i in range(EXAMPLES_PER_REASON + 1):
        led.add_skip(Skip("/d/s.tar", f"k{i}", "decode", "DecodeError: bad"))
    assert led.examples()["decode: bad"] == [f"k{i} (s.tar)" for i in range(EXAMPLES_PER_REASON)]
    led = Ledger()
    for i in range(MAX_REASONS):
        led.add_skip(Skip("/d/s.tar", f"k{i}", f"stage{i}", "odd"))
    assert len(led.reasons()) == MAX_REASONS and OTHER_REASONS not in led.reasons()  # exactly MAX_REASONS kept
    led.add_skip(Skip("/d/s.tar", "late", "another", "odd"))
    led.add_skip(Skip("/d/s.tar", "again", "stage0", "odd"))  # a known reason still counts under its name
    assert led.reasons()[OTHER_REASONS] == 1 and led.reasons()["stage0: odd"] == 2
    assert len(led.reasons()) == MAX_REASONS + 1


@pytest.mark.parametrize(("reason", "short"), [
    ("DecodeError: truncated image data (OSError: x)", "truncated image data"),
    ("not an error name: just text; more", "not an error name"),
    ("ValueError: a: b", "a"),
    ("plain", "plain"),
    ("E: " + "x" * 100, "x" * 80),
])
def test_gist(reason, short):
    assert gist(reason) == short


def test_shard_errors_count_only_in_the_first_pass():
    led = Ledger()
    led.add_shard_error(Skip("/d/a.tar", "", "read", "ShardError: cut off"))
    led.add_shard_error(Skip("/d/a.tar", "", "read", "ShardError: cut off"), counted=False)
    assert led.shards_failed == 1 and len(led.shard_errors) == 2
    assert led.shard_reasons(1) == ["/d/a.tar: ShardError: cut off"]


# ------------------------------------------------------------------------------ state and merging


def test_a_new_ledger_counts_nothing():
    d = Ledger().to_dict()
    assert {k: v for k, v in d.items() if isinstance(v, int)} == dict.fromkeys(
        [k for k, v in d.items() if isinstance(v, int)], 0)
    assert d["skip_reasons"] == {} and d["shard_errors"] == [] and d["read"] == 0 and "in_buffer" in d


def test_the_shard_guard_names_five_failures_and_counts_the_rest():
    led = Ledger(shards_planned=8, shards_read=8)
    for i in range(7):
        led.add_shard_error(Skip(f"/d/b{i}.tar", "", "read", "ShardError: cut"))
    with pytest.raises(SkipRatioError) as info:
        check_skip_guard(led, 0.5, final=True)
    text = str(info.value)
    assert "7 of 8 shards failed" in text and "/d/b4.tar" in text and "/d/b5.tar" not in text
    assert "; and 2 more." in text


def _busy_ledger(prefix: str, n: int) -> Ledger:
    led = Ledger(read=10 * n, emitted=6 * n, repeated=n, shards_planned=n, shards_read=n, shards_failed=1,
                 texts_truncated=n // 2, images_emitted=7 * n)
    for i in range(n):
        led.add_skip(Skip(f"/d/{prefix}.tar", f"{prefix}{i}", "decode", f"DecodeError: kind {i % 3}"))
    led.add_shard_error(Skip(f"/d/{prefix}-bad.tar", "", "read", "ShardError: cut"))
    return led


def test_state_round_trip_keeps_every_count():
    led = _busy_ledger("a", 7)
    back = Ledger.from_state(json.loads(json.dumps(led.state_dict())))
    assert back.to_dict() == led.to_dict()
    assert back.skipped == [] and back.skipped_count == 7 and back.in_buffer == led.in_buffer == 70 - 42 - 7
    again = Ledger(read=1)
    again.load_state_dict(led.state_dict())
    assert again.to_dict() == led.to_dict()


def test_state_keeps_exactly_the_first_shard_errors():
    led = Ledger()
    for i in range(SHARD_ERRORS_KEPT + 3):
        led.add_shard_error(Skip(f"/d/{i}.tar", "", "read", "cut"))
    state = led.state_dict()
    assert [e[0] for e in state["shard_errors"]] == [f"/d/{i}.tar" for i in range(SHARD_ERRORS_KEPT)]
    assert Ledger.from_state(state).shards_failed == SHARD_ERRORS_KEPT + 3


def test_merged_sums_every_count():
    a, b = _busy_ledger("a", 4), _busy_ledger("b", 5)
    m = Ledger.merged([a, b])
    for name in ("read", "emitted", "images_emitted", "repeated", "skipped_count", "shards_planned", "shards_read",
                 "shards_failed", "texts_truncated"):
        assert getattr(m, name) == getattr(a, name) + getattr(b, name), name
    assert m.in_buffer == a.in_buffer + b.in_buffer
    assert len(m.skipped) == 9 and len(m.shard_errors) == 2
    assert m.reasons() == {f"decode: kind {k}": a.reasons().get(f"decode: kind {k}", 0)
                           + b.reasons()[f"decode: kind {k}"] for k in range(3)}
    assert m.examples()["decode: kind 0"] == ["a0 (a.tar)", "a3 (a.tar)"]  # a's fill it, b's are not added
    assert all(len(v) <= EXAMPLES_PER_REASON for v in m.examples().values())
    assert Ledger.merged([]).to_dict() == Ledger().to_dict()


def test_write_jsonl_lists_skips_shards_then_the_summary(tmp_path):
    led = _busy_ledger("a", 3)
    path = tmp_path / "ledger.jsonl"
    led.write_jsonl(str(path))
    lines = [json.loads(line) for line in path.read_text().splitlines()]
    assert [line.get("key") for line in lines[:4]] == ["a0", "a1", "a2", None]
    assert lines[-1] == {"summary": json.loads(json.dumps(led.to_dict()))} and len(lines) == 5


# ------------------------------------------------------------------------------ an empty epoch


def test_an_epoch_with_one_sample_through_is_not_empty():
    check_not_empty(Ledger(read=3, skipped_count=2), shards=1, where="epoch 0")
    with pytest.raises(EmptyEpochError, match=r"epoch 0 yielded no samples: 1 shards, 0 opened; 3 samples read, "
                                              r"all skipped \(3 x decode: not a readable image\)"):
        check_not_empty(ledger(3, 3), shards=1, where="epoch 0")
    with pytest.raises(EmptyEpochError, match="hold no samples"):
        check_not_empty(Ledger(), shards=2, where="epoch 1")


def test_merging_more_reasons_than_kept_counts_the_rest_together():
    a, b = Ledger(), Ledger()
    for i in range(20):
        a.add_skip(Skip("/d/a.tar", f"a{i}", f"s{i}", "odd"))
        b.add_skip(Skip("/d/b.tar", f"b{i}", f"s{i + 20}", "odd"))
    m = Ledger.merged([a, b])
    reasons = m.reasons()
    assert len(reasons) == MAX_REASONS + 1 and reasons[OTHER_REASONS] == 40 - MAX_REASONS
    assert sum(reasons.values()) == 40 and m.skipped_count == 40
    again = Ledger.merged([a, a])  # the same reasons twice: counted under their names, not OTHER
    assert again.reasons() == {k: 2 * v for k, v in a.reasons().items()}


def test_a_certain_verdict_after_every_shard_is_not_called_early():
    led = Ledger(shards_planned=10, shards_read=10, shards_failed=2)
    led.add_shard_error(Skip("/d/x.tar", "", "read", "cut"))
    with pytest.raises(SkipRatioError) as info:
        check_skip_guard(led, 0.1, final=False)
    assert "stopped after" not in str(info.value)


def test_a_state_saved_before_texts_and_images_loads_with_their_counts():
    """States from before texts_truncated and images_emitted existed: none truncated, and one image
    per emitted sample."""
    state = _busy_ledger("a", 4).state_dict()
    old = {k: v for k, v in state.items() if k not in ("texts_truncated", "images_emitted")}
    back = Ledger.from_state(old)
    assert back.texts_truncated == 0 and back.images_emitted == back.emitted == 24


def test_the_shard_share_in_the_message_is_failed_over_opened():
    led = Ledger(shards_planned=1, shards_read=1)
    led.add_shard_error(Skip("/d/only.tar", "", "read", "cut"))
    with pytest.raises(SkipRatioError, match=r"1 of 1 shards failed \(100.0 %\)"):
        check_skip_guard(led, 0.5, final=True)
