from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from patchloom import Pipeline, Recipe, SampleError, image_to_patches
from patchloom.read import SourceError

from conftest import encode_png, make_shards, random_image, write_shard

BASE = {"sizing": {"patch_size": 8, "max_tokens": 64, "min_tokens": 4},
        "packing": {"seq_len": 128, "rows": 2, "max_images_per_row": 6, "lookahead": 8}}


def recipe(**over) -> Recipe:
    data = {k: dict(v) for k, v in BASE.items()}
    for section, values in over.items():
        if isinstance(values, dict):
            data.setdefault(section, {}).update(values)
        else:
            data[section] = values
    return Recipe.from_dict(data)


def tokens_by_key(pipe) -> dict[str, np.ndarray]:
    """Per-sample patches recovered from packed batches (segment by segment)."""
    out = {}
    for batch in pipe:
        for r, keys in enumerate(batch.keys):
            for j, key in enumerate(keys):
                sel = batch.segment_ids[r] == j + 1
                out[key] = batch.patches[r][sel].copy()
    return out


def test_every_sample_comes_out_once_with_its_label(shards):
    pipe = Pipeline(recipe(), shards)
    keys, labels = [], {}
    for batch in pipe:
        assert batch.patches.shape == (2, 128, 8 * 8 * 3)
        for r, row in enumerate(batch.keys):
            keys += row
            for j, k in enumerate(row):
                labels[k] = int(batch.labels[r, j])
    assert sorted(keys) == sorted(f"s{s:02d}-{i:04d}" for s in range(4) for i in range(12))
    assert all(labels[k] == int(k[-4:]) % 5 for k in keys)
    assert pipe.ledger.read == 48 and pipe.ledger.emitted == 48 and not pipe.ledger.skipped


def test_ledger_balances_at_every_step(tmp_path):
    paths = make_shards(tmp_path, 2, 10)
    pipe = Pipeline(recipe(source={"shuffle_buffer": 5}), paths)
    for _ in pipe:
        led = pipe.ledger
        assert led.read == led.emitted + len(led.skipped) + pipe.in_buffer
    assert pipe.in_buffer == 0


def _shard_with_bad_samples(tmp_path):
    rng = np.random.default_rng(0)
    good = encode_png(random_image(rng, 20, 30))
    samples = [("ok-1", {"png": good, "cls": b"1"}),
               ("broken", {"png": good[:40], "cls": b"2"}),
               ("no-image", {"txt": b"hello", "cls": b"3"}),
               ("bad-label", {"png": good, "cls": b"cat"}),
               ("ok-2", {"png": good, "cls": b"4"})]
    return str(write_shard(tmp_path / "mixed.tar", samples))


def test_skip_mode_records_shard_key_stage_reason(tmp_path):
    shard = _shard_with_bad_samples(tmp_path)
    pipe = Pipeline(recipe(), shard)
    keys = sorted(k for b in pipe for row in b.keys for k in row)
    assert keys == ["ok-1", "ok-2"]
    skipped = {s.key: s for s in pipe.ledger.skipped}
    assert set(skipped) == {"broken", "no-image", "bad-label"}
    assert skipped["broken"].stage == "decode" and skipped["broken"].shard == shard
    assert "no image member" in skipped["no-image"].reason and skipped["no-image"].stage == "select"
    assert "integer" in skipped["bad-label"].reason
    assert pipe.ledger.read == 5 == pipe.ledger.emitted + len(pipe.ledger.skipped)
    reasons = pipe.ledger.reasons()
    assert reasons["select: no image member"] == 1 and sum(reasons.values()) == 3
    assert pipe.ledger.examples()["select: no image member"] == ["no-image (mixed.tar)"]


def test_raise_mode_names_shard_key_stage_and_cause(tmp_path):
    shard = _shard_with_bad_samples(tmp_path)
    with pytest.raises(SampleError) as info:
        for _ in Pipeline(recipe(source={"on_error": "raise"}), shard):
            pass
    msg = str(info.value)
    assert "mixed.tar" in msg and "'broken'" in msg and "stage decode" in msg
    assert info.value.key == "broken"


