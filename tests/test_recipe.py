from __future__ import annotations

import copy
import re
import types
import typing
from pathlib import Path
from typing import Literal

import pytest
import yaml
from pydantic import BaseModel

from patchloom import Recipe, RecipeError
from patchloom.recipe import MAX_RECIPE_BYTES, PatchOp, SampledTokens, SizingConfig

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
    again = Recipe.from_dict(yaml.safe_load(r.to_yaml()))
    assert again.fingerprint() == r.fingerprint()


def test_there_are_shipped_recipes():
    names = {p.name for p in RECIPES}
    assert {"pretrain.yaml", "eval.yaml"} <= names


def test_fixed_mode_square_must_reach_min_tokens():
    with pytest.raises(RecipeError, match="isqrt"):
        Recipe.from_dict({"sizing": {"mode": "fixed", "max_tokens": 10, "min_tokens": 10}})
    assert Recipe.from_dict({"sizing": {"mode": "fixed", "max_tokens": 10, "min_tokens": 9}}).sizing.min_tokens == 9


# --- unknown keys: did-you-mean, from the schema at that key path ----------------------------------

def error_of(data, origin="recipe.yaml"):
    with pytest.raises(RecipeError) as info:
        Recipe.from_dict(data, origin=origin)
    return str(info.value)


def problem_lines(message):
    """The per-problem lines of a RecipeError (after the 'FILE: invalid recipe' header)."""
    head, *lines = message.split("\n")
    assert head.endswith(": invalid recipe"), message
    assert lines and all(line.startswith("  ") for line in lines), message
    return [line.strip() for line in lines]


@pytest.mark.parametrize(
    ("data", "path", "suggestion", "model"),
    [
        ({"sizing": {"max_token": 10}}, "sizing.max_token", "max_tokens", SizingConfig),
        ({"sizng": {}}, "sizng", "sizing", Recipe),
        ({"patch_ops": [{"name": "noise"}, {"name": "noise", "sigm": 2}]}, "patch_ops.1.sigm", "sigma", PatchOp),
        ({"sizing": {"mode": "sampled", "sampled": {"rnge": [1, 2]}}}, "sizing.sampled.rnge", "range", SampledTokens),
        ({"sizing": {"Max_Tokens": 10}}, "sizing.Max_Tokens", "max_tokens", SizingConfig),
    ],
)
def test_unknown_key_suggests_the_close_field_and_lists_the_allowed_ones(data, path, suggestion, model):
    (line,) = problem_lines(error_of(data))
    allowed = ", ".join(model.model_fields)
    assert line == f"{path}: unknown key; did you mean {suggestion!r}? (allowed: {allowed})"


def test_unknown_key_without_a_close_match_lists_allowed_only():
    (line,) = problem_lines(error_of({"packing": {"zzz": 1}}))
    assert line.startswith("packing.zzz: unknown key (allowed: seq_len, rows,") and "did you mean" not in line


@pytest.mark.parametrize(
    ("data", "hint"),
    [
        ({"sizing": {"seq_len": 64}}, "did you mean 'packing.seq_len'?"),
        ({"max_tokens": 64}, "did you mean 'sizing.max_tokens' or 'text.max_tokens' or 'video.max_tokens'?"),
        ({"packing": {"seed": 1}}, "did you mean 'seed'?"),
    ],
)
def test_a_key_in_the_wrong_section_points_to_its_section(data, hint):
    (line,) = problem_lines(error_of(data))
    assert hint in line


def test_augment_entries_are_free_form_here():
    # albumentations parameters are checked by the augment bridge, not as recipe keys
    r = Recipe.from_dict({"augment": [{"name": "HorizontalFlip", "p": 0.25}]})
    assert r.augment == [{"name": "HorizontalFlip", "p": 0.25}]


def test_extends_is_suggested_only_in_files(tmp_path):
    p = tmp_path / "r.yaml"
    p.write_text("extend: base.yaml\n")
    with pytest.raises(RecipeError, match=r"extend: unknown key; did you mean 'extends'\?"):
        Recipe.from_file(p)
    assert "extends" not in error_of({"extend": "base.yaml"})


