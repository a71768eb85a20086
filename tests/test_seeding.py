"""The RNG rule (patchloom.seeding): a sample's generator depends on (seed, epoch, key, stage) and on
nothing else, the same in every process; stream generators also on their slot numbers."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

from patchloom.seeding import _word, sample_rng, stream_rng


def draws(rng) -> list[int]:
    return rng.integers(0, 2**62, size=4).tolist()


def test_a_sample_generator_depends_on_each_of_its_four_inputs():
    base = draws(sample_rng(1, 0, "key", "drop"))
    assert draws(sample_rng(1, 0, "key", "drop")) == base  # same inputs, same draws
    others = [sample_rng(2, 0, "key", "drop"), sample_rng(1, 1, "key", "drop"), sample_rng(1, 0, "kez", "drop"),
              sample_rng(1, 0, "key", "crop"), sample_rng(1, 0, "drop", "key")]  # key and stage not interchangeable
    assert all(draws(rng) != base for rng in others)


def test_a_stream_generator_depends_on_its_name_and_every_slot_in_order():
    base = draws(stream_rng(3, 0, "sample-shuffle", 0, 2, 1, 4))
    assert draws(stream_rng(3, 0, "sample-shuffle", 0, 2, 1, 4)) == base
    for args in [(4, 0, "sample-shuffle", 0, 2, 1, 4), (3, 1, "sample-shuffle", 0, 2, 1, 4),
                 (3, 0, "shard-order", 0, 2, 1, 4), (3, 0, "sample-shuffle", 1, 2, 1, 4),
                 (3, 0, "sample-shuffle", 2, 0, 1, 4), (3, 0, "sample-shuffle", 0, 2, 1)]:
        assert draws(stream_rng(*args)) != base, args
    assert draws(stream_rng(3, 0, "x")) != draws(sample_rng(3, 0, "x", "x"))


def test_a_missing_seed_is_refused_with_the_recipe_key():
    with pytest.raises(ValueError, match="set `seed:` in the recipe"):
        sample_rng(None, 0, "k", "drop")
    with pytest.raises(ValueError, match="set `seed:` in the recipe"):
        stream_rng(None, 0, "shard-order")
    assert draws(sample_rng(0, 0, "k", "drop")) != draws(sample_rng(1, 0, "k", "drop"))  # 0 is a seed like any


def test_words_are_stable_64_bit_integers():
    """_word's documented contract: a stable 64-bit integer per string (unlike the salted hash())."""
    words = [_word(f"key-{i}") for i in range(64)]
    assert all(isinstance(w, int) and 0 <= w < 2**64 for w in words)
    assert max(words) >= 2**60  # all 64 bits are used (64 draws below 2**60: chance 2**-256)
    assert len(set(words)) == 64 and _word("key-0") == words[0]


def test_draws_are_the_same_in_another_process_with_another_hash_seed():
    """A sample's draws must not depend on the process (workers, resumes): PYTHONHASHSEED changes
    str hashes in the child, not our generators."""
    code = ("import json; from patchloom.seeding import sample_rng, stream_rng; "
            "print(json.dumps([sample_rng(5, 2, 'img-7', 'crop').integers(0, 2**62, 4).tolist(), "
            "stream_rng(5, 2, 'shard-order', 1, 3).integers(0, 2**62, 4).tolist()]))")
    here = [draws(sample_rng(5, 2, "img-7", "crop")), draws(stream_rng(5, 2, "shard-order", 1, 3))]
    for hash_seed in ("1", "2"):
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120,
                             env={**os.environ, "PYTHONHASHSEED": hash_seed})
        assert json.loads(out.stdout) == here
