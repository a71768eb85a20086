"""Several images per sample (source.images_per_sample: all): member order, one row per sample,
PackedBatch.groups, the per-image budget, oversize samples, per-image seeds, ledger, resume, ranks.

Images are identified by their content, not their key: every image of these shards is one flat
colour that encodes (sample, image), and a flat image stays exactly that colour after resizing.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from conftest import encode_png, write_shard

from patchloom import Pipeline, Recipe
from patchloom.image.chain import SampleError, find_images, process_record, process_sample
from patchloom.image.patches import PatchSet, grid_coords
from patchloom.packing.assign import ALGORITHMS, assign_rows
from patchloom.packing.packer import Packer, Sample, pack
from patchloom.read import Record, fetch_records, split_member_name
from patchloom.testing import check_resume

# Tar order of a sample's members is deliberately not their image order.
NAMES = ["10.png", "png", "2.png", "1.png", "3.png", "4.png", "5.png", "6.png", "7.png", "8.png", "9.png"]
ORDER = ["png", "1.png", "2.png", "3.png", "4.png", "5.png", "6.png", "7.png", "8.png", "9.png", "10.png"]


def colour(sample: int, image: int) -> tuple[int, int, int]:
    return (sample, 40 + image * 20, 255 - sample)


def flat_png(sample: int, image: int, h: int, w: int) -> bytes:
    return encode_png(np.broadcast_to(np.array(colour(sample, image), np.uint8), (h, w, 3)).copy())


def multi_shards(tmp_path, counts: list[list[int]], *, size=(24, 40)) -> list[str]:
    """Shards whose sample i has counts[s][j] flat images named in NAMES' tar order (image k is the
    k-th of ORDER), sizes varying per image, label i % 7."""
    paths, i = [], 0
    for s, shard in enumerate(counts):
        samples = []
        for n in shard:
            names = [name for name in NAMES if name in ORDER[:n]]
            members = {name: flat_png(i, ORDER.index(name), size[0] + 8 * ORDER.index(name), size[1]) for name in names}
            members["cls"] = str(i % 7).encode()
            samples.append((f"sample{i:03d}", members))
            i += 1
        paths.append(str(write_shard(tmp_path / f"multi-{s:02d}.tar", samples)))
    return paths


def recipe(shards=None, **over) -> Recipe:
    data = {"seed": 4, "source": {"shards": shards, "images_per_sample": "all", "shuffle_buffer": 5},
            "sizing": {"patch_size": 8, "max_tokens": 24, "min_tokens": 1},
            "packing": {"seq_len": 64, "rows": 3, "max_images_per_row": 6, "lookahead": 4}}
    for section, values in over.items():
        data.setdefault(section, {}).update(values)
    return Recipe.from_dict(data)


def identify(batch, row: int, seg: int) -> tuple[int, int]:
    """(sample, image) of a segment from its tokens' colour; every token must agree."""
    tokens = batch.patches[row, batch.segment_ids[row] == seg].reshape(-1, 3)
    first = tokens[0]
    assert (tokens == first).all(), "a flat image came out with more than one colour"
    return int(first[0]), (int(first[1]) - 40) // 20


COUNTS = [[1, 3, 2, 1, 4], [2, 1, 1, 3], [4, 1, 2]]


def check_batches(batches, counts) -> None:
    """Every image once; a sample's images adjacent in one row and in member order; groups number
    the row's samples 1, 2, ... and are shared by a sample's images; keys and labels per segment."""
    seen: dict[int, list[int]] = {}
    for b in batches:
        for r in range(b.rows):
            k = len(b.keys[r])
            segs = [identify(b, r, j) for j in range(1, k + 1)]
            runs: list[list[int]] = []  # segment indices of each sample, in row order
            for j, (sample, _) in enumerate(segs):
                if runs and segs[runs[-1][0]][0] == sample:
                    runs[-1].append(j)
                else:
                    runs.append([j])
            assert b.groups[r, k:].tolist() == [0] * (b.max_images - k)
            for g, run in enumerate(runs, 1):
                sample = segs[run[0]][0]
                assert sample not in seen, f"sample {sample} emitted twice or split over rows"
                seen[sample] = [segs[j][1] for j in run]
                assert [int(b.groups[r, j]) for j in run] == [g] * len(run)
                assert all(b.keys[r][j] == f"sample{sample:03d}" and b.labels[r, j] == sample % 7 for j in run)
    flat = [n for shard in counts for n in shard]
    assert seen == {i: list(range(n)) for i, n in enumerate(flat)}


