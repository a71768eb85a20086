"""Renamed recipe keys: each old key fails with one line naming its new key; the new keys reach
the code that reads them; the allowed names come from the tables; fingerprints survive the rename."""

from __future__ import annotations

import typing
from pathlib import Path

import numpy as np
import pytest
import yaml

from patchloom import Recipe, RecipeError
from patchloom.image.dropping import DROP_MODES, decide_drop, target_rate
from patchloom.image.patchops import PATCH_OPS
from patchloom.image.sizing import RESAMPLE_FILTERS, SIZING_MODES, draw_crop
from patchloom.packing.assign import ALGORITHMS
from patchloom.recipe import DropConfig, PackingConfig, PatchOp, SizingConfig, current_names, fingerprint_form

RECIPES = sorted((Path(__file__).parent.parent / "recipes").glob("*.yaml"))


def problem_lines(data, origin="r.yaml"):
    with pytest.raises(RecipeError) as info:
        Recipe.from_dict(data, origin=origin)
    head, *lines = str(info.value).split("\n")
    assert head == f"{origin}: invalid recipe"
    return [line.strip() for line in lines]


# (old recipe, the one line it gets, the mode the new key needs to be used)
OLD_KEYS = [
    ({"crop": {"scale": [0.5, 1.0]}},
     "crop.scale was renamed: use crop.area; write crop: {area: [0.5, 1.0]}", {"crop": {"mode": "random"}}),
    ({"crop": {"ratio": [0.5, 2.0]}},
     "crop.ratio was renamed: use crop.aspect_jitter; write crop: {aspect_jitter: [0.5, 2.0]}",
     {"crop": {"mode": "random"}}),
    ({"drop": {"apply": "drop"}},
     "drop.apply was renamed: use drop.output ('drop' is now 'remove'); write drop: {output: 'remove'}", {}),
    ({"drop": {"apply": "mask"}}, "drop.apply was renamed: use drop.output; write drop: {output: 'mask'}", {}),
    ({"drop": {"block_min_area": 9}},
     "drop.block_min_area was renamed: use drop.block.min_area; write drop: {block: {min_area: 9}}",
     {"drop": {"mode": "block", "rate": 0.5}}),
    ({"drop": {"block_aspect": [0.5, 2.0]}},
     "drop.block_aspect was renamed: use drop.block.aspect; write drop: {block: {aspect: [0.5, 2.0]}}",
     {"drop": {"mode": "block", "rate": 0.5}}),
    ({"drop": {"stride": 3}},
     "drop.stride was renamed: use drop.grid.stride; write drop: {grid: {stride: 3}}", {"drop": {"mode": "grid"}}),
    ({"drop": {"content_noise": 0.25}},
     "drop.content_noise was renamed: use drop.content.noise; write drop: {content: {noise: 0.25}}",
     {"drop": {"mode": "content", "rate": 0.5}}),
    ({"packing": {"buffer": 12}},
     "packing.buffer was renamed: use packing.lookahead; write packing: {lookahead: 12}", {}),
]


def _merge(base, over):
    out = dict(base)
    for k, v in over.items():
        out[k] = _merge(out[k], v) if isinstance(v, dict) and isinstance(out.get(k), dict) else v
    return out


def _get(data, dotted):
    for part in dotted.split("."):
        data = data[part]
    return data


@pytest.mark.parametrize(("old", "line", "mode"), OLD_KEYS, ids=[line.split()[0] for _, line, _ in OLD_KEYS])
def test_an_old_key_is_one_line_naming_the_new_key(old, line, mode):
    assert problem_lines(_merge(mode, old)) == [line]


@pytest.mark.parametrize(("old", "line", "mode"), OLD_KEYS, ids=[line.split()[0] for _, line, _ in OLD_KEYS])
def test_the_suggested_new_key_validates_with_the_same_setting(old, line, mode):
    new_path = line.split("use ")[1].split()[0].rstrip(";")
    snippet = yaml.safe_load(line.split("; write ")[1])
    recipe = Recipe.from_dict(_merge(mode, snippet))
    assert _get(recipe.to_dict(), new_path) == _get(snippet, new_path)


def test_an_old_value_of_a_renamed_key_lists_the_new_values():
    assert problem_lines({"drop": {"apply": "hide"}}) == [
        "drop.apply was renamed: use drop.output, one of 'remove', 'mask'"]


def test_the_old_value_under_the_new_key_suggests_its_new_spelling():
    (line,) = problem_lines({"drop": {"mode": "random", "rate": 0.5, "output": "drop"}})
    assert line == "drop.output: must be one of 'remove', 'mask' (got 'drop'; did you mean 'remove'?)"


@pytest.mark.parametrize(("key", "where"), [("min_area", "drop.block.min_area"), ("noise", "drop.content.noise"),
                                            ("stride", None)])
