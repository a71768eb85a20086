"""Smoke runs of the speed benchmarks on tiny inputs: the photos-small corpus, the kernels and bicubic
lines of `bench pipeline` over several corpora, `bench store`, the DataLoader batch pool and the
compressed store. No speed is asserted anywhere (the numbers depend on the machine)."""

from __future__ import annotations

import io
import json
import tarfile
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from patchloom.bench.pipeline import RATIOS, format_bench, format_corpus_ratios, kernel_jobs, run_bench
from patchloom.bench.photos import PHOTO_RECIPE
from patchloom.bench.small_photos import make_small_photo_shards, small_photo_shard_pattern, small_photo_size
from patchloom.cli.main import main
from patchloom.read import expand_shards
from patchloom.recipe.schema import Recipe

pytest.importorskip("skimage")


@pytest.fixture(scope="module")
def small(tmp_path_factory: pytest.TempPathFactory) -> str:
    out = tmp_path_factory.mktemp("small")
    make_small_photo_shards(out, images=20, shards=2, progress=False)
    return small_photo_shard_pattern(out, shards=2)


def _recipe(**packing: int) -> Recipe:
    return Recipe.from_dict(PHOTO_RECIPE).replace(packing={"rows": 2, **packing})


def test_small_photo_sizes_are_imagenet_like() -> None:
    rng = np.random.default_rng(0)
    sizes = np.array([small_photo_size(rng) for _ in range(3000)])
    short = sizes.min(axis=1)
    assert short.min() >= 150 and short.max() <= 900
    assert 300 <= np.median(short) <= 420
    assert 0.15 < float((sizes[:, 0] > sizes[:, 1]).mean()) < 0.35  # portrait one time in four


def test_small_photo_shards_mix_jpeg_and_png_and_are_reused(small: str) -> None:
    paths = expand_shards(small, allow_shell=False)
    formats = []
    for path in paths:
        with tarfile.open(path) as tar:
            for name in tar.getnames():
                if name.endswith((".jpg", ".png")):
                    meta = json.loads(tar.extractfile(name.rsplit(".", 1)[0] + ".json").read())
                    img = Image.open(io.BytesIO(tar.extractfile(name).read()))
                    assert img.format == meta["format"] and img.size == (meta["width"], meta["height"])
                    assert 150 <= min(img.size) <= 900
                    formats.append(img.format)
    assert len(formats) == 20 and "JPEG" in formats
    folder = Path(paths[0]).parent
    before = Path(paths[0]).stat().st_mtime_ns
    make_small_photo_shards(folder, images=20, shards=2, progress=False)
    assert Path(paths[0]).stat().st_mtime_ns == before  # same spec: kept
    stamp = json.loads((folder / "corpus.json").read_text())
    assert stamp["spec"]["corpus"] == "photos-small" and 0 <= stamp["png_share"] <= 1


def test_png_share_of_the_full_corpus_is_a_fifth(tmp_path: Path) -> None:
    make_small_photo_shards(tmp_path, images=120, shards=1, progress=False)
    share = json.loads((tmp_path / "corpus.json").read_text())["png_share"]
    assert 0.1 <= share <= 0.3


def test_run_bench_times_every_line_and_each_ratio_per_run(small: str) -> None:
    res = run_bench(_recipe(), shards=small, repeats=2, quality_check=False)
    for side in ("baseline", "baseline_bicubic", "kernels", "pipeline"):
        m = res[side]["median"]
        assert m["images"] == 20 and m["images_per_s"] > 0, side
    assert len(res["ratio_runs"]) == 2
    assert set(res["ratio_runs"][0]) == set(RATIOS) | {f"{name}_cpu" for name in RATIOS}
    run0 = res["ratio_runs"][0]
    assert run0["pipeline_vs_kernels"] == res["pipeline"]["runs"][0]["images_per_s"] / \
        res["kernels"]["runs"][0]["images_per_s"]
    assert res["ratio"]["kernels_vs_baseline"] == res["kernels"]["median"]["images_per_s"] / \
        res["baseline"]["median"]["images_per_s"]
    assert res["resample"] == "area"
    text = format_bench(res)
    for line in ("kernels alone / baseline", "pipeline / kernels alone", "pipeline / bicubic baseline",
                 "outside decode and resize", "pipeline / baseline:"):
        assert line in text
    assert run0["images_per_s_cpu"] == res["pipeline"]["runs"][0]["images_per_cpu_s"] / \
        res["baseline"]["runs"][0]["images_per_cpu_s"]
    table = format_corpus_ratios({"a": res, "b": res}).splitlines()
    assert [line.split()[0:3] for line in table[2:]] == [["a", "(wall", "time)"], ["b", "(wall", "time)"],
                                                        ["a", "(CPU", "time)"], ["b", "(CPU", "time)"]]
    assert f"{res['ratio']['pipeline_vs_kernels_cpu']:.2f}x" in table[4]