# ----------------------------------------------------------------------------- members


def test_a_numbered_member_splits_into_key_and_numbered_extension():
    assert split_member_name("b.0.jpg") == ("b", "0.jpg")
    assert split_member_name("dir/b.10.PNG") == ("dir/b", "10.png")


def test_images_are_every_member_ending_in_an_image_key_in_numeric_order():
    members = {"10.jpg": b"j", "cls": b"1", "2.jpg": b"b", "jpg": b"a", "1.png": b"p", "json": b"{}",
               "left.jpg": b"l", "3.txt": b"t", "02.jpg": b"z"}
    rec = Record("k", "s.tar", 0, members)
    got = [ext for ext, _ in find_images(rec, ["jpg", "png"])]
    assert got == ["jpg", "left.jpg", "1.png", "02.jpg", "2.jpg", "10.jpg"]
    with pytest.raises(ValueError, match="source.image_keys"):
        find_images(Record("k", "s.tar", 0, {"cls": b"1"}), ["jpg"])


# ----------------------------------------------------------------------------- the pipeline


@pytest.mark.parametrize("algorithm", sorted(ALGORITHMS))
def test_every_image_once_adjacent_in_one_row_in_member_order(tmp_path, algorithm):
    shards = multi_shards(tmp_path, COUNTS)
    pipe = Pipeline(recipe(shards, packing={"algorithm": algorithm}))
    batches = list(pipe)
    check_batches(batches, COUNTS)
    assert {b.patches.shape for b in batches} == {(3, 64, 192)}
    assert {b.groups.shape for b in batches} == {(3, 6)} and {b.groups.dtype for b in batches} == {np.dtype(np.int32)}
    led = pipe.ledger
    samples, images = sum(map(len, COUNTS)), sum(map(sum, COUNTS))
    assert (led.read, led.emitted, led.images_emitted, led.skipped_count) == (samples, samples, images, 0)
    assert sum(b.num_samples for b in batches) == samples and sum(b.num_images for b in batches) == images


def test_member_order_is_numeric_not_tar_or_text_order(tmp_path):
    shards = multi_shards(tmp_path, [[11]])
    (batch,) = Pipeline(recipe(shards, sizing={"max_tokens": 4}, packing={"seq_len": 64, "max_images_per_row": 11,
                                                                           "rows": 1})).__iter__()
    assert [identify(batch, 0, j) for j in range(1, 12)] == [(0, i) for i in range(11)]
    assert batch.groups[0].tolist() == [1] * 11


def test_one_image_samples_have_groups_equal_to_the_segment_number(shards):
    for batch in Pipeline(Recipe.from_dict({"source": {"shards": shards}, "sizing": {"max_tokens": 32},
                                            "packing": {"seq_len": 64, "rows": 2, "max_images_per_row": 5}})):
        for r in range(batch.rows):
            k = len(batch.keys[r])
            assert batch.groups[r].tolist() == list(range(1, k + 1)) + [0] * (5 - k)