def test_pixel_limit_skips_before_decode(tmp_path):
    rng = np.random.default_rng(1)
    shard = write_shard(tmp_path / "big.tar", [("big", {"png": encode_png(random_image(rng, 100, 100))}),
                                               ("small", {"png": encode_png(random_image(rng, 10, 10))})])
    pipe = Pipeline(recipe(decode={"pixel_limit": 5000}), str(shard))
    keys = [k for b in pipe for row in b.keys for k in row]
    assert keys == ["small"]
    assert "pixel_limit" in pipe.ledger.skipped[0].reason


def test_sample_tokens_do_not_depend_on_order_split_or_shuffle(tmp_path):
    paths = make_shards(tmp_path, 3, 8)
    r = recipe(sizing={"mode": "sampled", "sampled": {"range": [8, 64]}})
    ref = tokens_by_key(Pipeline(r, paths))
    shuffled = tokens_by_key(Pipeline(r.replace(source={"shuffle_buffer": 7}), paths))
    split = {}
    for rank in range(2):
        for worker in range(2):
            split.update(tokens_by_key(Pipeline(r, paths, rank=rank, world_size=2, worker=worker, num_workers=2)))
    assert ref.keys() == shuffled.keys() == split.keys()
    for k in ref:
        np.testing.assert_array_equal(ref[k], shuffled[k])
        np.testing.assert_array_equal(ref[k], split[k])
    # The sampled budgets really vary between images, and with the epoch.
    sizes = {len(v) for v in ref.values()}
    assert len(sizes) > 3
    other_epoch = tokens_by_key(Pipeline(r, paths, epoch=1))
    assert any(len(other_epoch[k]) != len(ref[k]) for k in ref)


def test_epochs_change_order_but_not_the_set(tmp_path):
    paths = make_shards(tmp_path, 4, 6)
    r = recipe(source={"shuffle_buffer": 10})
    pipe = Pipeline(r, paths)
    order0 = [k for b in pipe for row in b.keys for k in row]
    again = [k for b in pipe for row in b.keys for k in row]
    pipe.set_epoch(1)
    order1 = [k for b in pipe for row in b.keys for k in row]
    assert order0 == again
    assert order0 != order1 and sorted(order0) == sorted(order1)


def test_resume_mid_epoch_continues_identically(tmp_path):
    paths = make_shards(tmp_path, 2, 15)
    r = recipe(source={"shuffle_buffer": 6}, sizing={"mode": "sampled", "sampled": {"choices": [16, 36, 64]}})
    whole = Pipeline(r, paths, epoch=2)
    full, counts = [], []
    for b in whole:
        full.append(b)
        counts.append(whole.ledger.to_dict())
    assert len(full) > 3
    for k in (1, 3):
        pipe = Pipeline(r, paths, epoch=2)
        it = iter(pipe)
        for _ in range(k):
            next(it)
        state = pipe.state_dict()
        import json

        state = json.loads(json.dumps(state))  # JSON-able
        fresh = Pipeline(r, paths)
        fresh.load_state_dict(state)
        rest = []
        for b in fresh:
            rest.append(b)
            # the ledger carries on exactly: the same counts as the uninterrupted run after this batch
            assert fresh.ledger.to_dict() == counts[k + len(rest) - 1]
            assert fresh.ledger.read == fresh.ledger.emitted + fresh.ledger.skipped_count + fresh.in_buffer
        assert len(rest) == len(full) - k
        for a, b in zip(rest, full[k:]):
            assert a.keys == b.keys
            np.testing.assert_array_equal(a.patches, b.patches)
            np.testing.assert_array_equal(a.segment_ids, b.segment_ids)


def test_resume_refuses_other_recipe(tmp_path):
    paths = make_shards(tmp_path, 1, 3)
    state = Pipeline(recipe(), paths).state_dict()
    with pytest.raises(ValueError, match="different recipe"):
        Pipeline(recipe(seed=5), paths).load_state_dict(state)


def test_float_output_is_normalised(shards):
    r = recipe(output={"dtype": "float16", "mean": [0.5, 0.5, 0.5], "std": [0.25, 0.25, 0.25]})
    batch = next(iter(Pipeline(r, shards)))
    assert batch.patches.dtype == np.float16
    real = batch.patches[batch.segment_ids > 0].astype(np.float32)
    assert real.min() >= -2.0 - 1e-3 and real.max() <= 2.0 + 1e-3
    u8 = next(iter(Pipeline(recipe(), shards)))
    np.testing.assert_allclose(real, (u8.patches[u8.segment_ids > 0] / 255.0 - 0.5) / 0.25, atol=2e-3)


