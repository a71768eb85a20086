"""Image folders as a source: a sample per image file (key = relative path without extension),
sidecars as members, `label_key: folder` from sorted class folders; split, resume, pack/verify."""

from __future__ import annotations

import json
import os
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

import patchloom.read.folder as folder_mod
from patchloom import Pipeline, Recipe
from patchloom.cli.main import main
from patchloom.pipeline import StateError
from patchloom.read import (
    DEFAULT_IMAGE_KEYS,
    Fields,
    ShardTask,
    SourceError,
    expand_shards,
    folder_listing,
    read_task,
    read_tasks,
    reader_tasks,
)
from patchloom.recipe.schema import DEFAULT_IMAGE_KEYS as RECIPE_IMAGE_KEYS
from patchloom.store import load_manifest, pack_to_dir, read_packed, verify_dir
from patchloom.testing import batches_equal, check_resume

from conftest import encode_png, labels_texts, make_shards, random_image

pytestmark = pytest.mark.filterwarnings("ignore:image folder .* ignored", "ignore:.* shards for .* readers")
BASE = {
    "seed": 9,
    "source": {"label_key": "folder", "text_key": "txt", "shuffle_buffer": 4},
    "sizing": {"patch_size": 8, "max_tokens": 16, "min_tokens": 1},
    "packing": {"seq_len": 64, "rows": 2, "max_images_per_row": 6, "lookahead": 4},
}
CLASSES = ["ant", "moose", "zebra"]  # sorted: ant 0, moose 1, zebra 2


def _png(rng: np.random.Generator) -> bytes:
    h, w = (int(v) for v in rng.integers(8, 40, size=2))
    return encode_png(random_image(rng, h, w))


def make_folder(root: Path, *, per_class: int = 5, seed: int = 0) -> dict[str, tuple[int, str]]:
    """Class folders written out of order, some images with a caption sidecar, one nested deeper,
    plus files that are not samples. Returns key -> (label, caption)."""
    rng = np.random.default_rng(seed)
    want: dict[str, tuple[int, str]] = {}
    for cls in ["zebra", "ant", "moose"]:
        for i in range(per_class):
            sub = f"{cls}/deep/er" if i == per_class - 1 else cls
            (root / sub).mkdir(parents=True, exist_ok=True)
            key = f"{sub}/img{i}"
            (root / f"{key}.png").write_bytes(_png(rng))
            caption = ""
            if i % 2 == 0:
                caption = f"a {cls} number {i}"
                (root / f"{key}.txt").write_text(caption, encoding="utf-8")
            want[key] = (CLASSES.index(cls), caption)
    (root / "notes.md").write_text("not an image")
    (root / "ant" / "readme.txt").write_text("a sidecar of no image")
    (root / ".DS_Store").write_bytes(b"\0")
    return want


@pytest.fixture
def photos(tmp_path) -> tuple[Path, dict[str, tuple[int, str]]]:
    root = tmp_path / "photos"
    root.mkdir()
    return root, make_folder(root)


def test_class_folders_sorted_indices_sidecar_captions_and_nested_folders(photos):
    root, want = photos
    with pytest.warns(UserWarning, match=r"3 files are neither images"):  # notes.md, readme.txt, .DS_Store
        got = labels_texts(Pipeline(Recipe.from_dict(BASE), shards=str(root)))
    assert got == want
    assert "zebra/deep/er/img4" in got and got["zebra/deep/er/img4"][0] == 2


def test_records_hold_sidecars_as_members(photos):
    root, want = photos
    recs = {r.key: r for r in read_task(ShardTask(str(root)), fields=Fields(("png",)))}
    assert sorted(recs) == sorted(want) and [r.index for r in recs.values()] == list(range(len(want)))
    rec = recs["ant/img0"]
    assert set(rec.members) == {"png", "txt", "folder"}
    assert rec.members["txt"] == b"a ant number 0" and rec.members["folder"] == b"0"
    assert rec.members["png"] == (root / "ant" / "img0.png").read_bytes()
    assert set(recs["moose/img1"].members) == {"png", "folder"}