def test_each_image_is_planned_under_min_of_max_tokens_and_seq_len_over_n(tmp_path):
    shards = multi_shards(tmp_path, [[1, 2, 3, 4, 5]], size=(64, 80))
    for mode, extra in [("budget", {}), ("sampled", {"sampled": {"range": [10, 40]}}), ("native", {})]:
        r = recipe(shards, sizing={"max_tokens": 40, "mode": mode, **extra}, packing={"seq_len": 60})
        per_sample: dict[str, list] = {}
        for ps in Pipeline(r).samples():
            per_sample.setdefault(ps.key, []).append(ps)
        assert len(per_sample) == 5
        for images in per_sample.values():
            n = len(images)
            cap = min(40, 60 // n)
            assert all(ps.meta["images"] == n for ps in images) and [ps.meta["image"] for ps in images] == list(range(n))
            for ps in images:
                assert ps.num_tokens <= cap and ps.meta["plan"]["budget"] <= cap
                if mode == "budget":
                    assert ps.meta["plan"]["budget"] == cap and ps.num_tokens >= -(-85 * cap // 100)
            assert sum(ps.num_tokens for ps in images) <= 60


def test_samples_over_max_images_per_row_or_min_tokens_are_skipped_with_the_reason(tmp_path):
    shards = multi_shards(tmp_path, [[2, 5, 1, 4]])
    r = recipe(shards, sizing={"max_tokens": 24, "min_tokens": 12}, packing={"seq_len": 48, "max_images_per_row": 4})
    pipe = Pipeline(r)
    batches = list(pipe)
    kept = {k for b in batches for row in b.keys for k in row}
    assert kept == {"sample000", "sample002", "sample003"}  # 4 images get 48 // 4 = 12 tokens = min_tokens
    reasons = pipe.ledger.reasons()
    assert pipe.ledger.skipped_count == 1 and pipe.ledger.skipped[0].key == "sample001"
    assert any("more than packing.max_images_per_row=4" in k for k in reasons), reasons
    pipe = Pipeline(recipe(shards, sizing={"max_tokens": 24, "min_tokens": 13},
                           packing={"seq_len": 48, "max_images_per_row": 5}))
    list(pipe)
    skipped = {s.key: s for s in pipe.ledger.skipped}
    assert set(skipped) == {"sample001", "sample003"}
    assert skipped["sample003"].stage == "select" and "min_tokens" in skipped["sample003"].reason
    assert "seq_len // 4) = 12 tokens" in skipped["sample003"].reason
    with pytest.raises(SampleError, match="sample001.*more than packing.max_images_per_row=4"):
        list(Pipeline(r.replace(source={"on_error": "raise"})))


def test_a_broken_image_fails_its_whole_sample_naming_the_member(tmp_path):
    good = flat_png(0, 0, 16, 16)
    path = write_shard(tmp_path / "b.tar", [("a", {"0.png": good, "1.png": b"not a png"}), ("b", {"png": good})])
    pipe = Pipeline(recipe(str(path)))
    out = [k for batch in pipe for row in batch.keys for k in row]
    assert out == ["b"]
    (skip,) = pipe.ledger.skipped
    assert skip.key == "a" and skip.reason.endswith("(image 1: 1.png)")
    assert "(image" not in next(iter(pipe.ledger.reasons()))  # counted under the cause itself


def test_images_draw_with_their_own_seeds_and_a_first_image_as_before(tmp_path):
    rng = np.random.default_rng(3)
    pixels = encode_png(rng.integers(0, 256, (48, 64, 3), dtype=np.uint8))
    path = write_shard(tmp_path / "s.tar", [("twin", {"0.png": pixels, "1.png": pixels}), ("solo", {"png": pixels})])
    over = {"crop": {"mode": "random"}, "drop": {"mode": "random", "rate": 0.5},
            "sizing": {"max_tokens": 32, "mode": "sampled", "sampled": {"range": [8, 32]}}}
    r_all = recipe(str(path), **over)
    r_one = recipe(str(path), **over, source={"images_per_sample": "one"})
    recs = {rec.key: rec for rec in fetch_records([(str(path), 0), (str(path), 1)])}
    a, b = process_sample(recs["twin"], r_all, 0)
    assert not (a.grid == b.grid and np.array_equal(a.coords, b.coords)), "the two images drew the same"
    # a one-image sample draws exactly as with images_per_sample: one (index 0 keeps the old seeds)
    (solo_all,) = process_sample(recs["solo"], r_all, 0)
    solo_one = process_record(recs["solo"], r_one, 0)
    assert np.array_equal(solo_all.patches, solo_one.patches) and np.array_equal(solo_all.coords, solo_one.coords)
    # process_record(image=i) is image i of process_sample
    assert np.array_equal(process_record(recs["twin"], r_all, 0, image=1).patches, b.patches)


def test_resume_is_exact_with_multi_image_samples(tmp_path):
    shards = multi_shards(tmp_path, COUNTS)
    r = recipe(shards, drop={"mode": "random", "rate": 0.3}, crop={"mode": "random"},
               packing={"lookahead": 3, "rows": 2})
    report = check_resume(lambda: Pipeline(r, shards))
    assert report.batches >= 3 and report.positions == list(range(report.batches + 1))
    state = Pipeline(r, shards)
    it = iter(state)
    next(it)
    saved = state.state_dict()
    assert all(len(entry) == 3 for entry in saved["packer"]["pending"])  # one reference per sample
    assert json.loads(json.dumps(saved))["ledger"]["images_emitted"] == state.ledger.images_emitted
    resumed = Pipeline(r, shards)
    resumed.load_state_dict(json.loads(json.dumps(saved)))
    list(resumed)
    assert (resumed.ledger.emitted, resumed.ledger.images_emitted) == (sum(map(len, COUNTS)), sum(map(sum, COUNTS)))


def test_ranks_split_samples_whole_and_the_ledgers_count_images(tmp_path):
    shards = multi_shards(tmp_path, COUNTS)
    r = recipe(shards)
    batches, emitted, images = [], 0, 0
    for rank in range(2):
        pipe = Pipeline(r, rank=rank, world_size=2)
        batches += list(pipe)
        emitted += pipe.ledger.emitted
        images += pipe.ledger.images_emitted
    check_batches(batches, COUNTS)
    assert (emitted, images) == (sum(map(len, COUNTS)), sum(map(sum, COUNTS)))


# ----------------------------------------------------------------------------- the packer


def ps(n: int, key: str) -> PatchSet:
    return PatchSet(np.full((n, 3), len(key), np.uint8), grid_coords(1, n), (1, n), key)


def test_pack_puts_a_sample_list_in_one_row_with_one_group():
    batch = pack([[ps(2, "a"), ps(3, "a")], ps(4, "b"), Sample((ps(1, "c"), ps(1, "c"), ps(1, "c")))], seq_len=16)
    assert batch.keys == [["a", "a", "b", "c", "c", "c"]]
    assert batch.groups.tolist() == [[1, 1, 2, 3, 3, 3]] and batch.num_samples == 3 and batch.num_images == 6
    assert batch.to_torch()["groups"].tolist() == [[1, 1, 2, 3, 3, 3]] and "groups" in batch.to_arrays()
    assert batch.segment_ids[0].tolist() == [1, 1, 2, 2, 2, 3, 3, 3, 3, 4, 5, 6, 0, 0, 0, 0]


def test_the_packer_never_splits_a_sample_and_carries_it_whole():
    packer = Packer(seq_len=10, rows=1, max_images_per_row=3, buffer=2, algorithm="first_fit")
    out = packer.push(ps(6, "a")) + packer.push([ps(3, "b"), ps(3, "b")])
    assert [b.keys for b in out] == [[["a"]]]
    assert len(packer.pending) == 1 and packer.pending[0].key == "b" and packer.pending[0].num_tokens == 6
    (rest,) = list(packer.flush())
    assert rest.keys == [["b", "b"]] and rest.groups.tolist() == [[1, 1, 0]]
    with pytest.raises(ValueError, match="max_images_per_row"):
        packer.push([ps(1, "c")] * 4)


@pytest.mark.parametrize("algorithm", sorted(ALGORITHMS))
def test_image_counts_count_against_max_images_per_row(algorithm):
    counts = [3, 1, 2, 3, 1, 1, 2]
    rows, left = assign_rows([2] * len(counts), seq_len=100, rows=None, max_images_per_row=4, algorithm=algorithm,
                             counts=counts)
    assert left == [] and sorted(i for r in rows for i in r) == list(range(len(counts)))
    assert all(sum(counts[i] for i in r) <= 4 for r in rows)
    with pytest.raises(ValueError, match="max_images_per_row"):
        assign_rows([1], seq_len=10, rows=1, max_images_per_row=2, counts=[3])


def test_demo_multi_view_samples_come_out_whole_with_the_merge2_recipe(demo_dir):
    import tarfile
    from pathlib import Path

    from patchloom.demo.data import demo_shard_pattern

    views: dict[str, int] = {}
    for path in sorted(demo_dir.glob("demo-*.tar")):
        with tarfile.open(path) as tar:
            for name in tar.getnames():
                key, ext = name.split(".", 1)
                views[key] = views.get(key, 0) + (ext.split(".")[-1] in ("jpg", "png", "gif", "webp", "bmp", "tiff"))
    assert max(views.values()) >= 2  # the demo has multi-view samples
    recipe = Recipe.from_file(Path(__file__).parent.parent / "recipes" / "merge2-windows.yaml")
    pipe = Pipeline(recipe, shards=demo_shard_pattern(demo_dir))
    got: dict[str, int] = {}
    for batch in pipe:
        for r in range(batch.rows):
            keys, groups = batch.keys[r], batch.groups[r].tolist()
            for j, key in enumerate(keys):
                assert key not in got or (j > 0 and keys[j - 1] == key), f"{key} is split"
                assert (groups[j] == groups[j - 1]) == (j > 0 and keys[j - 1] == key)
                got[key] = got.get(key, 0) + 1
            assert all(g % 2 == 0 for g in batch.grids[r, : len(keys)].reshape(-1).tolist())
    skipped = {s.key for s in pipe.ledger.skipped}
    assert got == {k: n for k, n in views.items() if k not in skipped}
    assert pipe.ledger.images_emitted == sum(got.values()) > pipe.ledger.emitted == len(got)


def test_the_report_shows_a_samples_images_side_by_side_with_their_group():
    from patchloom.report import render

    def img(key: str) -> PatchSet:
        return PatchSet(np.full((4, 12), 200, np.uint8), grid_coords(2, 2), (2, 2), key)

    grouped = pack([[img("a"), img("a")], img("b")], seq_len=16)
    items = render.reconstruct_row(grouped, 0, 2)
    assert [it.group for it in items] == [1, 1, 2]
    assert render.group_note(items, items[1]) == ", image 2 of 2 of group 1" and render.group_note(items, items[2]) == ""
    apart = pack([img("a"), img("a"), img("b")], seq_len=16)
    black = lambda pic: int((pic == 0).all(axis=2).sum())  # noqa: E731 - the group frame is black
    assert black(render.row_picture(grouped, 0, 2)[0]) > 0 == black(render.row_picture(apart, 0, 2)[0])


def test_the_run_summary_says_samples_and_images_when_they_differ():
    from patchloom.summary import RunStats, format_table

    base = {"read": 3, "emitted": 3, "skipped": 0, "in_buffer": 0}
    assert "3 samples, 7 images" in format_table(RunStats(), {**base, "images_emitted": 7})
    assert "samples" not in format_table(RunStats(), {**base, "images_emitted": 3})


def test_groups_survive_pack_read_packed_and_verify(tmp_path):
    """A packed folder of multi-image samples stores groups.npy; read_packed gives back the live
    pipeline's groups, verify passes, and tampered groups are refused naming the file."""
    import io
    import tarfile

    from patchloom.store import StoreError, pack_to_dir, read_packed, verify_dir

    shards = multi_shards(tmp_path, [[1, 3, 2, 1, 2], [2, 1, 3]])
    r = recipe(shards)
    live = list(Pipeline(r))
    assert any(np.any(np.diff(b.groups, axis=1)[b.grids[:, 1:, 0] > 0] == 0) for b in live)  # shared groups
    out = tmp_path / "packed"
    pack_to_dir(r, out, workers=1, progress=False)
    back = list(read_packed(out, shuffle=False))
    assert len(back) == len(live)
    for a, b in zip(live, back):
        np.testing.assert_array_equal(a.groups, b.groups)
        assert a.keys == b.keys
    assert verify_dir(out, progress=False).ok

    shard = sorted(out.glob("*.tar"))[0]
    with tarfile.open(shard) as tar:
        members = [(m, tar.extractfile(m).read()) for m in tar.getmembers()]
    name = next(m.name for m, _ in members if m.name.endswith("groups.npy"))
    bad = io.BytesIO()
    np.save(bad, np.full(live[0].groups.shape, 3, np.int32))
    with tarfile.open(shard, "w") as tar:
        for m, data in members:
            data = bad.getvalue() if m.name == name else data
            m.size = len(data)
            tar.addfile(m, io.BytesIO(data))
    with pytest.raises(StoreError, match=r"groups\.npy does not number"):  # the check, not the hash
        list(read_packed(out, shuffle=False, check_hashes=False))