def test_a_mode_key_outside_its_sub_section_points_into_it(key, where):
    (line,) = problem_lines({"drop": {key: 1}})
    if where is None:  # the old flat name: the rename line
        assert line.startswith("drop.stride was renamed: use drop.grid.stride")
    else:
        assert line.startswith(f"drop.{key}: unknown key; did you mean {where!r}?")


def test_an_old_key_in_a_file_names_the_file_and_a_base_file_names_the_base(tmp_path):
    base = tmp_path / "base.yaml"
    base.write_text("packing:\n  buffer: 8\n")
    child = tmp_path / "child.yaml"
    child.write_text("extends: base.yaml\nseed: 3\n")
    with pytest.raises(RecipeError) as info:
        Recipe.from_file(child)
    assert str(info.value) == (f"{child}: invalid recipe\n  {base}: packing.buffer was renamed: use "
                               f"packing.lookahead; write packing: {{lookahead: 8}}")


def test_old_keys_among_other_problems_still_get_one_line_each():
    lines = problem_lines({"crop": {"scale": [0.5, 1.0]}, "packing": {"buffer": 8, "rows": 0}})
    assert sorted(lines) == ["crop.scale was renamed: use crop.area; write crop: {area: [0.5, 1.0]}",
                             "packing.buffer was renamed: use packing.lookahead; write packing: {lookahead: 8}",
                             "packing.rows: must be >= 1 (got 0)"]


# --- the shipped recipes ----------------------------------------------------------------------------

#: Fingerprints of the shipped recipes as recorded before the renames (schema with crop.scale,
#: drop.apply, packing.buffer, ...). The same settings under the new names must keep them. Recipes
#: shipped later are recorded as they were first shipped. masked-image, pretrain-augmented and
#: square-baseline name no sizing.resample: recorded again when its default became `area` (new
#: outputs, so new fingerprints; under bicubic they were 15f687b7..., a6f35224..., 4534155d...).
RECORDED = {
    "clips-and-images.yaml": "5fd384b0bc36bd7021f17f306039d5b4edd127c5546da2bd78d1c18bb716310f",
    "contrastive.yaml": "22e9aedab385e16a554ea51a2cc7f896b985997a2c3a990ad2f0d7cdd5dd574d",
    "documents.yaml": "fa0dfc0244c966443234c2bd87106bd4a725b718b73cbb5fd5a7172154a4aecb",
    "eval.yaml": "69261e274d47d81b8e0a5d63b953ec6842243f3f68419a81ba7b280947149e39",
    "image-folder.yaml": "870aee303815851d33d334b874352f4ce69ed8c2ae9bdccf7b4eb5f819c126e3",
    "masked-image.yaml": "85b3bd94ccbf6a4c08724f4787cc7e21d25b690b9721f3b40e5d3565dab24473",
    "merge2-windows.yaml": "b22b205cb8e2f09aee2cb57c3d51705efd9b77152d7222ee397827de24e90438",
    "parquet-captions.yaml": "dea9b4a9ccdccb8af7fc318ba00ac92e08285f18b2552bf80c859092e96f4bae",
    "pretrain-augmented.yaml": "0866baf1c51e5c7af8fc9f2843b17a676a217defc3e5a06b6d7d65f362806e32",
    "pretrain.yaml": "849ac75e8a49205519b1b651dda60cebbc8839a56cf31ad0af5ed2bb5ea387e8",
    "square-baseline.yaml": "229583af5d33558ed8da49bc5526e27908b20099dc99ce0b74673f24a3bcf7d4",
}


@pytest.mark.parametrize("path", RECIPES, ids=[p.name for p in RECIPES])
def test_shipped_recipes_load_with_the_new_keys_and_keep_their_fingerprints(path):
    recipe = Recipe.from_file(path)
    assert recipe.fingerprint() == RECORDED[path.name]


def test_every_shipped_recipe_has_a_recorded_fingerprint():
    assert {p.name for p in RECIPES} == set(RECORDED)


def test_the_fingerprint_is_taken_under_the_first_names():
    recipe = Recipe.from_dict({"crop": {"mode": "random", "area": [0.25, 1.0]},
                               "drop": {"mode": "block", "output": "mask", "rate": 0.4, "block": {"min_area": 9}},
                               "packing": {"lookahead": 7}})
    form = fingerprint_form(recipe.to_dict())
    assert form["crop"]["scale"] == [0.25, 1.0] and "area" not in form["crop"]
    assert form["drop"]["apply"] == "mask" and form["drop"]["block_min_area"] == 9
    assert form["drop"]["stride"] is None and form["drop"]["content_noise"] == 0.1
    assert not {"block", "grid", "content", "output"} & set(form["drop"])
    assert form["packing"]["buffer"] == 7 and "lookahead" not in form["packing"]
    assert fingerprint_form(Recipe.from_dict({"drop": {"output": "remove"}}).to_dict())["drop"]["apply"] == "drop"
    # the settings themselves are not changed by taking the form
    assert recipe.to_dict()["drop"]["block"]["min_area"] == 9


