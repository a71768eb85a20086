"""The two entry points agree: a PIL image given to image_to_patches and the same bytes read from a
shard come out with the same orientation and tokens; to_torch always has the same keys."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from patchloom import Recipe
from patchloom.packing.batch import PackedBatch
from patchloom.pipeline import image_to_patches
from patchloom.image.chain import process_record
from patchloom.read import Record

RECIPE = Recipe.from_dict({
    "seed": 3,
    "sizing": {"patch_size": 8, "max_tokens": 48, "min_tokens": 4, "mode": "budget"},
    "packing": {"seq_len": 64, "rows": 1, "max_images_per_row": 4},
})


def _scene() -> np.ndarray:
    """A 40x64 image with a bright square in its top-left corner, so a turn or flip shows."""
    img = np.full((40, 64, 3), 40, dtype=np.uint8)
    img[:, :, 1] = np.linspace(0, 200, 64, dtype=np.uint8)[None, :]
    img[:12, :12] = 250
    return img


def _png_with_orientation(orientation: int, fmt: str = "PNG") -> bytes:
    img = Image.fromarray(_scene())
    exif = Image.Exif()
    exif[0x0112] = orientation
    buf = io.BytesIO()
    img.save(buf, format=fmt, exif=exif.tobytes())
    return buf.getvalue()


@pytest.mark.parametrize("fmt", ["PNG", "JPEG", "TIFF", "WEBP"])
@pytest.mark.parametrize("orientation", range(1, 9))
def test_pil_entry_point_applies_exif_orientation_like_the_shard_path(orientation, fmt):
    """TIFF matters: Pillow turns a TIFF itself on load, so the tag must not be applied twice."""
    data = _png_with_orientation(orientation, fmt)
    ext = {"PNG": "png", "JPEG": "jpg", "TIFF": "tif", "WEBP": "webp"}[fmt]
    from_shard = process_record(Record("k", "mem.tar", 0, {ext: data}), RECIPE, 0)
    from_pil = image_to_patches(Image.open(io.BytesIO(data)), RECIPE, key="k")
    assert from_pil.grid == from_shard.grid
    np.testing.assert_array_equal(from_pil.patches, from_shard.patches)
    # Orientations 5..8 turn the picture a quarter: the grid must be taller than wide.
    gh, gw = from_pil.grid
    assert (gh > gw) == (orientation >= 5)


@pytest.mark.parametrize("orientation", [3, 6])
def test_pil_entry_point_differs_from_ignoring_the_tag(orientation):
    """Guards the test above: the tag really changes the tokens, so ignoring it would be caught."""
    data = _png_with_orientation(orientation)
    tagged = image_to_patches(Image.open(io.BytesIO(data)), RECIPE, key="k")
    raw = image_to_patches(np.asarray(Image.open(io.BytesIO(data)).convert("RGB")), RECIPE, key="k")
    assert tagged.grid != raw.grid or not np.array_equal(tagged.patches, raw.patches)


def _batch(masked: np.ndarray | None) -> PackedBatch:
    return PackedBatch(
        patches=np.zeros((1, 4, 3), np.uint8), segment_ids=np.zeros((1, 4), np.int32),
        coords=np.zeros((1, 4, 2), np.int32), grids=np.zeros((1, 2, 2), np.int32),
        labels=np.full((1, 2), -1, np.int64), keys=[[]], masked=masked,
    )


def test_to_torch_always_has_masked_key():
    pytest.importorskip("torch")
    plain = _batch(None).to_torch()
    assert "masked" in plain and plain["masked"] is None
    hidden = _batch(np.array([[True, False, False, True]])).to_torch()
    assert hidden["masked"].tolist() == [[True, False, False, True]]
    assert set(plain) == set(hidden)


def test_missing_optional_extra_is_one_line_naming_the_extra(tmp_path, monkeypatch, capsys):
    """A recipe with an augment section on a machine without albumentations: one line, no traceback."""
    from patchloom.cli.main import main

    monkeypatch.setitem(__import__("sys").modules, "albumentations", None)  # import now fails
    recipe = tmp_path / "aug.yaml"
    recipe.write_text("version: 1\naugment:\n  - {name: HorizontalFlip, p: 0.5}\n")
    assert main(["recipe", "check", str(recipe)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "Traceback" not in err
    assert "'albumentations'" in err and "pip install 'patchloom[augment]'" in err


def test_require_names_the_extra_only_when_the_package_itself_is_missing(monkeypatch):
    import sys

    from patchloom.extras import MissingExtraError, require

    monkeypatch.setitem(sys.modules, "matplotlib", None)
    with pytest.raises(MissingExtraError, match=r"pip install 'patchloom\[report\]'"):
        require("matplotlib")
    monkeypatch.undo()
    # An installed package with a broken part is not "missing": the real error comes through.
    with pytest.raises(ModuleNotFoundError) as info:
        require("numpy.no_such_part_of_numpy")
    assert not isinstance(info.value, MissingExtraError)
