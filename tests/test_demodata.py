"""Tests for the built-in demo data: layout, determinism, format coverage, sizes, corruption."""

from __future__ import annotations

import io
import json
import re
import tarfile
from pathlib import Path

import pytest
from PIL import Image, ImageFile

from patchloom.demo.data import (
    DEMO_CLASSES,
    DEMO_CORRUPT_KEYS,
    MIN_SAMPLES,
    demo_shard_pattern,
    make_demo_shards,
)

IMAGE_EXTS = {"jpg", "png", "webp", "gif", "bmp", "tiff"}
KEY_RE = re.compile(r"gullwick-s(\d{3})-(\d{6})")


def read_shards(paths: list[Path]) -> dict[str, dict[str, bytes]]:
    """All samples of some shards as {key: {ext: bytes}}, checking each key sits in its own shard."""
    samples: dict[str, dict[str, bytes]] = {}
    for shard_no, path in enumerate(paths):
        with tarfile.open(path) as tar:
            for member in tar:
                key, ext = member.name.split(".", 1)
                match = KEY_RE.fullmatch(key)
                assert match, f"bad key {key!r}"
                assert int(match.group(1)) == shard_no, f"{key} is in {path.name}"
                samples.setdefault(key, {})[ext] = tar.extractfile(member).read()
    return samples


def image_of(sample: dict[str, bytes]) -> tuple[str, bytes]:
    """The (extension, bytes) of a sample's single image member."""
    found = [(ext, data) for ext, data in sample.items() if ext in IMAGE_EXTS]
    assert len(found) == 1, f"expected one image member, got {sorted(sample)}"
    return found[0]


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[Path], dict[str, dict[str, bytes]]]:
    """The default demo set, written once for this module."""
    out = tmp_path_factory.mktemp("demo")
    paths = make_demo_shards(out, progress=False)
    return out, paths, read_shards(paths)


def test_default_layout_counts_and_size(demo):
    out, paths, samples = demo
    assert [p.name for p in paths] == [f"demo-{i:06d}.tar" for i in range(4)]
    assert all(p.parent == out for p in paths)
    assert len(samples) == 4 * 40
    assert json.loads((out / "classes.json").read_text(encoding="utf-8")) == DEMO_CLASSES
    readme = (out / "README.txt").read_text(encoding="utf-8")
    assert all(key in readme for key in DEMO_CORRUPT_KEYS)
    assert sum(p.stat().st_size for p in paths) < 8_000_000
    assert demo_shard_pattern(out) == str(out / "demo-{000000..000003}.tar")
    assert set(DEMO_CLASSES) == {json.loads(s["json"])["category"] for s in samples.values()}


def test_same_seed_is_byte_identical_and_other_seed_differs(tmp_path):
    first = make_demo_shards(tmp_path / "a", shards=2, per_shard=6, seed=5, progress=False)
    again = make_demo_shards(tmp_path / "b", shards=2, per_shard=6, seed=5, progress=False)
    other = make_demo_shards(tmp_path / "c", shards=2, per_shard=6, seed=6, progress=False)
    assert [p.read_bytes() for p in first] == [p.read_bytes() for p in again]
    for a, c in zip(first, other):
        assert a.read_bytes() != c.read_bytes()
    assert read_shards(first).keys() == read_shards(other).keys()


def test_every_sample_has_image_label_and_metadata(demo):
    _, _, samples = demo
    for key, sample in samples.items():
        assert "." not in key
        ext, data = image_of(sample)
        views = {f"{i}.jpg" for i in range(1, json.loads(sample["json"]).get("views", 1))}  # multi-image samples
        assert set(sample) == {ext, "cls", "json", "txt"} | views
        label = int(sample["cls"].decode("ascii"))
        assert 0 <= label < len(DEMO_CLASSES)
        meta = json.loads(sample["json"].decode("utf-8"))
        assert meta["key"] == key
        assert meta["category"] == DEMO_CLASSES[label] and meta["label"] == label
        assert isinstance(meta["caption"], str) and meta["caption"] and "\n" not in meta["caption"]
        assert sample["txt"].decode("utf-8") == meta["caption"]
        assert meta["width"] >= 1 and meta["height"] >= 1
        with Image.open(io.BytesIO(data)) as im:  # header only
            assert (im.format, im.mode) == (meta["format"], meta["mode"]), key
            stored = im.size if meta.get("exif_orientation", 1) < 5 else im.size[::-1]
            assert stored == (meta["width"], meta["height"]), key


