"""augment: recipe specs -> seeded albumentations stages (build, refuse, split, seed)."""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import warnings

import numpy as np
import pytest

from patchloom import Recipe, RecipeError
from patchloom.image.augment import Augmenter, augmenter_for, validate_augment

MIXED = [
    {"name": "HorizontalFlip", "p": 0.5},
    {"name": "RandomCrop", "height": 48, "width": 40},
    {"name": "ColorJitter", "p": 0.8, "brightness": 0.2},
    {"name": "OneOf", "p": 0.5, "transforms": [{"name": "GaussianBlur"}, {"name": "Sharpen"}]},
    {"name": "RandomSizedCrop", "min_max_height": [30, 60], "size": [64, 64]},
    {"name": "OneOf", "transforms": [{"name": "Blur"}, {"name": "CenterCrop", "height": 32, "width": 32}]},
    {"name": "VerticalFlip", "stage": "before"},
]
SURE = [  # every draw visible in the pixels: p=1 with continuous ranges
    {"name": "RandomCrop", "height": 40, "width": 50},
    {"name": "ColorJitter", "p": 1.0, "brightness": 0.4, "contrast": 0.4, "saturation": 0.4, "hue": 0.1},
    {"name": "GaussNoise", "p": 1.0},
]
SNIPPET = """
import hashlib, sys, numpy as np
from patchloom.image.augment import Augmenter
import json
aug = Augmenter(json.loads(sys.argv[1]))
img = np.random.default_rng(7).integers(0, 256, (90, 110, 3), dtype=np.uint8)
out = aug.after_resize(aug.before_sizing(img, 11), 11)
print(hashlib.sha256(out.tobytes()).hexdigest())
"""


@pytest.fixture(scope="module")
def mixed() -> Augmenter:
    return Augmenter(MIXED)


@pytest.fixture(scope="module")
def sure() -> Augmenter:
    return Augmenter(SURE)


@pytest.fixture(scope="module")
def image() -> np.ndarray:
    return np.random.default_rng(0).integers(0, 256, (96, 112, 3), dtype=np.uint8)


def _run(aug: Augmenter, img: np.ndarray, seed: int) -> np.ndarray:
    return aug.after_resize(aug.before_sizing(img, seed), seed)


def _error(specs: list) -> str:
    with pytest.raises(ValueError) as info:
        validate_augment(specs)
    return str(info.value)


def test_round_trip_same_transforms_and_outputs(mixed, image):
    specs = mixed.to_specs()
    json.dumps(specs)  # recipe data: JSON-able
    again = Augmenter(specs)
    assert again.to_specs() == specs
    assert again.describe() == mixed.describe()
    assert [s["name"] for s in specs] == [s["name"] for s in MIXED]
    assert specs[2]["brightness"] == [0.8, 1.2] and specs[2]["p"] == 0.8
    assert [c["name"] for c in specs[3]["transforms"]] == ["GaussianBlur", "Sharpen"]
    for seed in range(6):
        np.testing.assert_array_equal(_run(again, image, seed), _run(mixed, image, seed))


def test_p_defaults_to_the_class_default_without_warning():
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        aug = Augmenter([{"name": "HorizontalFlip"}, {"name": "RandomCrop", "height": 8, "width": 8},
                         {"name": "SomeOf", "transforms": [{"name": "Blur"}]}])
    assert not [w for w in caught if "'p'" in str(w.message)]
    assert [s["p"] for s in aug.to_specs()] == [0.5, 1.0, 1.0]


def test_unknown_name_suggests_the_closest():
    msg = _error([{"name": "HorizontalFlip"}, {"name": "ColorJiter", "p": 0.5}])
    assert msg == "augment[1] 'ColorJiter': unknown transform; did you mean 'ColorJitter'?"
    assert "did you mean 'HorizontalFlip'" in _error([{"name": "horizontalflip"}])
    assert "augment[0].transforms[1] 'Sharpn'" in _error(
        [{"name": "OneOf", "transforms": [{"name": "Blur"}, {"name": "Sharpn"}]}])


def test_bad_parameter_carries_albumentations_message_and_path():
    import albumentations as A

    with pytest.raises(ValueError) as own:
        A.HorizontalFlip(p=2)
    first = str(own.value).splitlines()[0]
    msg = _error([{"name": "HorizontalFlip", "p": 2}])
    assert msg.startswith("augment[0] 'HorizontalFlip': ") and first in msg
    assert "less than or equal to 1" in msg
    msg = _error([{"name": "Blur"}, {"name": "OneOf", "transforms": [{"name": "Blur"}, {"name": "RandomCrop"}]}])
    assert msg.startswith("augment[1].transforms[1] 'RandomCrop': ") and "height" in msg
    msg = _error([{"name": "ColorJitter", "brightnes": 0.2}])
    assert "augment[0] 'ColorJitter'" in msg and "'brightnes' (did you mean 'brightness'?)" in msg


def test_code_paths_refused_before_albumentations_builds(monkeypatch):
    import albumentations as A

    calls = []
    monkeypatch.setattr(A, "from_dict", lambda *a, **k: calls.append(a))
    assert "dotted paths are not accepted" in _error([{"name": "os.system", "command": "echo hi"}])
    assert "use the bare class name 'HorizontalFlip'" in _error([{"name": "albumentations.HorizontalFlip"}])
    assert "augment[0].transforms[0] 'builtins.eval'" in _error(
        [{"name": "OneOf", "transforms": [{"name": "builtins.eval"}]}])
    assert "not a transform" in _error([{"name": "BboxParams"}])
    assert "not allowed" in _error([{"name": "Blur", "__class_fullname__": "os.system"}])
    assert calls == []


