"""Tests for patchloom.bench.pipeline on one tiny demo shard: counts, medians, the ratio, the table, the script.

No timing is asserted: the numbers depend on the machine.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from patchloom.bench.corpus import ensure_demo_shards, load_corpus
from patchloom.bench.pipeline import (
    SquareBaseline,
    baseline_batch_images,
    baseline_side,
    format_bench,
    run_bench,
    square_patches,
)
from patchloom.cli.main import main
from patchloom.demo import DEMO_RECIPE
from patchloom.demo.data import DEMO_CORRUPT_KEYS, MIN_SAMPLES, make_demo_shards
from patchloom.recipe.schema import Recipe

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def shard(tmp_path_factory: pytest.TempPathFactory) -> str:
    out = tmp_path_factory.mktemp("demo")
    (path,) = make_demo_shards(out, shards=1, per_shard=MIN_SAMPLES, progress=False)
    return str(path)


def _recipe(**sizing: object) -> Recipe:
    return Recipe.from_dict(DEMO_RECIPE).replace(sizing=dict(sizing)) if sizing else Recipe.from_dict(DEMO_RECIPE)


def test_run_bench_numbers(shard: str) -> None:
    max_tokens = 200  # not a square: the baseline square is isqrt(200) = 14 patches a side
    recipe = _recipe(max_tokens=max_tokens)
    result = run_bench(recipe, shards=shard, repeats=1)
    base, pipe = result["baseline"]["median"], result["pipeline"]["median"]
    for m in (base, pipe):
        assert m["images"] > 0 and m["images_per_s"] > 0 and m["useful_tokens_per_s"] > 0
        assert m["seconds"] > 0 and 0 <= m["padding_pct"] < 100
        assert m["images"] + m["skipped"] == MIN_SAMPLES  # every record read is delivered or skipped
    assert pipe["skipped"] >= len(DEMO_CORRUPT_KEYS)
    assert base["tokens_per_image"] == math.isqrt(max_tokens) ** 2
    assert 0 < pipe["tokens_per_image"] <= max_tokens
    assert result["ratio"]["images_per_s"] == pipe["images_per_s"] / base["images_per_s"]
    assert result["ratio"]["useful_tokens_per_s"] == pipe["useful_tokens_per_s"] / base["useful_tokens_per_s"]
    assert len(result["baseline"]["runs"]) == len(result["pipeline"]["runs"]) == 1
    json.dumps(result)  # JSON-able

    text = format_bench(result)
    assert f"pipeline / baseline: {result['ratio']['images_per_s']:.2f}x images/s" in text
    assert f"{result['ratio']['useful_tokens_per_s']:.2f}x useful tokens/s" in text


def test_medians_over_interleaved_repeats(shard: str) -> None:
    result = run_bench(_recipe(), shards=shard, repeats=2, max_images=3)
    for side in ("baseline", "pipeline"):
        runs = result[side]["runs"]
        assert len(runs) == 2
        assert result[side]["median"]["images_per_s"] == pytest.approx(np.median([r["images_per_s"] for r in runs]))
        assert all(r["images"] >= 3 for r in runs)
    assert result["baseline"]["median"]["images"] == 3  # the baseline stops exactly at max_images


def test_baseline_shapes(shard: str) -> None:
    recipe = _recipe(max_tokens=200)  # isqrt 14 -> a 224-pixel square of 196 tokens
    assert baseline_side(recipe) == 224
    n = baseline_batch_images(recipe)
    assert n == recipe.packing.rows * recipe.packing.seq_len // 196
    base = SquareBaseline(recipe, [shard])
    batches = list(base)
    assert all(p.shape == (n, 196, 16 * 16 * 3) and lab.shape == (n,) for p, lab in batches)
    assert sum(int((lab >= 0).sum()) for _, lab in batches) == base.images  # demo samples are labelled
    assert base.images + base.skipped == MIN_SAMPLES


def test_square_patches_raster_order() -> None:
    import io

    from PIL import Image

    arr = np.zeros((32, 32, 3), np.uint8)
    arr[:16, 16:] = 255  # top-right patch white
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, "PNG")
    patches = square_patches(buf.getvalue(), side=32, patch_size=16, resample="nearest")
    assert patches.shape == (4, 768)
    assert patches.max(axis=1).tolist() == [0, 255, 0, 0]


def test_ensure_demo_shards_only_for_demo_folder(tmp_path: Path) -> None:
    other = tmp_path / "elsewhere" / "demo-000000.tar"
    assert not ensure_demo_shards(str(other), demo_dir=tmp_path / "patchloom-demo", progress=False)
    assert not ensure_demo_shards(None, demo_dir=tmp_path / "patchloom-demo", progress=False)


def test_bench_command(shard: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "bench.json"
    rc = main(["bench", "pipeline", "--corpus", "demo", "--shards", shard, "--repeats", "1", "--max-images", "4",
               "--json", str(out), "--no-progress"])
    assert rc == 0
    assert "pipeline / baseline:" in capsys.readouterr().out
    assert json.loads(out.read_text())["repeats"] == 1
    assert main(["bench", "pipeline", "--corpus", "no-such-recipe.yaml", "--no-progress"]) == 2
    assert "no-such-recipe.yaml" in capsys.readouterr().err


def test_bench_takes_one_benchmark_and_its_own_options(capsys: pytest.CaptureFixture[str]) -> None:
    for argv in (["bench"],  # no benchmark named
                 ["bench", "pipeline", "--packing"],  # the old mode flags are gone: never a silent other mode
                 ["bench", "packing", "--shards", "x.tar"],  # packing reads no shard
                 ["bench", "drops", "--points", "3"],  # resume's option
                 ["bench", "workers", "--epochs", "1"],  # one cold epoch and no warm one
                 ["bench", "pipeline", "--repeats", "0"]):
        with pytest.raises(SystemExit) as exit_:
            main(argv)
        assert exit_.value.code == 2, argv
    assert "--points" in capsys.readouterr().err


def test_packing_and_soak_subcommands(shard: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "packing.json"
    assert main(["bench", "packing", "--corpus", "demo", "--images", "200", "--json", str(out), "--no-progress"]) == 0
    assert "lookahead" in capsys.readouterr().out
    assert json.loads(out.read_text())["images"] == 200
    assert main(["bench", "soak", "--corpus", "demo", "--shards", shard, "--images", "20", "--samples", "2",
                 "--json", str(out), "--no-progress"]) == 0
    assert "memory soak" in capsys.readouterr().out
    assert json.loads(out.read_text())["images"] >= 20


def test_corpus_names_and_recipe_files(shard: str, tmp_path: Path) -> None:
    demo = load_corpus("demo", data=tmp_path / "d", make=False)
    assert demo.recipe.fingerprint() == Recipe.from_dict(DEMO_RECIPE).fingerprint()
    assert demo.shards == str(tmp_path / "d" / "demo-{000000..000003}.tar") and demo.made_in is None
    path = tmp_path / "r.yaml"
    path.write_text(Recipe.from_dict({**DEMO_RECIPE, "seed": 5}).to_yaml())
    own = load_corpus(str(path), shards=shard)
    assert own.recipe.seed == 5 and own.shards == shard and own.made_in is None
    photos = load_corpus("photos", data=tmp_path / "p", make=False)
    assert photos.recipe.sizing.max_tokens == 196 and "photos-" in photos.shards
    assert not (tmp_path / "p").exists()  # make=False writes nothing


def test_tools_script_is_the_command(shard: str) -> None:
    import subprocess
    import sys

    out = subprocess.run([sys.executable, str(ROOT / "tools" / "bench.py"), "pipeline", "--corpus", "demo",
                          "--shards", shard, "--repeats", "1", "--max-images", "2", "--no-progress"],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert "pipeline / baseline:" in out.stdout


def test_drop_mode_bench_reports_every_mode(shard: str, capsys: pytest.CaptureFixture[str]) -> None:
    from patchloom.bench.drops import DROP_MODES

    assert main(["bench", "drops", "--corpus", "demo", "--shards", shard, "--repeats", "1",
                 "--max-images", "8", "--no-progress"]) == 0
    out = capsys.readouterr().out
    for name in DROP_MODES:
        assert name in out
    # Realised rates are real measurements: the fixed-rate random mode lands near 0.5.
    from patchloom.bench.drops import bench_drop_modes

    res = bench_drop_modes(Recipe.from_dict(DEMO_RECIPE), shards=shard, max_images=8, repeats=1)
    assert abs(res["modes"]["random 0.5"]["realised_mean"] - 0.5) < 0.02
    assert res["modes"]["random 0.5"]["us_per_image"] > 0


def test_resume_bench_measures_save_and_load(shard: str, capsys: pytest.CaptureFixture[str]) -> None:
    from patchloom.bench.resume import bench_resume

    recipe = Recipe.from_dict(DEMO_RECIPE).replace(packing={"rows": 1, "lookahead": 4})
    res = bench_resume(recipe, shards=shard, points=3)
    assert res["batches"] >= 2 and res["state_bytes_max"] > 0 and res["resume_first_batch_s"] > 0
    assert res["positions"][0] >= 1 and res["positions"][-1] <= res["batches"]
    path = Path(shard).parent / "one-row.yaml"
    path.write_text(recipe.to_yaml())
    assert main(["bench", "resume", "--corpus", str(path), "--shards", shard, "--points", "2", "--no-progress"]) == 0
    assert "state_dict()" in capsys.readouterr().out
