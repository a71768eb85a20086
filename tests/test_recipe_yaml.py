"""What PyYAML's safe loader makes of the plain scalars a recipe may hold: no patchloom code runs
here. These pin the YAML 1.1 resolution that tests/reference/test_recipe_reference.py builds on
(if a PyYAML release changed it, the recipe checks there would need a look). Sources:

- Booleans, YAML 1.1 bool type (yaml.org/type/bool.html): yes/no, on/off, true/false in three
  casings; PyYAML leaves the one-letter forms y/n as strings (from memory).
- Floats, YAML 1.1 float type (yaml.org/type/float.html): the base-10 form needs a `.`, and an
  exponent needs its sign, so `1e-6` and `1.0e6` are strings while `1.0e-6` is a float.
- Integers, YAML 1.1 int type (yaml.org/type/int.html, from memory): a leading 0 means octal,
  `0x` hexadecimal, `1:30` is base 60 (90), and `_` separates digits.
"""

from __future__ import annotations

import pytest
import yaml


@pytest.mark.parametrize("word", ["yes", "Yes", "YES", "no", "on", "On", "OFF", "true", "False"])
def test_yaml11_boolean_words(word):
    assert isinstance(yaml.safe_load(f"a: {word}")["a"], bool)


@pytest.mark.parametrize("word", ["y", "n", "Y", "N"])
def test_pyyaml_keeps_one_letter_booleans_as_text(word):
    assert yaml.safe_load(f"a: {word}")["a"] == word


@pytest.mark.parametrize(("text", "value"), [("1e-6", "1e-6"), ("1.0e6", "1.0e6"), ("1.0e-6", 1e-6), (".5", 0.5)])
def test_yaml11_float_forms(text, value):
    assert yaml.safe_load(f"a: {text}")["a"] == value


@pytest.mark.parametrize(("text", "value"), [("010", 8), ("0x10", 16), ("1:30", 90), ("1_000", 1000)])
def test_yaml11_int_forms(text, value):
    assert yaml.safe_load(f"a: {text}")["a"] == value