# --- every common pydantic error reads as one line: path, what is allowed, what was given ----------


@pytest.mark.parametrize(
    ("data", "line"),
    [
        ({"sizing": {"patch_size": 0}}, "sizing.patch_size: must be >= 1 (got 0)"),
        ({"sizing": {"patch_size": 4096}}, "sizing.patch_size: must be <= 1024 (got 4096)"),
        ({"patch_ops": [{"name": "noise", "eps": 0}]}, "patch_ops.0.eps: must be > 0.0 (got 0)"),
        ({"drop": {"rate": 1.5}}, "drop.rate: must be <= 1.0 (got 1.5)"),
        ({"packing": {"rows": "eight"}}, "packing.rows: must be an integer (got 'eight')"),
        ({"packing": {"rows": 2.5}}, "packing.rows: must be a whole number (got 2.5)"),
        ({"sizing": {"max_aspect": "wide"}}, "sizing.max_aspect: must be a number or null (got 'wide')"),
        ({"source": {"shuffle_shards": "maybe"}}, "source.shuffle_shards: must be true or false (got 'maybe')"),
        ({"decode": {"background": [0, 0]}}, "decode.background: must be a list of 3 integers (got [0, 0])"),
        ({"decode": {"background": [0, 0, 0, 0]}},
         "decode.background: must be a list of 3 integers (got [0, 0, 0, 0])"),
        ({"decode": {"background": 7}}, "decode.background: must be a list of 3 integers (got 7)"),
        ({"crop": {"area": [0.5]}}, "crop.area: must be a list of 2 numbers (got [0.5])"),
        ({"patch_ops": [{"p": 0.5}]},
         "patch_ops.0.name: required key is missing: one of 'standardize', 'jitter', 'shuffle', 'noise'"),
        ({"packing": {"algorithm": "bestfit"}},
         ("packing.algorithm: must be one of 'largest_first', 'first_fit', 'best_fit', 'in_order' "
          "(got 'bestfit'; did you mean 'best_fit'?)")),
        ({"source": {"shards": ["a.tar", 5]}},
         "source.shards: must be a string, a list of strings or null (got ['a.tar', 5])"),
        ({"sizing": 5}, "sizing: must be a mapping with keys " + ", ".join(SizingConfig.model_fields) + " (got 5)"),
        ({"patch_ops": {"name": "noise"}}, "patch_ops: must be a list of mappings (got {'name': 'noise'})"),
        ({"output": {"mean": [0.5, 0.5, float("nan")]}},
         "output.mean.2: must be a finite number, not NaN or infinity (got nan)"),
        ({"drop": {"rate_curve": [[16]]}}, "drop.rate_curve.0: must be [integer, number] (got [16])"),
    ],
)
def test_error_types_read_as_one_line_each(data, line):
    assert problem_lines(error_of(data)) == [line]


def test_yaml_booleans_in_text_fields_get_a_quoting_hint(tmp_path):
    p = tmp_path / "r.yaml"
    p.write_text("source:\n  label_key: no\n  image_keys: [jpg, on]\n")
    with pytest.raises(RecipeError) as info:
        Recipe.from_file(p)
    lines = problem_lines(str(info.value))
    assert lines[0].startswith("source.label_key: must be a string or null (got false); quote it")
    assert lines[1].startswith("source.image_keys.1: must be a string (got true); quote it")


def test_several_problems_give_one_line_each_under_the_file_name():
    msg = error_of({"sizing": {"max_token": 1, "patch_size": -1}, "packing": {"rowz": 2}}, origin="run.yaml")
    assert msg.startswith("run.yaml: invalid recipe\n")
    lines = problem_lines(msg)
    assert len(lines) == 3
    assert {ln.split(":")[0] for ln in lines} == {"sizing.max_token", "sizing.patch_size", "packing.rowz"}


def test_cross_field_messages_are_kept():
    (line,) = problem_lines(error_of({"sizing": {"min_tokens": 300}}))
    assert line == "sizing: min_tokens must be <= max_tokens (got 300 > 256)"


