from __future__ import annotations

from pathlib import Path

import pytest

from patchloom import Recipe, RecipeError

RECIPES = sorted((Path(__file__).parent.parent / "recipes").glob("*.yaml"))


def test_partial_dict_gets_defaults():
    r = Recipe.from_dict({"sizing": {"max_tokens": 100}})
    assert r.sizing.max_tokens == 100 and r.sizing.patch_size == 16 and r.packing.seq_len == 1024


def test_fingerprint_ignores_key_order_formatting_and_implicit_defaults(tmp_path):
    a = tmp_path / "a.yaml"
    b = tmp_path / "b.yaml"
    a.write_text("seed: 3\nsizing:\n  max_tokens: 100\n  patch_size: 16\n")
    b.write_text("# same thing\nsizing: {patch_size: 16,   max_tokens: 100}\nseed: 3\npacking: {seq_len: 1024}\n")
    assert Recipe.from_file(a).fingerprint() == Recipe.from_file(b).fingerprint()
    assert Recipe.from_file(a).fingerprint() != Recipe.from_dict({"seed": 4, "sizing": {"max_tokens": 100}}).fingerprint()


def test_unknown_key_is_an_error_with_its_path():
    with pytest.raises(RecipeError, match=r"sizing\.max_token: unknown key"):
        Recipe.from_dict({"sizing": {"max_token": 10}})


def test_budget_over_row_is_refused_clearly():
    with pytest.raises(RecipeError, match=r"max_tokens must be <= packing.seq_len \(got 2048 > 1024\)"):
        Recipe.from_dict({"sizing": {"max_tokens": 2048}, "packing": {"seq_len": 1024}})


def test_bad_choice_lists_allowed_values():
    with pytest.raises(RecipeError, match="sizing.mode: must be one of"):
        Recipe.from_dict({"sizing": {"mode": "stretch"}})


def test_sampled_needs_its_section():
    with pytest.raises(RecipeError, match="sampled"):
        Recipe.from_dict({"sizing": {"mode": "sampled"}})


def test_file_errors_name_the_file(tmp_path):
    p = tmp_path / "r.yaml"
    p.write_text("sizing: [1, 2\n")
    with pytest.raises(RecipeError, match="r.yaml: not valid YAML"):
        Recipe.from_file(p)
    with pytest.raises(RecipeError, match="cannot read"):
        Recipe.from_file(tmp_path / "missing.yaml")


def test_yaml_is_loaded_safely(tmp_path):
    p = tmp_path / "evil.yaml"
    p.write_text("seed: !!python/object/apply:os.system ['echo hi']\n")
    with pytest.raises(RecipeError, match="not valid YAML"):
        Recipe.from_file(p)


@pytest.mark.parametrize("path", RECIPES, ids=[p.name for p in RECIPES])
def test_shipped_recipes_load_and_round_trip(path):
    r = Recipe.from_file(path)
    again = Recipe.from_dict(__import__("yaml").safe_load(r.to_yaml()))
    assert again.fingerprint() == r.fingerprint()


def test_there_are_shipped_recipes():
    names = {p.name for p in RECIPES}
    assert {"pretrain.yaml", "eval.yaml"} <= names


def test_fixed_mode_square_must_reach_min_tokens():
    with pytest.raises(RecipeError, match="isqrt"):
        Recipe.from_dict({"sizing": {"mode": "fixed", "max_tokens": 10, "min_tokens": 10}})
    assert Recipe.from_dict({"sizing": {"mode": "fixed", "max_tokens": 10, "min_tokens": 9}}).sizing.min_tokens == 9