def test_formats_and_modes_are_all_present(demo):
    _, _, samples = demo
    seen: dict[tuple[str, str], list[Image.Image]] = {}
    exif_rotated = []
    for sample in samples.values():
        _, data = image_of(sample)
        im = Image.open(io.BytesIO(data))
        seen.setdefault((im.format, im.mode), []).append(im)
        if im.format == "JPEG" and im.getexif().get(0x0112) == 6:
            exif_rotated.append((im.size, json.loads(sample["json"])))
    required = {("JPEG", "RGB"), ("JPEG", "CMYK"), ("PNG", "L"), ("PNG", "RGBA"), ("PNG", "I;16"),
                ("GIF", "P"), ("WEBP", "RGB"), ("BMP", "RGB"), ("TIFF", "RGB")}
    assert required <= seen.keys()
    assert len(seen["JPEG", "RGB"]) > len(samples) // 2  # mostly JPEG
    # EXIF orientation 6: pixels stored rotated, so the stored size is the displayed size swapped
    assert exif_rotated
    (stored_w, stored_h), meta = exif_rotated[0]
    assert (stored_h, stored_w) == (meta["width"], meta["height"]) and meta["width"] > meta["height"]
    rgba = seen["PNG", "RGBA"][0]
    alpha_min, alpha_max = rgba.getchannel("A").getextrema()
    assert alpha_min == 0 and alpha_max == 255
    gif = seen["GIF", "P"][0]
    assert "transparency" in gif.info
    assert gif.info["transparency"] in {idx for _, idx in gif.getcolors()}
    lo, hi = seen["PNG", "I;16"][0].getextrema()
    assert hi > 255  # really uses 16 bits


def test_aspect_ratios_and_sizes_span_the_extremes(demo):
    _, _, samples = demo
    sizes = [(m["width"], m["height"]) for m in (json.loads(s["json"]) for s in samples.values())]
    aspects = [w / h for w, h in sizes]
    assert min(aspects) <= 1 / 5 and max(aspects) >= 5
    assert (3, 2) in sizes
    assert any(max(s) <= 64 for s in sizes if s != (3, 2))
    assert any(max(s) > 1000 for s in sizes)
    by_cat: dict[str, list[float]] = {}
    for s in samples.values():
        meta = json.loads(s["json"])
        by_cat.setdefault(meta["category"], []).append(meta["width"] / meta["height"])
    assert all(1 / 6.05 <= a <= 1 / 2.95 for a in by_cat["receipt"])
    assert all(4.95 <= a <= 8.05 for a in by_cat["panorama"])


def test_corrupt_key_fails_to_load_and_the_rest_load(demo, monkeypatch):
    _, _, samples = demo
    monkeypatch.setattr(ImageFile, "LOAD_TRUNCATED_IMAGES", False)
    assert len(DEMO_CORRUPT_KEYS) == 1 and set(DEMO_CORRUPT_KEYS) <= samples.keys()
    for key, sample in samples.items():
        _, data = image_of(sample)
        if key in DEMO_CORRUPT_KEYS:
            assert json.loads(sample["json"]).get("corrupt") is True
            with pytest.raises(OSError), Image.open(io.BytesIO(data)) as im:
                im.load()
        else:
            with Image.open(io.BytesIO(data)) as im:
                im.load()
                assert "corrupt" not in json.loads(sample["json"])


def test_readable_by_webdataset_with_matching_keys(demo):
    wds = pytest.importorskip("webdataset")
    out, _, samples = demo
    seen = {}
    for sample in wds.WebDataset(demo_shard_pattern(out), shardshuffle=False, empty_check=False):
        seen[sample["__key__"]] = sample
    assert seen.keys() == samples.keys()
    for key, sample in seen.items():
        assert int(sample["cls"]) == int(samples[key]["cls"])
        assert any(ext in sample for ext in IMAGE_EXTS)


def test_smallest_set_has_every_special_and_rewrites_drop_stale_shards(tmp_path):
    paths = make_demo_shards(tmp_path, shards=3, per_shard=MIN_SAMPLES // 3, progress=False)
    samples = read_shards(paths)
    assert len(samples) == MIN_SAMPLES
    modes = {json.loads(s["json"])["format"] + " " + json.loads(s["json"])["mode"] for s in samples.values()}
    assert {"JPEG CMYK", "PNG I;16", "PNG RGBA", "PNG L", "GIF P", "WEBP RGB", "BMP RGB", "TIFF RGB"} <= modes
    assert set(DEMO_CORRUPT_KEYS) <= samples.keys()
    assert demo_shard_pattern(tmp_path) == str(tmp_path / "demo-{000000..000002}.tar")
    paths = make_demo_shards(tmp_path, shards=1, per_shard=MIN_SAMPLES, progress=False)
    assert sorted(tmp_path.glob("demo-*.tar")) == paths
    assert demo_shard_pattern(tmp_path) == str(tmp_path / "demo-{000000..000000}.tar")
    assert demo_shard_pattern(tmp_path, shards=7).endswith("demo-{000000..000006}.tar")


@pytest.mark.parametrize("shards, per_shard", [(0, 40), (10, 2), (2, 5)])
def test_too_small_sets_are_refused(tmp_path, shards, per_shard):
    with pytest.raises(ValueError, match="per_shard"):
        make_demo_shards(tmp_path, shards=shards, per_shard=per_shard, progress=False)
    assert not list(tmp_path.glob("demo-*.tar"))