@pytest.mark.parametrize(("spec", "words"), [
    ({"name": "Compose", "transforms": [{"name": "Blur"}]}, "Sequential"),
    ({"name": "Normalize"}, "float"),
    ({"name": "Mosaic"}, "mosaic_metadata"),
    ({"name": "MaskDropout"}, "mask"),
    ({"name": "BasicTransform"}, "abstract"),
    ({"name": "Blur", "stage": "middle"}, "stage must be one of"),
    ({"name": "OneOf", "transforms": [{"name": "Blur", "stage": "before"}]}, "top-level entries only"),
    ({"name": "OneOf"}, "needs `transforms:`"),
])
def test_unusable_entries_refused(spec, words):
    assert words in _error([spec])


def test_stage_split(mixed):
    assert mixed.describe() == {
        "before": ["RandomCrop", "RandomSizedCrop", "OneOf[Blur, CenterCrop]", "VerticalFlip"],
        "after": ["HorizontalFlip", "ColorJitter", "OneOf[GaussianBlur, Sharpen]"],
    }
    assert mixed.has_before and mixed.has_after
    assert [s["stage"] for s in mixed.to_specs()] == ["after", "before", "after", "after", "before", "before",
                                                      "before"]
    only = Augmenter([{"name": "RandomCrop", "height": 8, "width": 8, "stage": "after"}, {"name": "Blur"}])
    assert only.describe() == {"before": [], "after": ["RandomCrop", "Blur"]} and not only.has_before


@pytest.mark.parametrize(("spec", "stage"), [
    ({"name": "Rotate", "limit": 30}, "after"),
    ({"name": "Rotate", "limit": 30, "crop_border": True}, "before"),
    ({"name": "Affine", "rotate": 20}, "after"),
    ({"name": "Affine", "rotate": 20, "fit_output": True}, "before"),
    ({"name": "Perspective", "keep_size": False}, "before"),
    ({"name": "RandomRotate90"}, "before"),
    ({"name": "Transpose"}, "before"),
    ({"name": "PadIfNeeded", "min_height": 8, "min_width": 8}, "before"),
    ({"name": "SafeRotate"}, "after"),
])
def test_stage_rule_per_class(spec, stage):
    assert Augmenter([spec]).describe()[stage] == [spec["name"]]


def test_same_seed_same_output_other_seeds_differ(sure, image):
    first = _run(sure, image, 5)
    _run(sure, image, 6)
    np.testing.assert_array_equal(_run(sure, image, 5), first)
    outs = {_run(sure, image, s).tobytes() for s in range(8)}
    assert len(outs) == 8
    assert sure.before_sizing(image, 5).shape == (40, 50, 3)


def test_identical_transforms_draw_independently(image):
    aug = Augmenter([{"name": "RandomBrightnessContrast", "p": 1.0}] * 2)
    aug.after_resize(image, 3)
    a, b = (t.params for t in aug._compose("after").transforms)
    assert (a["alpha"], a["beta"]) != (b["alpha"], b["beta"])


def test_deterministic_across_processes_and_threads(sure):
    img = np.random.default_rng(7).integers(0, 256, (90, 110, 3), dtype=np.uint8)
    import hashlib

    want = hashlib.sha256(_run(sure, img, 11).tobytes()).hexdigest()
    got = subprocess.run([sys.executable, "-c", SNIPPET, json.dumps(SURE)], capture_output=True, text=True,
                         env={"PYTHONHASHSEED": "123", "PATH": ""}, check=True).stdout.strip()
    assert got == want
    seen = []
    thread = threading.Thread(target=lambda: seen.append(_run(sure, img, 11)))
    thread.start()
    thread.join()
    assert hashlib.sha256(seen[0].tobytes()).hexdigest() == want


def test_after_resize_refuses_a_size_change(image):
    aug = Augmenter([{"name": "RandomCrop", "height": 32, "width": 32, "stage": "after"}])
    with pytest.raises(ValueError, match=r"RandomCrop.*stage: before"):
        aug.after_resize(image, 0)
    gray = Augmenter([{"name": "ToGray", "p": 1.0, "num_output_channels": 1}])
    with pytest.raises(ValueError, match="HxWx3 uint8"):
        gray.after_resize(image, 0)


def test_empty_stages_pass_through_and_seeds_checked(sure, image):
    flip = Augmenter([{"name": "HorizontalFlip", "p": 1.0}])
    assert flip.before_sizing(image, 0) is image
    np.testing.assert_array_equal(flip.after_resize(image, 0), image[:, ::-1])
    with pytest.raises(ValueError, match="seed"):
        sure.after_resize(image, -1)


def test_cache_by_canonical_specs():
    a = augmenter_for([{"name": "Blur", "p": 0.3, "blur_limit": [3, 5]}])
    b = augmenter_for([{"blur_limit": [3, 5], "p": 0.3, "name": "Blur"}])
    assert a is b
    assert augmenter_for([{"name": "Blur", "p": 0.4}]) is not a


def test_cv2_threads_off_after_build(sure):
    import cv2

    assert cv2.getNumThreads() <= 1


def test_importing_patchloom_does_not_import_albumentations():
    code = "import patchloom, sys; assert 'albumentations' not in sys.modules, 'imported'"
    subprocess.run([sys.executable, "-c", code], check=True)


def test_recipe_with_bad_augment_raises_recipe_error():
    with pytest.raises(RecipeError, match=r"augment.*'ColorJiter'.*did you mean 'ColorJitter'"):
        Recipe.from_dict({"augment": [{"name": "HorizontalFlip"}, {"name": "ColorJiter"}]})
    assert Recipe.from_dict({"augment": [{"name": "HorizontalFlip"}]}).augment == [{"name": "HorizontalFlip"}]