# --- version --------------------------------------------------------------------------------------


@pytest.mark.parametrize("version", [0, 2, "1", True, 1.0, None])
def test_only_version_1_is_accepted(version):
    msg = error_of({"version": version, "sizing": {"max_token": 1}})
    # the version alone is reported: keys of another version's schema are not worth listing
    (line,) = problem_lines(msg)
    assert line.startswith("version: must be 1, the only recipe version") and "(got " in line


def test_version_1_is_accepted():
    assert Recipe.from_dict({"version": 1}).version == 1


# --- YAML safety ----------------------------------------------------------------------------------


def load_text(tmp_path, text, name="r.yaml"):
    p = tmp_path / name
    p.write_text(text)
    return Recipe.from_file(p)


@pytest.mark.parametrize(
    "value",
    [
        "!!python/object/apply:os.system ['echo hi']",
        "!!python/name:os.system",
        "!!python/object:collections.OrderedDict {}",
        "!!python/object/new:dict {}",
        "!!python/module:os",
    ],
)
def test_python_tags_are_refused_because_recipes_are_data(tmp_path, value):
    with pytest.raises(RecipeError) as info:
        load_text(tmp_path, f"seed: {value}\n")
    msg = str(info.value)
    assert msg.startswith(f"{tmp_path / 'r.yaml'}: not valid YAML for a recipe: line 1: tag '!!python/")
    assert "is refused: a recipe is data" in msg and "\n" not in msg


@pytest.mark.parametrize("value", ["!env HOME", "!!set {a, b}", "!!binary aGk=", "!!omap [a: 1]"])
def test_other_tags_are_refused(tmp_path, value):
    with pytest.raises(RecipeError, match=r"tag '!{1,2}\w+' is refused: a recipe holds only mappings"):
        load_text(tmp_path, f"augment: [{{name: HorizontalFlip, x: {value}}}]\n")


def test_alias_bomb_is_refused_before_it_expands(tmp_path):
    lines = ['a: &a ["lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol"]']
    for i in range(1, 9):  # 9**9 (about 387 million) strings once expanded
        prev, cur = chr(96 + i), chr(97 + i)
        lines.append(f"{cur}: &{cur} [" + ", ".join([f"*{prev}"] * 9) + "]")
    with pytest.raises(RecipeError, match=r"more than 100000 values once aliases are expanded"):
        load_text(tmp_path, "\n".join(lines) + "\n")


def test_small_aliases_and_merge_keys_still_work(tmp_path):
    r = load_text(tmp_path, "patch_ops:\n  - &j {name: jitter, p: 0.5, sigma: 2}\n  - {<<: *j, name: noise}\n  - *j\n")
    got = [(op.name, op.p, op.sigma) for op in r.patch_ops]
    assert got == [("jitter", 0.5, 2), ("noise", 0.5, 2), ("jitter", 0.5, 2)]


def test_recursive_alias_is_refused(tmp_path):
    with pytest.raises(RecipeError, match="recursive structure"):
        load_text(tmp_path, "augment: &a [*a]\n")


def test_oversized_file_is_refused(tmp_path):
    text = "seed: 1\n# " + "x" * MAX_RECIPE_BYTES + "\n"
    with pytest.raises(RecipeError, match=r"r\.yaml: refused: \d+ bytes is over the 1 MiB limit"):
        load_text(tmp_path, text)


def test_deep_nesting_is_refused(tmp_path):
    with pytest.raises(RecipeError, match="nested more than 64 levels deep"):
        load_text(tmp_path, "augment: " + "[" * 200 + "]" * 200 + "\n")


def test_duplicate_keys_are_refused_naming_both_lines(tmp_path):
    with pytest.raises(RecipeError, match=r"line 4: key 'max_tokens' appears twice in one mapping \(lines 3 and 4\)"):
        load_text(tmp_path, "seed: 1\nsizing:\n  max_tokens: 10\n  max_tokens: 20\n")


