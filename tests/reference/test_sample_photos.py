"""Real photographs through patchloom.

Source: the sample images scikit-image ships in `skimage.data` (an open data set inside a
registry package, bundled with the package so no download is needed): astronaut, coffee,
chelsea, rocket, immunohistochemistry, hubble_deep_field (RGB) and camera, coins, moon
(grayscale). They are written as PNG members of a small webdataset-style tar shard
(`{key}.png` + `{key}.cls`) and read back through `patchloom.Pipeline`.

Expected values are computed without patchloom: the grid by brute force over every integer grid
under the rule the README states for budget mode (at least 85 % of max_tokens, the aspect closest
to the photo's; ties to more tokens, then the taller grid), the pixels with Pillow's own bicubic
resize (the filter the recipe names) cut into patches by plain numpy indexing.
"""

from __future__ import annotations

import io
import math
import tarfile

import numpy as np
import pytest
from PIL import Image

skdata = pytest.importorskip("skimage.data")

from patchloom import Pipeline, Recipe, image_to_patches  # noqa: E402

PHOTOS = [
    "astronaut",
    "coffee",
    "chelsea",
    "rocket",
    "immunohistochemistry",
    "hubble_deep_field",
    "camera",  # grayscale
    "coins",  # grayscale, not square
    "moon",  # grayscale
]

P, BUDGET = 16, 256


@pytest.fixture(scope="module")
def photos() -> dict[str, np.ndarray]:
    return {name: getattr(skdata, name)() for name in PHOTOS}


def _recipe(shards=None) -> Recipe:
    return Recipe.from_dict({
        "seed": 3,
        "source": {"shards": shards, "shuffle_shards": True, "shuffle_buffer": 4},
        "sizing": {"patch_size": P, "max_tokens": BUDGET, "resample": "bicubic"},
        "packing": {"seq_len": 512, "rows": 2, "lookahead": 3, "max_images_per_row": 4},
    })