def test_image_to_patches_matches_the_pipeline(tmp_path):
    rng = np.random.default_rng(4)
    arr = random_image(rng, 37, 90)
    shard = write_shard(tmp_path / "one.tar", [("solo", {"png": encode_png(arr), "cls": b"3"})])
    r = recipe(seed=9, sizing={"mode": "sampled", "sampled": {"range": [10, 60]}})
    from_pipe = tokens_by_key(Pipeline(r, str(shard)))["solo"]
    direct = image_to_patches(arr, r, key="solo")
    np.testing.assert_array_equal(direct.patches, from_pipe)
    assert direct.patches.shape[0] == direct.grid[0] * direct.grid[1]
    from_pil = image_to_patches(Image.fromarray(arr), r, key="solo")
    np.testing.assert_array_equal(from_pil.patches, direct.patches)
    with pytest.raises(ValueError, match="HxWx3 uint8"):
        image_to_patches(arr.astype(np.float32), r)


def test_shards_override_and_missing_shards(tmp_path, shards):
    with pytest.raises(SourceError):
        Pipeline(recipe(source={"shards": str(tmp_path / "nope-{0..3}.tar")}))
    pipe = Pipeline(recipe(source={"shards": str(tmp_path / "nope.tar")}), shards=shards[:1])
    assert sum(b.num_images for b in pipe) == 12


def test_orientation_applied_before_sizing(tmp_path):
    arr = np.zeros((16, 48, 3), np.uint8)  # stored landscape
    img = Image.fromarray(arr)
    exif = Image.Exif()
    exif[0x0112] = 6  # displayed rotated: portrait
    buf = io.BytesIO()
    img.save(buf, format="JPEG", exif=exif.tobytes())
    shard = write_shard(tmp_path / "o.tar", [("rot", {"jpg": buf.getvalue()})])
    batch = next(iter(Pipeline(recipe(sizing={"mode": "native", "max_tokens": 64}), str(shard))))
    gh, gw = batch.grids[0, 0]
    assert (gh, gw) == (6, 2)  # 48x16 display -> 6 x 2 patches of 8


def test_core_runs_without_torch(shards):
    """torch is an optional extra: block its import and stream a pipeline in a fresh interpreter."""
    import subprocess
    import sys

    code = (
        "import sys; sys.modules['torch'] = None\n"
        "from patchloom import Pipeline, Recipe\n"
        f"p = Pipeline(Recipe.from_dict({BASE!r}), {shards!r})\n"
        "print(sum(b.num_images for b in p))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "48"


def test_shell_shards_need_the_callers_permission(tmp_path, shards):
    with pytest.raises(SourceError, match="allow_shell"):
        Pipeline(recipe(), f"pipe:cat {shards[0]}")
    # A recipe cannot grant it to itself: there is no such recipe key.
    from patchloom import RecipeError

    with pytest.raises(RecipeError, match="source.allow_shell: unknown key"):
        Recipe.from_dict({"source": {"allow_shell": True}})
    pipe = Pipeline(recipe(), f"pipe:cat {shards[0]}", allow_shell=True)
    assert sum(b.num_images for b in pipe) == 12


def test_observers_see_every_record_and_sample_and_change_nothing(tmp_path):
    paths = make_shards(tmp_path, 2, 10)
    r = recipe(source={"shuffle_buffer": 5})
    records, samples = [], []
    pipe = Pipeline(r, paths, on_record=records.append, on_sample=samples.append)
    keys = [k for b in pipe for row in b.keys for k in row]
    assert len(records) == pipe.ledger.read == 20
    assert sorted(rec.key for rec in records) == sorted(ps.key for ps in samples) == sorted(keys)
    assert all(ps.meta["shard"] in paths for ps in samples)
    assert keys == [k for b in Pipeline(r, paths) for row in b.keys for k in row]


def test_max_records_stops_the_reader_and_packs_what_was_read(tmp_path):
    paths = make_shards(tmp_path, 2, 10)
    seen = []
    pipe = Pipeline(recipe(source={"shuffle_buffer": 5}), paths, on_record=seen.append, max_records=7)
    keys = [k for b in pipe for row in b.keys for k in row]
    assert len(seen) == pipe.ledger.read == pipe.ledger.emitted == 7
    assert sorted(keys) == sorted(rec.key for rec in seen)