def test_non_utf8_file_is_a_recipe_error(tmp_path):
    p = tmp_path / "r.yaml"
    p.write_bytes(b"seed: \xff\n")
    with pytest.raises(RecipeError, match=r"r\.yaml: not UTF-8 text"):
        Recipe.from_file(p)


def test_yaml_syntax_error_is_one_line_with_the_position(tmp_path):
    with pytest.raises(RecipeError) as info:
        load_text(tmp_path, "seed: 1\nsizing: [1, 2\n")
    msg = str(info.value)
    assert "not valid YAML: line 3, column 1:" in msg and "\n" not in msg


def test_unquoted_dates_stay_text(tmp_path):
    assert load_text(tmp_path, "source: {label_key: 2024-01-01}\n").source.label_key == "2024-01-01"


# --- extends --------------------------------------------------------------------------------------


def write(folder, name, text):
    p = folder / name
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text(text)
    return p


def test_extends_deep_merges_mappings_replaces_lists_and_null_resets(tmp_path):
    write(tmp_path, "common/base.yaml",
          "seed: 3\nsource: {shuffle_buffer: 8, on_error: raise}\nsizing: {max_tokens: 100, mode: fixed}\n"
          "patch_ops: [{name: jitter}, {name: shuffle}]\n")
    child = write(tmp_path, "runs/child.yaml",
                  "extends: ../common/base.yaml\nsizing: {mode: budget}\npatch_ops: [{name: noise}]\n"
                  "source: {shuffle_buffer: null}\n")
    r = Recipe.from_file(child)
    assert r.seed == 3
    assert (r.sizing.max_tokens, r.sizing.mode) == (100, "budget")  # merged key by key
    assert [op.name for op in r.patch_ops] == ["noise"]  # replaced, not appended
    assert r.source.shuffle_buffer == 0 and r.source.on_error == "raise"  # null: back to the default


def test_null_resets_a_whole_section(tmp_path):
    write(tmp_path, "base.yaml", "drop: {mode: random, rate: 0.5}\n")
    child = write(tmp_path, "child.yaml", "extends: base.yaml\ndrop: null\n")
    assert Recipe.from_file(child).drop == Recipe().drop


def test_extends_chain_resolves_in_order(tmp_path):
    write(tmp_path, "a.yaml", "seed: 1\nsizing: {max_tokens: 64, patch_size: 8}\n")
    write(tmp_path, "sub/b.yaml", "extends: ../a.yaml\nseed: 2\nsizing: {patch_size: 14}\n")
    c = write(tmp_path, "c.yaml", "extends: sub/b.yaml\nseed: 5\n")
    r = Recipe.from_file(c)
    assert (r.seed, r.sizing.max_tokens, r.sizing.patch_size) == (5, 64, 14)


def test_extending_recipe_fingerprints_like_the_same_settings_in_full(tmp_path):
    write(tmp_path, "base.yaml", "seed: 3\nsizing: {max_tokens: 100, mode: fixed}\npatch_ops: [{name: jitter}]\n")
    child = write(tmp_path, "child.yaml", "extends: base.yaml\nsizing: {mode: budget, max_aspect: 4}\n")
    full = write(tmp_path, "full.yaml",
                 "seed: 3\nsizing: {max_tokens: 100, mode: budget, max_aspect: 4.0}\npatch_ops: [{name: jitter}]\n")
    assert Recipe.from_file(child).fingerprint() == Recipe.from_file(full).fingerprint()
    assert Recipe.from_file(child).fingerprint() != Recipe.from_file(tmp_path / "base.yaml").fingerprint()


def test_extends_cycle_names_the_files(tmp_path):
    write(tmp_path, "a.yaml", "extends: b.yaml\n")
    write(tmp_path, "b.yaml", "extends: ./a.yaml\n")
    a, b = tmp_path / "a.yaml", tmp_path / "b.yaml"
    with pytest.raises(RecipeError) as info:
        Recipe.from_file(a)
    assert str(info.value) == f"{a}: extends cycle: {a} -> {b} -> {a}"