def test_non_image_files_are_ignored_and_counted(photos):
    root, want = photos
    (root / "moose" / "table.csv").write_text("a,b")
    view = folder_listing(str(root), fresh=True).samples(DEFAULT_IMAGE_KEYS)
    assert len(view) == len(want) and view.ignored == 4
    assert view.classes == CLASSES


def test_folder_only_of_tars_keeps_its_hint_and_an_empty_one_says_why(tmp_path):
    tars = tmp_path / "tars"
    tars.mkdir()
    make_shards(tars, 2, 2)
    with pytest.raises(SourceError, match=r"is a folder; did you mean .*\*\.tar'\? \(it holds 2 \.tar files\)"):
        expand_shards(str(tars))
    empty = tmp_path / "empty"
    (empty / "sub").mkdir(parents=True)
    (empty / "sub" / "a.txt").write_text("x")
    with pytest.raises(SourceError, match=r"folder without image files .*source\.image_keys \(clip files' in "
                                          r"source\.video_keys\)"):
        expand_shards(str(empty))
    assert expand_shards([str(tmp_path / "tars" / "*.tar"), str(empty) + "/"], image_keys=["txt"])[-1] == str(empty)


@pytest.mark.parametrize("world_size", [2, 3, 5])
def test_ranks_disjoint_and_complete(photos, monkeypatch, world_size):
    root, want = photos
    monkeypatch.setattr(folder_mod, "FOLDER_CHUNK", 4)  # 15 samples: 4 chunks, fewer than 5 ranks
    recipe = Recipe.from_dict(BASE)
    seen: Counter = Counter()
    for rank in range(world_size):
        got = labels_texts(Pipeline(recipe, shards=str(root), rank=rank, world_size=world_size))
        assert got, f"rank {rank} got nothing"
        seen.update(list(got))
    assert seen == Counter(dict.fromkeys(want, 1))


