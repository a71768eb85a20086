"""The benchmark corpus, the per-stage profile, the quality check and the scale benchmarks.

Small inputs only; no speed is asserted anywhere (the numbers depend on the machine).
"""

from __future__ import annotations

import io
import json
import math
import tarfile
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from patchloom.bench.pipeline import STAGES, run_bench, stage_profile
from patchloom.bench.quality import decode_quality, format_quality, psnr
from patchloom.bench.photos import PHOTO_RECIPE, make_photo_shards, photo_shard_pattern, photo_size
from patchloom.recipe.schema import Recipe
from patchloom.read import expand_shards


@pytest.fixture(scope="module")
def photos(tmp_path_factory: pytest.TempPathFactory) -> str:
    out = tmp_path_factory.mktemp("photos")
    make_photo_shards(out, images=12, shards=2, large_share=0.0, progress=False)
    return photo_shard_pattern(out, shards=2)


def _recipe() -> Recipe:
    return Recipe.from_dict(PHOTO_RECIPE)


def test_photo_sizes_follow_the_web_mix() -> None:
    rng = np.random.default_rng(0)
    sizes = np.array([photo_size(rng) for _ in range(4000)], np.float64)
    area = sizes[:, 0] * sizes[:, 1]
    aspect = sizes[:, 1] / sizes[:, 0]
    assert 0.07 < float((area >= 2e6).mean()) < 0.13  # one in ten is camera-sized
    assert 150_000 < float(np.median(area)) < 280_000  # about 500 x 430 typical
    assert aspect.min() >= 1 / 3 - 0.01 and aspect.max() <= 3 + 0.03


def test_photo_shards_are_jpegs_and_reused(photos: str, tmp_path: Path) -> None:
    paths = expand_shards(photos, allow_shell=False)
    assert len(paths) == 2
    with tarfile.open(paths[0]) as tar:
        names = tar.getnames()
        jpg = next(n for n in names if n.endswith(".jpg"))
        meta = json.loads(tar.extractfile(jpg.replace(".jpg", ".json")).read())
        img = Image.open(io.BytesIO(tar.extractfile(jpg).read()))
        assert img.format == "JPEG" and img.size == (meta["width"], meta["height"])
    assert sum(n.endswith(".jpg") for n in names) == 6
    folder = Path(paths[0]).parent
    stamp = (folder / "corpus.json").read_text()
    before = Path(paths[0]).stat().st_mtime_ns
    make_photo_shards(folder, images=12, shards=2, large_share=0.0, progress=False)
    assert Path(paths[0]).stat().st_mtime_ns == before and (folder / "corpus.json").read_text() == stamp
    with pytest.raises(ValueError, match="large_share"):
        make_photo_shards(tmp_path, images=4, shards=1, large_share=2.0)


def test_stage_profile_names_the_stages_it_ran(photos: str) -> None:
    prof = stage_profile(_recipe(), expand_shards(photos, allow_shell=False))
    per = prof["us_per_image"]
    assert prof["images"] == 12
    assert {"read", "header", "sizing", "decode", "resize", "patches", "output", "pack"} <= set(per)
    assert "drop" not in per and "augment" not in per  # this recipe does neither
    assert list(per) == [k for k in STAGES if k in per]
    assert all(v > 0 for v in per.values())
    assert math.isclose(prof["total_us"], sum(per.values()))


def test_psnr_matches_its_formula() -> None:
    a = np.zeros((4, 4, 3), np.uint8)
    b = a.copy()
    assert psnr(a, b) == math.inf
    b[0, 0, 0] = 255  # one wrong value of 48: MSE = 255^2 / 48
    assert psnr(a, b) == pytest.approx(10 * math.log10(48))
    with pytest.raises(ValueError, match="shape"):
        psnr(a, b[:2])


def test_quality_check_compares_against_full_decode(photos: str) -> None:
    res = decode_quality(_recipe(), shards=photos, max_images=12)
    assert res["images"] == 12 and res["failed"] == 0
    assert res["decode_paths"].get("simplejpeg", 0) == 24  # both decodes of every image took the fast path
    assert res["pipeline"]["mean_db"] > 30  # bicubic vs Lanczos on smooth scenes: far from noise
    low = decode_quality(_recipe().replace(sizing={"resample": "nearest"}), shards=photos, max_images=12)
    assert low["pipeline"]["mean_db"] < res["pipeline"]["mean_db"]  # a worse filter scores worse
    assert "pipeline path" in format_quality(res)