def test_kernel_jobs_use_the_pipelines_decoders(small: str) -> None:
    jobs = kernel_jobs(_recipe(), expand_shards(small, allow_shell=False))
    paths = {j.call.path if j.call else "pillow" for j in jobs}
    assert len(jobs) == 20 and paths <= {"simplejpeg", "pyspng", "pillow"} and "simplejpeg" in paths


def test_bench_pipeline_over_two_corpora_prints_a_ratio_table(small: str, tmp_path: Path,
                                                              capsys: pytest.CaptureFixture[str]) -> None:
    recipes = []
    for name in ("one", "two"):
        path = tmp_path / f"{name}.yaml"
        path.write_text(_recipe().replace(source={"shards": small}).to_yaml())
        recipes.append(str(path))
    out = tmp_path / "bench.json"
    assert main(["bench", "pipeline", "--corpus", ",".join(recipes), "--repeats", "1", "--max-images", "6",
                 "--json", str(out), "--no-progress"]) == 0
    text = capsys.readouterr().out
    assert text.count("pipeline / baseline:") == 2 and "ratios per corpus" in text
    assert set(json.loads(out.read_text())["corpora"]) == set(recipes)
    assert main(["bench", "pipeline", "--corpus", ",".join(recipes), "--shards", small, "--no-progress"]) == 2
    assert "single --corpus" in capsys.readouterr().err


def test_bench_store_packs_raw_and_zstd_and_reads_both(small: str, tmp_path: Path,
                                                        capsys: pytest.CaptureFixture[str]) -> None:
    pytest.importorskip("zstandard")
    path = tmp_path / "r.yaml"
    path.write_text(_recipe().to_yaml())
    out = tmp_path / "store.json"
    assert main(["bench", "store", "--corpus", str(path), "--shards", small, "--repeats", "1", "--json", str(out),
                 "--no-progress"]) == 0
    assert "zstd folder" in capsys.readouterr().out
    res = json.loads(out.read_text())
    assert res["images"] == 20 and res["packs"]["zstd"]["bytes"] < res["packs"]["raw"]["bytes"]
    assert all(v["gb_per_s"] > 0 for v in res["reads"].values()) and len(res["reads"]) == 4


def test_compressed_store_reads_the_same_batches_and_verifies(small: str, tmp_path: Path) -> None:
    pytest.importorskip("zstandard")
    from patchloom.store.format import StoreError
    from patchloom.store.reader import read_packed
    from patchloom.store.verify import verify_dir
    from patchloom.store.writer import pack_to_dir

    recipe = _recipe()
    raw = pack_to_dir(recipe, tmp_path / "raw", shards=small, progress=False)
    zst = pack_to_dir(recipe, tmp_path / "zst", shards=small, progress=False, compress="zstd")
    assert raw["version"] == 1 and "compress" not in raw["batch_shape"]
    assert zst["version"] == 2 and zst["batch_shape"]["compress"] == "zstd"
    assert raw["shards"][0]["batch_sha256"] == zst["shards"][0]["batch_sha256"]  # hashes of the decoded arrays
    with tarfile.open(tmp_path / "zst" / zst["shards"][0]["name"]) as tar:
        assert {n.split(".", 1)[1] for n in tar.getnames()} >= {"patches.npy.zst", "keys.json"}
    a = list(read_packed(tmp_path / "raw", shuffle=False))
    b = list(read_packed(tmp_path / "zst", shuffle=False))
    assert len(a) == len(b) > 0
    for x, y in zip(a, b):
        np.testing.assert_array_equal(x.patches, y.patches)
        np.testing.assert_array_equal(x.segment_ids, y.segment_ids)
        assert x.keys == y.keys
    assert sum(p.stat().st_size for p in (tmp_path / "zst").iterdir()) < \
        sum(p.stat().st_size for p in (tmp_path / "raw").iterdir())
    result = verify_dir(tmp_path / "zst", progress=False)
    assert result.ok and result.batches == len(b), result.messages
    with pytest.raises(StoreError, match="compression"):
        pack_to_dir(recipe, tmp_path / "bad", shards=small, progress=False, compress="lz4")