def test_chunks_are_the_units_shuffled_like_shards(photos, monkeypatch):
    root, want = photos
    monkeypatch.setattr(folder_mod, "FOLDER_CHUNK", 4)
    fields = Fields(DEFAULT_IMAGE_KEYS)
    order0 = [r.index for r in read_tasks(reader_tasks([str(root)], seed=0, epoch=0, fields=fields), fields=fields)]
    order1 = [r.index for r in read_tasks(reader_tasks([str(root)], seed=0, epoch=1, fields=fields), fields=fields)]
    assert sorted(order0) == sorted(order1) == list(range(len(want)))
    assert order0 != order1  # the chunk order changes with the epoch
    chunks = [i // 4 for i in order0]
    runs = [c for k, c in enumerate(chunks) if k == 0 or chunks[k - 1] != c]
    assert sorted(runs) == [0, 1, 2, 3]  # each chunk read in one go ...
    assert all(order0[k] + 1 == order0[k + 1] for k in range(len(order0) - 1) if chunks[k] == chunks[k + 1])  # sorted


def test_exact_resume(photos, monkeypatch):
    root, _ = photos
    monkeypatch.setattr(folder_mod, "FOLDER_CHUNK", 4)
    recipe = Recipe.from_dict({**BASE, "packing": {"seq_len": 32, "rows": 1, "max_images_per_row": 2, "lookahead": 3}})
    report = check_resume(lambda: Pipeline(recipe, shards=str(root), rank=1, world_size=2))
    assert report.batches >= 3
    report = check_resume(lambda: Pipeline(recipe, shards=str(root)), every=2)
    assert report.batches >= 5


def test_resume_into_a_changed_folder_is_refused(photos):
    root, _ = photos
    recipe = Recipe.from_dict(BASE)
    pipe = Pipeline(recipe, shards=str(root))
    next(iter(pipe))
    state = json.loads(json.dumps(pipe.state_dict()))
    (root / "ant" / "new.png").write_bytes((root / "ant" / "img0.png").read_bytes())
    with pytest.raises(StateError, match="photos"):
        Pipeline(recipe, shards=str(root)).load_state_dict(state)


def test_links_out_of_the_folder_are_refused_and_inside_ones_read(tmp_path):
    root = tmp_path / "pics"
    (root / "a").mkdir(parents=True)
    rng = np.random.default_rng(1)
    (root / "a" / "x.png").write_bytes(_png(rng))
    outside = tmp_path / "secret.png"
    outside.write_bytes(_png(rng))
    os.symlink(root / "a" / "x.png", root / "a" / "y.png")
    assert [r.key for r in read_task(ShardTask(str(root)))] == ["a/x", "a/y"]
    os.symlink(outside, root / "a" / "z.png")
    with pytest.raises(SourceError, match=r"'a/z\.png' is a link to .*secret\.png.*outside the folder"):
        folder_listing(str(root), fresh=True)


def test_two_files_for_one_member_are_a_skipped_sample(tmp_path):
    root = tmp_path / "case"
    root.mkdir()
    rng = np.random.default_rng(2)
    (root / "a.png").write_bytes(_png(rng))
    (root / "a.PNG").write_bytes(_png(rng))
    (root / "b.png").write_bytes(_png(rng))
    recs = list(read_task(ShardTask(str(root))))
    assert [(r.key, r.error is None) for r in recs] == [("a", False), ("b", True)]
    assert "two files for member 'png'" in recs[0].error


def test_default_image_keys_match_the_recipe_default():
    assert list(DEFAULT_IMAGE_KEYS) == list(RECIPE_IMAGE_KEYS)


def test_run_prints_the_class_table(photos, tmp_path, capsys):
    root, _ = photos
    path = tmp_path / "r.yaml"
    path.write_text(json.dumps(BASE))
    assert main(["run", str(path), "--shards", str(root), "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "classes of image folder" in out and "3" in out
    lines = [line.split() for line in out.splitlines() if line.strip() in {f"{i}  {c}" for i, c in enumerate(CLASSES)}]
    assert lines == [["0", "ant"], ["1", "moose"], ["2", "zebra"]]


def test_pack_reads_back_as_the_live_pipeline_and_verify_notices_a_changed_file(photos, tmp_path):
    root, _ = photos
    recipe = Recipe.from_dict(BASE)
    out = tmp_path / "packed"
    man = pack_to_dir(recipe, out, shards=str(root), progress=False, max_batches_per_shard=2)
    assert man["classes"] == {str(root): CLASSES} and load_manifest(out)["classes"] == {str(root): CLASSES}
    live = list(Pipeline(recipe, shards=str(root)))
    back = list(read_packed(out, shuffle=False))
    assert len(back) == len(live) > 1
    assert all(batches_equal(a, b) is None for a, b in zip(back, live))
    assert verify_dir(out, progress=False).ok
    img = root / "moose" / "img1.png"
    img.write_bytes(encode_png(random_image(np.random.default_rng(99), 12, 12)))
    res = verify_dir(out, progress=False)
    assert not res.ok and any("input shard photos changed since packing" in m for m in res.messages)


def test_ray_engine_packs_folders_and_parquet_as_the_local_engine_does(photos, tmp_path):
    ray = pytest.importorskip("ray")
    import logging

    root, _ = photos
    shards = [str(root)]
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq

        rng = np.random.default_rng(4)
        pq.write_table(pa.table({"png": [_png(rng) for _ in range(7)], "txt": [f"row {i}" for i in range(7)]}),
                       tmp_path / "rows.parquet", row_group_size=2)
        shards.append(str(tmp_path / "rows.parquet"))
    except ImportError:  # without the parquet extra, the folder alone
        pass
    recipe = Recipe.from_dict({**BASE, "source": {**BASE["source"], "image_keys": ["png"]}})
    local = pack_to_dir(recipe, tmp_path / "local", shards=shards, workers=2, progress=False, max_batches_per_shard=2)
    if ray.is_initialized():
        ray.shutdown()
    ray.init(num_cpus=2, include_dashboard=False, object_store_memory=150 << 20, logging_level=logging.WARNING)
    try:
        remote = pack_to_dir(recipe, tmp_path / "ray", shards=shards, workers=2, progress=False,
                             max_batches_per_shard=2, engine="ray")
    finally:
        ray.shutdown()
    assert remote == local and [i["path"] for i in local["inputs"]] == shards
    names = sorted(p.name for p in (tmp_path / "local").iterdir())
    assert names == sorted(p.name for p in (tmp_path / "ray").iterdir()) and len(names) > 2
    for name in names:
        assert (tmp_path / "local" / name).read_bytes() == (tmp_path / "ray" / name).read_bytes(), name