def test_run_bench_reports_stages_quality_and_steady_padding(photos: str) -> None:
    res = run_bench(_recipe(), shards=photos, repeats=1)
    assert res["stages"]["images"] == 12 and res["quality"]["images"] == 12
    pipe = res["pipeline"]["runs"][0]
    assert pipe["steady_padding_pct"] <= pipe["padding_pct"] or pipe["batches"] == 1
    assert res["ratio"]["images_per_s"] > 0
    assert run_bench(_recipe(), shards=photos, repeats=1, quality_check=False)["quality"] is None


def test_workers_bench_counts_every_image_at_each_worker_count(photos: str) -> None:
    pytest.importorskip("torch")
    from patchloom.bench.scale import bench_workers, format_workers

    res = bench_workers(_recipe(), shards=photos, workers=(0, 1), epochs=2)
    assert [r["workers"] for r in res["results"]] == [0, 1]
    assert all(r["images"] == 12 and r["images_per_s"] > 0 for r in res["results"])
    assert res["results"][0]["ratio_to_0"] == 1.0
    assert "vs 0 workers" in format_workers(res)
    longer = bench_workers(_recipe(), shards=photos, workers=(0,), epochs=2, epoch_images=30)  # 12 a pass
    assert longer["shard_passes"] == 3 and longer["results"][0]["images"] == 36
    assert "listed 3 times" in format_workers(longer)
    with pytest.raises(ValueError, match="epochs"):
        bench_workers(_recipe(), shards=photos, epochs=1)


def test_soak_streams_past_the_corpus_and_traces_memory(photos: str) -> None:
    from patchloom.bench.scale import bench_soak, current_rss_mib, format_soak

    if current_rss_mib() is None:
        pytest.skip("no /proc/self/statm on this platform")
    res = bench_soak(_recipe().replace(packing={"rows": 1}), shards=photos, images=40, samples=4)  # ~5 per batch
    assert res["images"] >= 40 and res["shard_passes"] == 4  # 12 images a pass
    trace = res["rss_trace_mib"]
    marks = [n for n, _ in trace]
    # a sample at the first batch, then at most one per images // samples = 10 images, in order
    assert 4 <= len(trace) <= 40 // 10 + 1 and marks == sorted(set(marks)) and marks[-1] <= res["images"]
    assert all(m > 0 for _, m in trace) and res["rss_max_mib"] == max(m for _, m in trace)
    settled = [m for n, m in trace if n >= 4]  # from the first tenth of the stream on
    assert res["growth_mib"] == settled[-1] - settled[0] and res["rss_settled_mib"] == settled[0]
    assert f"growth {res['growth_mib']:+.1f} MiB" in format_soak(res)


def test_a_long_stream_holds_no_more_memory_than_its_buffers(photos: str) -> None:
    """Bounded growth, counted in bytes rather than time: tracemalloc counts what Python and numpy
    hold (numpy reports its arrays to it). Once the shuffle buffer and the packer's look-ahead are
    full, 20 passes over the shards may not leave more than one batch's patch bytes behind; a leak
    of one image's patches per image would add about 100 times that."""
    import tracemalloc

    from patchloom import Pipeline

    recipe = _recipe().replace(packing={"rows": 1, "lookahead": 8}, source={"shuffle_buffer": 8})
    urls = expand_shards(photos, allow_shell=False)
    pipe = Pipeline(recipe, shards=urls * 20)  # 240 images
    batch_bytes = recipe.packing.rows * recipe.packing.seq_len * recipe.sizing.patch_size**2 * 3  # uint8
    held: list[tuple[int, int]] = []
    tracemalloc.start()
    try:
        for batch in pipe:
            held.append((pipe.ledger.read, tracemalloc.get_traced_memory()[0]))
            assert pipe.in_buffer <= 8 + 8 + batch.num_images  # the buffers' bounds, in images
    finally:
        tracemalloc.stop()
    assert pipe.ledger.read == pipe.ledger.emitted == 240
    first = [m for n, m in held if 24 <= n < 120]  # after two passes: the buffers are full
    last = [m for n, m in held if n >= 180]
    assert len(first) >= 5 and len(last) >= 5
    assert max(last) - max(first) <= batch_bytes, (max(first), max(last), batch_bytes)


def test_decode_ablation_script_runs_every_variant(tmp_path: Path) -> None:
    import subprocess
    import sys

    root = Path(__file__).resolve().parents[1]
    out = subprocess.run([sys.executable, str(root / "tools" / "decode_ablation.py"), "--data", str(tmp_path),
                          "--images", "8", "--repeats", "1"], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    for name in ("libjpeg-turbo scaled", "Pillow draft scaled", "Pillow full decode"):
        assert name in out.stdout
    assert "1.00x of shipped" in out.stdout