def test_self_extension_is_a_cycle(tmp_path):
    write(tmp_path, "a.yaml", "extends: a.yaml\n")
    with pytest.raises(RecipeError, match="extends cycle"):
        Recipe.from_file(tmp_path / "a.yaml")


def test_missing_base_names_both_files(tmp_path):
    child = write(tmp_path, "child.yaml", "extends: nope.yaml\n")
    with pytest.raises(RecipeError, match=r"child\.yaml: extends 'nope\.yaml': cannot read recipe .*nope\.yaml"):
        Recipe.from_file(child)


@pytest.mark.parametrize("target", ["[a.yaml]", "''", "null", "3"])
def test_extends_must_name_a_file(tmp_path, target):
    child = write(tmp_path, "child.yaml", f"extends: {target}\n")
    with pytest.raises(RecipeError, match="extends: must be the path of a base recipe file"):
        Recipe.from_file(child)


def test_errors_inside_a_base_file_name_the_base_file(tmp_path):
    base = write(tmp_path, "base.yaml", "sizing: {max_token: 3}\nseed: 1\n")
    child = write(tmp_path, "child.yaml", "extends: base.yaml\nsizing: {patch_size: 0}\n")
    with pytest.raises(RecipeError) as info:
        Recipe.from_file(child)
    msg = str(info.value)
    assert msg.startswith(f"{child}: invalid recipe")
    assert set(problem_lines(msg)) == {
        "sizing.patch_size: must be >= 1 (got 0)",
        f"{base}: sizing.max_token: unknown key; did you mean 'max_tokens'? (allowed: "
        + ", ".join(SizingConfig.model_fields) + ")",
    }
    base.write_text("seed: [\n")
    with pytest.raises(RecipeError, match=rf"^{re.escape(str(base))}: not valid YAML"):
        Recipe.from_file(child)
    base.write_text("seed: !!python/name:os.system\n")
    with pytest.raises(RecipeError, match=rf"^{re.escape(str(base))}: not valid YAML for a recipe"):
        Recipe.from_file(child)


def test_from_dict_refuses_extends_clearly():
    with pytest.raises(RecipeError, match=r"`extends` works only in recipe files \(Recipe.from_file\)"):
        Recipe.from_dict({"extends": "base.yaml", "seed": 1})


def test_extends_is_only_a_top_level_key(tmp_path):
    write(tmp_path, "base.yaml", "seed: 1\n")
    child = write(tmp_path, "child.yaml", "sizing: {extends: base.yaml}\n")
    with pytest.raises(RecipeError, match=r"sizing\.extends: unknown key"):
        Recipe.from_file(child)


def test_recipe_show_prints_the_resolved_form_of_an_extending_recipe(tmp_path, capsys):
    from patchloom.cli.main import main

    write(tmp_path, "base.yaml", "seed: 3\nsizing: {max_tokens: 100}\npatch_ops: [{name: jitter}]\n")
    child = write(tmp_path, "child.yaml", "extends: base.yaml\nsizing: {max_aspect: 4}\noutput: {dtype: float16}\n")
    assert main(["recipe", "show", str(child)]) == 0
    shown = capsys.readouterr().out
    assert "extends" not in shown.split("\n", 1)[1]
    again = write(tmp_path, "shown.yaml", shown)
    assert Recipe.from_file(again).fingerprint() == Recipe.from_file(child).fingerprint()
    assert Recipe.from_file(again).sizing.max_tokens == 100


# --- fingerprint: same settings, same digest; any change, a new one -------------------------------


def fp_of_text(tmp_path, text, name="f.yaml"):
    return load_text(tmp_path, text, name).fingerprint()