def test_a_compressed_folder_with_a_damaged_frame_or_manifest_is_refused(small: str, tmp_path: Path) -> None:
    pytest.importorskip("zstandard")
    from patchloom.store.format import StoreError
    from patchloom.store.reader import read_packed
    from patchloom.store.writer import pack_to_dir

    man = pack_to_dir(_recipe(), tmp_path / "zst", shards=small, progress=False, compress="zstd")
    manifest = tmp_path / "zst" / "manifest.json"
    text = manifest.read_text()
    manifest.write_text(text.replace('"version": 2', '"version": 1'))
    with pytest.raises(StoreError, match="batch_shape.compress"):
        list(read_packed(tmp_path / "zst"))
    manifest.write_text(text.replace('"version": 2', '"version": 3'))
    with pytest.raises(StoreError, match="version 3.*newer patchloom"):
        list(read_packed(tmp_path / "zst"))
    manifest.write_text(text)
    shard = tmp_path / "zst" / man["shards"][0]["name"]
    data = bytearray(shard.read_bytes())
    at = data.find(b"\x28\xb5\x2f\xfd")  # the first zstd frame's magic
    data[at + 40:at + 48] = b"\xff" * 8
    shard.write_bytes(bytes(data))
    with pytest.raises(StoreError):
        list(read_packed(tmp_path / "zst", check_hashes=False, shuffle=False))


def test_dataloader_workers_hand_batches_over_through_reused_shared_slots(small: str) -> None:
    torch = pytest.importorskip("torch")
    from torch.utils.data import DataLoader

    from patchloom.adapters.torch import PatchloomDataset

    recipe = _recipe(rows=1, seq_len=512)  # two or three images a batch: more batches than slots
    ref = [b["patches"].clone() for b in DataLoader(PatchloomDataset(recipe, small), batch_size=None)]
    assert len(ref) >= 7
    held = list(DataLoader(PatchloomDataset(recipe, small), batch_size=None, num_workers=1))
    # Every batch kept alive: slots stay busy, later batches come the usual way, none is overwritten.
    assert all(torch.equal(a["patches"], b) for a, b in zip(held, ref))
    sizes = [a["patches"].untyped_storage().nbytes() for a in held]
    assert sizes[0] > held[0]["patches"].nbytes  # one slot holds every array of the batch
    assert sizes[-1] == held[-1]["patches"].nbytes  # all slots busy: handed over the usual way
    del held
    for a, b in zip(DataLoader(PatchloomDataset(recipe, small), batch_size=None, num_workers=1), ref):
        assert torch.equal(a["patches"], b) and type(a) is dict
        assert a["patches"].untyped_storage().nbytes() > a["patches"].nbytes  # through a slot
    off = list(DataLoader(PatchloomDataset(recipe, small, pool_slots=0), batch_size=None, num_workers=1))
    assert all(a["patches"].untyped_storage().nbytes() == a["patches"].nbytes for a in off)


@pytest.mark.parametrize("name, stem", [("photos", "photos-{"), ("photos-small", "photos-small-{")])
def test_each_photo_corpus_reads_its_own_shards(tmp_path, name, stem):
    """The corpus table pairs each corpus with its own shard pattern (nothing is made here)."""
    from patchloom.bench.corpus import load_corpus

    corpus = load_corpus(name, data=tmp_path, make=False, progress=False)
    assert corpus.shards.startswith(str(tmp_path / stem))