def brute_best_grid(h: int, w: int, lo: int, hi: int) -> tuple[int, int]:
    """Among all grids with lo <= gh*gw <= hi, the one whose gh/gw is closest to h/w in log ratio;
    ties go to more tokens, then to the taller grid. Plain loops over every candidate."""
    best = None
    for gh in range(1, hi + 1):
        for gw in range(max(1, -(-lo // gh)), hi // gh + 1):
            key = (round(abs(math.log(gh / gw) - math.log(h / w)), 12), -gh * gw, -gh)
            if best is None or key < best[0]:
                best = (key, (gh, gw))
    assert best is not None
    return best[1]


def budget_grid(h: int, w: int, budget: int = BUDGET) -> tuple[int, int]:
    """The budget-mode grid: tokens in [ceil(0.85 * budget), budget] (integer arithmetic)."""
    return brute_best_grid(h, w, -(-85 * budget // 100), budget)


def reference_tokens(arr: np.ndarray, grid: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """(patches [N, P*P*3] in raster order, coords [N, 2]) of the photo resized by Pillow's bicubic
    filter to grid * P pixels; each patch flattened in (row, col, channel) order."""
    gh, gw = grid
    rgb = Image.fromarray(arr).convert("RGB")
    pixels = np.asarray(rgb.resize((gw * P, gh * P), Image.Resampling.BICUBIC))
    patches, coords = [], []
    for r in range(gh):
        for c in range(gw):
            patches.append(pixels[r * P:(r + 1) * P, c * P:(c + 1) * P].reshape(-1))
            coords.append((r, c))
    return np.stack(patches), np.array(coords)


def _write_shards(tmp_path, photos) -> list[str]:
    """Two tar shards, webdataset naming: `{key}.png` and `{key}.cls` next to each other."""
    names = list(photos)
    paths = []
    for s, chunk in enumerate((names[:5], names[5:])):
        path = tmp_path / f"photos-{s:03d}.tar"
        with tarfile.open(path, "w") as tar:
            for name in chunk:
                buf = io.BytesIO()
                Image.fromarray(photos[name]).save(buf, "PNG")
                for member, data in ((f"{name}.png", buf.getvalue()),
                                     (f"{name}.cls", str(PHOTOS.index(name)).encode())):
                    info = tarfile.TarInfo(member)
                    info.size = len(data)
                    tar.addfile(info, io.BytesIO(data))
        paths.append(str(path))
    return paths


def test_photos_are_the_expected_sample_images(photos):
    """Source: skimage.data (the shapes the bundled samples have)."""
    assert photos["astronaut"].shape == (512, 512, 3)
    assert photos["camera"].shape == (512, 512)
    assert photos["coffee"].shape == (400, 600, 3)
    assert photos["chelsea"].shape == (300, 451, 3)


@pytest.mark.parametrize("name", PHOTOS)
def test_image_to_patches_on_sample_photos(name, photos):
    """Source: skimage.data photos; the grid is the brute-force best one under the budget, the tokens
    are Pillow's bicubic resize of the photo, cut into patches."""
    arr = photos[name]
    h, w = arr.shape[:2]
    recipe = _recipe()
    ps = image_to_patches(arr, recipe, key=name)
    gh, gw = ps.grid
    assert (gh, gw) == budget_grid(h, w)
    assert ps.patches.shape == (gh * gw, P * P * 3) and ps.patches.dtype == np.uint8
    ref_patches, ref_coords = reference_tokens(arr, (gh, gw))
    np.testing.assert_array_equal(ps.patches, ref_patches)
    np.testing.assert_array_equal(ps.coords, ref_coords)
    assert 100 * gh * gw >= 85 * BUDGET and gh * gw <= BUDGET
    assert abs(math.log((gh / gw) / (h / w))) < 0.08  # aspect kept to within 8 %
    # Tokens carry the picture: the mean colour survives the resize closely.
    rgb = arr if arr.ndim == 3 else np.repeat(arr[..., None], 3, axis=2)
    mean_in = rgb.reshape(-1, 3).mean(axis=0)
    mean_out = ps.patches.reshape(-1, P * P, 3).mean(axis=(0, 1))
    np.testing.assert_allclose(mean_out, mean_in, atol=3.0)
    if arr.ndim == 2:  # grayscale becomes three equal channels
        t = ps.patches.reshape(-1, 3)
        assert (t[:, 0] == t[:, 1]).all() and (t[:, 1] == t[:, 2]).all()


def test_pipeline_over_a_shard_of_sample_photos(tmp_path, photos):
    """Source: skimage.data photos in a webdataset-style tar; every photo comes out exactly once,
    on the brute-force best grid, with the tokens of Pillow's bicubic resize."""
    shards = _write_shards(tmp_path, photos)
    recipe = _recipe(shards)
    pipe = Pipeline(recipe)
    seen: dict[str, int] = {}
    for batch in pipe:
        assert batch.patches.shape == (2, 512, P * P * 3)
        for r, row_keys in enumerate(batch.keys):
            for j, key in enumerate(row_keys):
                seen[key] = seen.get(key, 0) + 1
                arr = photos[key]
                h, w = arr.shape[:2]
                grid = budget_grid(h, w)
                assert tuple(int(v) for v in batch.grids[r, j]) == grid
                assert batch.labels[r, j] == PHOTOS.index(key)
                idx = np.flatnonzero(batch.segment_ids[r] == j + 1)
                ref_patches, ref_coords = reference_tokens(arr, grid)
                assert len(idx) == len(ref_patches) == grid[0] * grid[1]
                np.testing.assert_array_equal(batch.patches[r, idx], ref_patches)
                np.testing.assert_array_equal(batch.coords[r, idx], ref_coords)
    assert seen == {name: 1 for name in PHOTOS}
    ledger = pipe.ledger
    assert ledger.read == len(PHOTOS) and ledger.emitted == len(PHOTOS)
    assert not ledger.skipped and not ledger.shard_errors


def test_sampled_budgets_agree_between_pipeline_and_image_to_patches(tmp_path, photos):
    """Source: skimage.data photos. In `sampled` mode each photo's budget is drawn from its own
    (seed, epoch, key) generator, so the shard pipeline and image_to_patches agree per epoch (a
    consistency check between two routes); independently, each grid is the brute-force best grid of
    some budget in the sampled range, and the tokens are Pillow's resize to it."""
    shards = _write_shards(tmp_path, photos)
    recipe = Recipe.from_dict({
        "seed": 5,
        "source": {"shards": shards, "shuffle_buffer": 3},
        "sizing": {"mode": "sampled", "patch_size": P, "max_tokens": BUDGET, "sampled": {"range": [64, BUDGET]},
                   "resample": "bicubic"},
        "packing": {"seq_len": 512, "rows": 2, "lookahead": 4, "max_images_per_row": 4},
    })
    allowed = {name: {budget_grid(*photos[name].shape[:2], budget=b) for b in range(64, BUDGET + 1)}
               for name in PHOTOS}
    grids_by_epoch = []
    for epoch in (0, 1):
        grids = {}
        for batch in Pipeline(recipe, epoch=epoch):
            for r, row_keys in enumerate(batch.keys):
                for j, key in enumerate(row_keys):
                    ref = image_to_patches(photos[key], recipe, key=key, epoch=epoch)
                    assert tuple(int(v) for v in batch.grids[r, j]) == ref.grid
                    idx = np.flatnonzero(batch.segment_ids[r] == j + 1)
                    np.testing.assert_array_equal(batch.patches[r, idx], ref.patches)
                    assert ref.grid in allowed[key]
                    np.testing.assert_array_equal(ref.patches, reference_tokens(photos[key], ref.grid)[0])
                    grids[key] = ref.grid
        assert sorted(grids) == sorted(PHOTOS)
        grids_by_epoch.append(grids)
    assert grids_by_epoch[0] != grids_by_epoch[1]  # a new epoch draws new budgets