@pytest.mark.parametrize(
    ("a", "b"),
    [
        ("seed: 3\nsizing: {max_tokens: 100, patch_size: 16}\n",
         "sizing: {patch_size: 16, max_tokens: 100}\nseed: 3\n"),
        ("seed: 3\n", "# a comment\nseed: 3   # another\n"),
        ("sizing: {max_tokens: 64, mode: native}\n", "sizing:\n  max_tokens: 64\n  mode: native\n"),
        ("patch_ops: [{name: noise, sigma: 2}]\n", "patch_ops:\n  - name: noise\n    sigma: 2\n"),
        ("sizing: {max_aspect: 4}\n", "sizing: {max_aspect: 4.0}\n"),
        ("drop: {mode: random, rate: 1}\n", "drop: {mode: random, rate: 1.0}\n"),
        ("crop: {mode: random, area: [1, 1]}\n", "crop: {mode: random, area: [1.0, 1.0]}\n"),
        ("seed: 7\n", "seed: +7\n"),  # (7.0 is refused: integers are strict, see test_recipe_guards)
        ("patch_ops: [{name: noise, sigma: 2}]\n", "patch_ops: [{name: noise, sigma: 2e0}]\n"),
        ("patch_ops: [{name: standardize, eps: 0.000001}]\noutput: {dtype: float32}\n",
         "patch_ops: [{name: standardize, eps: 1e-6}]\noutput: {dtype: float32}\n"),
        ("seed: 0\n", "version: 1\nseed: 0\ndrop: {}\nsizing: {mode: budget}\npacking: {seq_len: 1024}\n"),
    ],
)
def test_fingerprint_is_the_same_for_the_same_settings(tmp_path, a, b):
    assert fp_of_text(tmp_path, a, "a.yaml") == fp_of_text(tmp_path, b, "b.yaml")


def test_every_default_written_out_fingerprints_like_an_empty_file(tmp_path):
    full = Recipe().to_yaml()
    assert "max_tokens: 256" in full  # really written out
    assert fp_of_text(tmp_path, full, "full.yaml") == fp_of_text(tmp_path, "", "empty.yaml")


def _leaf_paths(model, prefix=()):
    """Every setting of the schema as a key path; a list of sections contributes its first entry."""
    for name, field in model.model_fields.items():
        ann = field.annotation
        inner = [a for a in typing.get_args(ann) if a is not type(None)] if _is_union(ann) else [ann]
        sub = inner[0] if len(inner) == 1 else None
        if isinstance(sub, type) and issubclass(sub, BaseModel):
            yield from _leaf_paths(sub, (*prefix, name))
        elif typing.get_origin(sub) is list and isinstance(typing.get_args(sub)[0], type) and issubclass(
            typing.get_args(sub)[0], BaseModel
        ):
            yield (*prefix, name), ann
            yield from _leaf_paths(typing.get_args(sub)[0], (*prefix, name, 0))
        else:
            yield (*prefix, name), ann


def _is_union(ann):
    return typing.get_origin(ann) in (typing.Union, types.UnionType)


def _annotation_at(path):
    return dict(_leaf_paths(Recipe))[path]


AUGMENT_CHANGE = [{"name": "HorizontalFlip", "p": 0.5}]


def _plain(ann):
    """int for StrictInt (Annotated[int, Strict()]); the annotation itself otherwise."""
    return typing.get_args(ann)[0] if typing.get_origin(ann) is typing.Annotated else ann


def _candidates(ann, current):
    """Values of this type that differ from `current`, a few of each kind."""
    ann = _plain(ann)
    if _is_union(ann):
        if current is not None:
            yield None
        for a in typing.get_args(ann):
            if a is not type(None):
                yield from _candidates(a, current if _fits(a, current) else None)
        return
    origin, args = typing.get_origin(ann), typing.get_args(ann)
    if ann is bool:
        yield not current
    elif ann is int:
        yield from ([current + 1, current - 1, current * 2] if current is not None else [2, 16, 100])
    elif ann is float:
        yield from ([current + 0.125, current - 0.125, current / 2] if current is not None else [0.5, 2.0])
    elif ann is str:
        yield (current or "") + "x"
    elif origin is Literal:
        yield from (a for a in args if a != current)
    elif origin is tuple:
        base = list(current) if current is not None else [2.0, 5.0] if tuple(map(_plain, args)) == (float, float) else None
        if base is None:
            return
        if current is None:
            yield base
        for i, a in enumerate(args):
            for c in _candidates(a, base[i]):
                yield [*base[:i], c, *base[i + 1 :]]
    elif origin is list:
        if current:
            for c in _candidates(args[0], current[0]):
                yield [c, *current[1:]]
            yield [*current, current[-1]]
            yield current[:-1]
        elif typing.get_origin(args[0]) is dict:
            yield AUGMENT_CHANGE
        elif typing.get_origin(args[0]) is tuple:
            yield [[16, 0.5], [64, 0.25]]
        else:
            yield from ([v] for v in _candidates(args[0], None))