def test_a_recipe_recorded_under_the_first_names_reads_back_with_current_names():
    # what a folder packed before the renames holds in its manifest: the full recipe, old names
    recorded = {"seed": 2, "crop": {"mode": "random", "scale": [0.5, 1.0], "ratio": [0.8, 1.25]},
                "drop": {"mode": "grid", "apply": "drop", "stride": 2, "block_min_area": 4,
                         "block_aspect": [0.5, 2.0], "content_noise": 0.3},
                "packing": {"buffer": 5}}
    with pytest.raises(RecipeError, match="crop.scale was renamed"):
        Recipe.from_dict(recorded)
    current = current_names(recorded)
    recipe = Recipe.from_dict(current)
    assert recipe.crop.area == (0.5, 1.0) and recipe.crop.aspect_jitter == (0.8, 1.25)
    assert recipe.drop.output == "remove" and recipe.drop.grid.stride == 2 and recipe.drop.content.noise == 0.3
    assert recipe.drop.block.min_area == 4 and recipe.drop.block.aspect == (0.5, 2.0)
    assert recipe.packing.lookahead == 5 and recipe.seed == 2
    assert "scale" in recorded["crop"]  # the input is not changed
    # keys added later are left out of the form at their defaults: reading it back fills them in
    assert Recipe.from_dict(current_names(fingerprint_form(recipe.to_dict()))).to_dict() == recipe.to_dict()


# --- the new keys reach the code that reads them ---------------------------------------------------


def test_crop_area_and_aspect_jitter_shape_the_crop():
    crop = Recipe.from_dict({"crop": {"mode": "random", "area": [0.25, 0.25], "aspect_jitter": [1.0, 1.0]}}).crop
    left, top, right, bottom = draw_crop(400, 800, crop, np.random.default_rng(0))
    assert (right - left, bottom - top) == (400, 200)  # a quarter of the area, the image's own 2:1 aspect


def test_drop_sub_sections_reach_their_modes():
    block = Recipe.from_dict({"drop": {"mode": "block", "rate": 0.5, "block": {"min_area": 12, "aspect": [1, 1]}}})
    d = decide_drop(block.drop, (16, 16), None, np.random.default_rng(0))
    assert d.blocks and all(h * w >= 12 and h == w for _, _, h, w in d.blocks)
    grid = Recipe.from_dict({"drop": {"mode": "grid", "grid": {"stride": 3}}})
    assert target_rate(grid.drop, 100, np.random.default_rng(0)) == pytest.approx(1 - 1 / 9)
    patches = np.random.default_rng(1).integers(0, 256, (64, 12), dtype=np.uint8)
    exact, noisy = ({"drop": {"mode": "content", "rate": 0.5, "content": {"noise": n}}} for n in (0.0, 5.0))
    keeps = {n: {decide_drop(Recipe.from_dict(r).drop, (8, 8), patches, np.random.default_rng(s)).keep.tobytes()
                 for s in range(6)} for n, r in (("exact", exact), ("noisy", noisy))}
    assert len(keeps["exact"]) == 1 and len(keeps["noisy"]) > 1


@pytest.mark.parametrize("output", ["remove", "mask"])
def test_drop_output_removes_or_masks(output):
    from patchloom import image_to_patches

    img = np.random.default_rng(0).integers(0, 256, (64, 64, 3), dtype=np.uint8)
    recipe = Recipe.from_dict({"sizing": {"max_tokens": 16}, "drop": {"mode": "random", "rate": 0.5, "output": output}})
    ps = image_to_patches(img, recipe, key="a")
    if output == "remove":
        assert ps.num_tokens == 8 and ps.masked is None
    else:
        assert ps.num_tokens == 16 and int(ps.masked.sum()) == 8


# --- allowed names come from the tables ------------------------------------------------------------


def _choices(model, field):
    return typing.get_args(model.model_fields[field].annotation)


@pytest.mark.parametrize(("model", "field", "table"), [
    (DropConfig, "mode", DROP_MODES), (PatchOp, "name", PATCH_OPS), (SizingConfig, "resample", RESAMPLE_FILTERS),
    (SizingConfig, "mode", SIZING_MODES), (PackingConfig, "algorithm", ALGORITHMS),
], ids=["drop.mode", "patch_ops.name", "sizing.resample", "sizing.mode", "packing.algorithm"])
def test_allowed_values_are_the_tables_keys(model, field, table):
    assert _choices(model, field) == tuple(table)
    wrong = {"drop": {"mode": "zz"}, "patch_ops": [{"name": "zz"}], "sizing": {field: "zz"},
             "packing": {"algorithm": "zz"}}
    section = {DropConfig: "drop", PatchOp: "patch_ops", SizingConfig: "sizing", PackingConfig: "packing"}[model]
    (line,) = problem_lines({section: wrong[section]})
    assert f"must be one of {', '.join(repr(k) for k in table)} (got 'zz')" in line
