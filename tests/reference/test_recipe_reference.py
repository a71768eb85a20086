"""Recipe loading checked against the YAML specifications, through PyYAML's safe loader.

PyYAML implements YAML 1.1 plain-scalar resolution (what PyYAML itself does with these forms, with
no patchloom involved, is pinned in tests/test_recipe_yaml.py). The rules that matter for recipes:

- Booleans, YAML 1.1 bool type (yaml.org/type/bool.html): yes/no, on/off, true/false in three
  casings. PyYAML leaves the one-letter forms y/n as strings.
- Floats, YAML 1.1 float type (yaml.org/type/float.html): the base-10 form needs a `.`, and an
  exponent needs its sign, so `1e-6` and `1.0e6` are strings while `1.0e-6` is a float.
- Integers, YAML 1.1 int type (yaml.org/type/int.html, from memory): a leading 0 means octal,
  and `1:30` is base 60 (90).
- Mapping keys, YAML 1.2 section 3.2.1.1 (from memory): each key of a mapping is unique. PyYAML
  does not enforce it (the last value wins); patchloom refuses such a file.
"""

from __future__ import annotations

import pytest
import yaml

from patchloom import Recipe, RecipeError


def _load(tmp_path, text):
    p = tmp_path / "r.yaml"
    p.write_text(text)
    return Recipe.from_file(p)


def test_numbers_that_yaml_reads_as_text_still_set_number_fields(tmp_path):
    # `eps: 1e-6` reaches the schema as the string '1e-6'; the float field parses it to the number
    ops = "output: {dtype: float32}\npatch_ops: [{name: standardize, eps: %s}]\n"
    a = _load(tmp_path, ops % "1e-6")
    assert a.patch_ops[0].eps == 1e-6
    assert a.fingerprint() == _load(tmp_path, ops % "1.0e-6").fingerprint()


def test_octal_and_base60_integers_are_what_the_recipe_gets(tmp_path):
    assert _load(tmp_path, "seed: 010\n").seed == 8
    assert _load(tmp_path, "seed: 1:30\n").seed == 90


def test_boolean_words_in_a_text_field_are_an_error_not_a_string(tmp_path):
    with pytest.raises(RecipeError, match=r"source\.label_key: must be a string or null \(got false\); quote it"):
        _load(tmp_path, "source: {label_key: no}\n")
    assert _load(tmp_path, "source: {label_key: 'no'}\n").source.label_key == "no"


def test_duplicate_keys_pyyaml_keeps_the_last_patchloom_refuses(tmp_path):
    text = "sizing:\n  max_tokens: 64\n  max_tokens: 128\n"
    assert yaml.safe_load(text)["sizing"]["max_tokens"] == 128
    with pytest.raises(RecipeError, match="appears twice"):
        _load(tmp_path, text)


def test_yaml11_timestamps_stay_text_in_a_recipe(tmp_path):
    assert not isinstance(yaml.safe_load("a: 2024-05-01")["a"], str)  # PyYAML: a date
    assert _load(tmp_path, "source: {label_key: 2024-05-01}\n").source.label_key == "2024-05-01"