def _fits(ann, value):
    ann = _plain(ann)
    if value is None:
        return False
    origin = typing.get_origin(ann)
    if origin is Literal:
        return value in typing.get_args(ann)
    if origin in (list, tuple):
        return isinstance(value, list)
    return isinstance(value, ann) if isinstance(ann, type) else True


# Bases where every optional part is present, so every setting has a value to change. A change is
# tried on each base in turn; the first that validates and really changes the value is used.
BASES = [
    {
        "seed": 5,
        "source": {"shards": "data-{0..3}.tar", "shuffle_buffer": 16},
        "sizing": {"mode": "sampled", "max_tokens": 256, "min_tokens": 4, "max_aspect": 4.0,
                   "sampled": {"range": [64, 128]}},
        "crop": {"mode": "random"},
        "patch_ops": [{"name": "jitter"}],
        "drop": {"mode": "none"},
        "epoch": {"batches": 10},
        "output": {"dtype": "float32"},
    },
    {
        "sizing": {"mode": "sampled", "sampled": {"choices": [64, 128], "weights": [1.0, 2.0]}},
        "patch_ops": [{"name": "jitter"}, {"name": "noise"}],
        "drop": {"mode": "random", "rate": 0.25},
        "epoch": {"samples": 100},
    },
    {"sizing": {"grid_multiple": 2}},  # output.token_order windows needs windows
]


def _get(d, path):
    for p in path:
        d = d[p]
    return d


def _set(d, path, value):
    d = copy.deepcopy(d)
    _get(d, path[:-1])[path[-1]] = value
    return d


def _single_changes():
    found = {}
    for path, ann in _leaf_paths(Recipe):
        if path == ("version",):
            continue  # one accepted value: see test_only_version_1_is_accepted
        for base in BASES:
            resolved = Recipe.from_dict(base).to_dict()
            for value in _candidates(ann, _get(resolved, path)):
                if path == ("augment",) and value is not AUGMENT_CHANGE:
                    continue
                changed = _set(resolved, path, value)
                if path == ("augment",):  # built at test time: albumentations loads only then
                    found[path] = (base, changed)
                    break
                try:
                    recipe = Recipe.from_dict(changed)
                except RecipeError:
                    continue
                if _get(recipe.to_dict(), path) != _get(resolved, path):
                    found[path] = (base, changed)
                    break
            if path in found:
                break
    return found


SINGLE_CHANGES = _single_changes()


def test_every_setting_has_a_single_key_change():
    every = {p for p, _ in _leaf_paths(Recipe)} - {("version",)}
    assert len(every) > 50  # the walk reached into the sections
    missing = sorted(".".join(map(str, p)) for p in every - set(SINGLE_CHANGES))
    assert not missing, f"no valid single-key change found for: {missing}; extend BASES or _candidates"


@pytest.mark.parametrize("path", list(SINGLE_CHANGES), ids=[".".join(map(str, p)) for p in SINGLE_CHANGES])
def test_fingerprint_changes_when_any_one_setting_changes(path):
    base, changed = SINGLE_CHANGES[path]
    before = Recipe.from_dict(base)
    after = Recipe.from_dict(changed)
    assert _get(after.to_dict(), path) != _get(before.to_dict(), path)
    assert after.fingerprint() != before.fingerprint()
    # the change survives printing the recipe and reading it back
    assert Recipe.from_dict(yaml.safe_load(after.to_yaml())).fingerprint() == after.fingerprint()


def test_fingerprint_covers_every_top_level_section():
    sections = {p[0] for p in SINGLE_CHANGES}
    assert sections == set(Recipe.model_fields) - {"version"}
