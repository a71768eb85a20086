"""Parquet files as a source: rows become the Records tar shards give (image, label, caption, key),
read row group by row group with only the needed columns; row groups spread one file over many
readers; resume, errors, memory, pack/verify."""

from __future__ import annotations

import json
import sys
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

pa = pytest.importorskip("pyarrow")  # the `parquet` extra; the README's test command installs it
pq = pytest.importorskip("pyarrow.parquet")

from patchloom import Pipeline, Recipe  # noqa: E402
from patchloom.extras import MissingExtraError  # noqa: E402
from patchloom.image.chain import SampleError  # noqa: E402
from patchloom.read import (  # noqa: E402
    Fields,
    ReaderCursor,
    ShardError,
    ShardTask,
    ShuffleBuffer,
    expand_shards,
    read_task,
    read_tasks,
    reader_tasks,
)
from patchloom.seeding import stream_rng  # noqa: E402
from patchloom.store import pack_to_dir, read_packed, verify_dir  # noqa: E402
from patchloom.testing import batches_equal, check_resume  # noqa: E402

from conftest import encode_png, labels_texts, make_shards, random_image  # noqa: E402

pytestmark = pytest.mark.filterwarnings("ignore:.* shards for .* readers")
BASE = {
    "seed": 4,
    "source": {"image_keys": ["image"], "label_key": "label", "text_key": "caption", "shuffle_buffer": 4},
    "sizing": {"patch_size": 8, "max_tokens": 16, "min_tokens": 1},
    "packing": {"seq_len": 64, "rows": 2, "max_images_per_row": 6, "lookahead": 4},
}
FIELDS = Fields(("image",), "label", "caption")


def _png(rng: np.random.Generator) -> bytes:
    h, w = (int(v) for v in rng.integers(8, 40, size=2))
    return encode_png(random_image(rng, h, w))


def write_parquet(path: Path, n: int, *, seed: int, struct: bool = False, keys: bool = False,
                  row_group: int = 3, prefix: str = "") -> dict[str, dict]:
    """n rows (image, label, caption[, __key__]) in row groups of `row_group`; returns key -> row."""
    rng = np.random.default_rng(seed)
    images = [_png(rng) for _ in range(n)]
    labels = [int(v) for v in rng.integers(0, 7, size=n)]
    captions = [f"{prefix}caption {i} of {path.stem}" for i in range(n)]
    cols: dict = {"label": pa.array(labels, pa.int64()), "caption": pa.array(captions)}
    if struct:
        cols["image"] = pa.array([{"bytes": b, "path": f"img{i}.png"} for i, b in enumerate(images)],
                                 pa.struct([("bytes", pa.binary()), ("path", pa.string())]))
    else:
        cols["image"] = pa.array(images, pa.binary())
    names = [f"{prefix}k{i:03d}" for i in range(n)] if keys else [f"{path.stem}/{i}" for i in range(n)]
    if keys:
        cols["__key__"] = pa.array(names)
    pq.write_table(pa.table(cols), path, row_group_size=row_group)
    return {k: {"image": images[i], "label": labels[i], "caption": captions[i]} for i, k in enumerate(names)}


@pytest.fixture
def two_files(tmp_path) -> tuple[list[str], dict[str, dict]]:
    """A file with a binary image column and `__key__`, one with a struct image column and no key."""
    a, b = tmp_path / "alpha.parquet", tmp_path / "beta.parquet"
    rows = write_parquet(a, 10, seed=1, keys=True, row_group=4)
    rows.update(write_parquet(b, 11, seed=2, struct=True, row_group=3))
    return [str(a), str(b)], rows


def test_records_carry_image_label_caption_and_key(two_files):
    paths, rows = two_files
    recs = [r for p in paths for r in read_task(ShardTask(p), fields=FIELDS)]
    assert [r.key for r in recs] == list(rows)
    for r in recs:
        want = rows[r.key]
        assert r.error is None
        assert r.members == {"image": want["image"], "label": str(want["label"]).encode(),
                             "caption": want["caption"].encode()}
    assert [r.index for r in recs if r.url == paths[1]] == list(range(11))  # row index in the file


def test_pipeline_labels_and_captions_right_for_every_key(two_files, tmp_path):
    paths, rows = two_files
    tar = make_shards(tmp_path, 1, 4)  # tar shards and Parquet files mix in one spec
    recipe = Recipe.from_dict({**BASE, "source": {**BASE["source"], "image_keys": ["image", "png"],
                                                  "label_key": "label"}})
    got = labels_texts(Pipeline(recipe, shards=[paths[0], tar[0], paths[1]]))
    assert {k: v for k, v in got.items() if k in rows} == {k: (r["label"], r["caption"]) for k, r in rows.items()}
    assert len(got) == len(rows) + 4  # and the tar's samples


def test_json_field_label_from_a_string_column(tmp_path):
    rng = np.random.default_rng(3)
    path = tmp_path / "meta.parquet"
    pq.write_table(pa.table({"image": [_png(rng) for _ in range(4)],
                             "meta": [json.dumps({"cls": i * 2, "note": "x"}) for i in range(4)]}), path)
    recipe = Recipe.from_dict({**BASE, "source": {"image_keys": ["image"], "label_key": "meta:cls"}})
    got = labels_texts(Pipeline(recipe, shards=str(path)))
    assert {k: v[0] for k, v in got.items()} == {f"meta/{i}": i * 2 for i in range(4)}


def test_only_the_needed_columns_are_read(tmp_path):
    rng = np.random.default_rng(5)
    path = tmp_path / "wide.parquet"
    pq.write_table(pa.table({"image": [_png(rng) for _ in range(3)], "label": [1, 2, 3],
                             "huge": [b"x" * 10_000] * 3, "other": ["o"] * 3}), path)
    recs = list(read_task(ShardTask(str(path)), fields=Fields(("image",), "label", None)))
    assert all(set(r.members) == {"image", "label"} for r in recs)


@pytest.mark.parametrize("world_size", [2, 3, 5])
def test_ranks_read_disjoint_and_complete_shares(two_files, world_size):
    paths, rows = two_files
    recipe = Recipe.from_dict(BASE)
    seen: Counter = Counter()
    per_rank = []
    for rank in range(world_size):
        keys = labels_texts(Pipeline(recipe, shards=paths, rank=rank, world_size=world_size))
        seen.update(list(keys))
        per_rank.append(len(keys))
    assert seen == Counter(dict.fromkeys(rows, 1))  # every row once, across all ranks
    assert min(per_rank) > 0  # with fewer files than ranks, row groups spread the files over all of them


def test_one_file_is_split_by_row_groups(tmp_path):
    path = tmp_path / "one.parquet"
    write_parquet(path, 18, seed=6, row_group=3)  # 6 row groups
    groups = []
    for slot in range(3):
        tasks = reader_tasks([str(path)], seed=0, epoch=0, rank=slot, world_size=3)
        assert all(t.unit >= 0 and t.parts == 1 for t in tasks)
        idx = sorted(r.index for r in read_tasks(tasks, fields=FIELDS))
        groups.append({i // 3 for i in idx})
        assert len(idx) == 3 * len(groups[-1])  # whole row groups, not every k-th row
    assert sorted(g for s in groups for g in s) == list(range(6))


def test_resume_mid_row_group_with_the_cursor(tmp_path):
    path = tmp_path / "rg.parquet"
    write_parquet(path, 12, seed=7, row_group=5)
    tasks = [ShardTask(str(path), unit=1), ShardTask(str(path), unit=0), ShardTask(str(path), unit=2)]
    whole = [r.key for r in ReaderCursor(tasks, fields=FIELDS)]
    cur = ReaderCursor(tasks, fields=FIELDS)
    it = iter(cur)
    head = [next(it).key for _ in range(3)]
    state = json.loads(json.dumps(cur.state_dict()))
    assert state["task"] == 0 and state["index"] == 8  # file, row group (task 0 = unit 1), row in the file
    again = ReaderCursor(tasks, fields=FIELDS)
    again.load_state_dict(state)
    assert head + [r.key for r in again] == whole and len(whole) == 12


@pytest.mark.parametrize(("world_size", "buffer"), [(1, 4), (3, 4), (3, 0)])
def test_exact_resume_mid_epoch(two_files, world_size, buffer):
    paths, _ = two_files
    recipe = Recipe.from_dict({**BASE, "source": {**BASE["source"], "shuffle_buffer": buffer},
                               "packing": {"seq_len": 32, "rows": 1, "max_images_per_row": 2, "lookahead": 3}})
    make = lambda: Pipeline(recipe, shards=paths, rank=world_size - 1, world_size=world_size)  # noqa: E731
    report = check_resume(make)
    assert report.batches >= 2
    # Some of the positions it resumed from were inside a row group (alpha: groups of 4, beta: of 3).
    pipe, inside = make(), 0
    for _ in pipe:
        reader = pipe.state_dict()["reader"]
        if reader["task"] < len(pipe._cursor.tasks) and not reader["done"]:
            url = pipe._cursor.tasks[reader["task"]].url
            inside += reader["index"] % (4 if url.endswith("alpha.parquet") else 3) != 0
    assert inside > 0 or buffer > 0  # (a buffer reads ahead: its positions may all fall on group ends)


def test_state_is_small_and_names_rows_not_bytes(two_files):
    paths, _ = two_files
    pipe = Pipeline(Recipe.from_dict(BASE), shards=paths)
    it = iter(pipe)
    next(it)
    state = pipe.state_dict()
    assert set(state["reader"]) == {"pass", "task", "index", "count", "done"}
    assert all(isinstance(ref[0], str) and isinstance(ref[1], int) for ref in state["shuffle"]["held"])
    assert len(json.dumps(state)) < 4096


def test_null_image_cell_is_a_skip_naming_file_row_and_reason(tmp_path):
    rng = np.random.default_rng(8)
    flat, nested = tmp_path / "flat.parquet", tmp_path / "nested.parquet"
    images = [_png(rng) for _ in range(6)]
    pq.write_table(pa.table({"image": pa.array(images[:4] + [None] + images[5:], pa.binary())}), flat,
                   row_group_size=2)
    cells = [{"bytes": b, "path": None} for b in images]
    cells[2] = {"bytes": None, "path": "elsewhere/cat.jpg"}
    pq.write_table(pa.table({"image": pa.array(cells, pa.struct([("bytes", pa.binary()), ("path", pa.string())]))}),
                   nested)
    recipe = Recipe.from_dict({**BASE, "source": {"image_keys": ["image"], "label_key": None, "max_skip_ratio": 0.5}})
    pipe = Pipeline(recipe, shards=[str(flat), str(nested)])
    emitted = labels_texts(pipe)
    skips = {s.key: s for s in pipe.ledger.skipped}
    assert set(skips) == {"flat/4", "nested/2"} and len(emitted) == 10
    assert skips["flat/4"].shard == str(flat)
    assert "null" in skips["flat/4"].reason and "row 4 (row group 2)" in skips["flat/4"].reason
    assert "no bytes" in skips["nested/2"].reason and "elsewhere/cat.jpg" in skips["nested/2"].reason
    assert "row 2" in skips["nested/2"].reason
    raising = Recipe.from_dict({**BASE, "source": {"image_keys": ["image"], "label_key": None, "on_error": "raise"}})
    with pytest.raises(SampleError, match=r"flat\.parquet.*'flat/4'.*null"):
        list(Pipeline(raising, shards=str(flat)))


def _corrupt_row_group(path: Path, group: int) -> None:
    """Overwrite the first page header of a row group's first column with junk bytes."""
    md = pq.ParquetFile(path).metadata
    offset = md.row_group(group).column(0).data_page_offset
    data = bytearray(path.read_bytes())
    data[offset:offset + 24] = b"\xff" * 24
    path.write_bytes(bytes(data))


def test_corrupt_files_are_shard_errors_naming_file_and_row_group(tmp_path):
    damaged = tmp_path / "damaged.parquet"
    write_parquet(damaged, 9, seed=9, row_group=3)
    _corrupt_row_group(damaged, 1)
    got = []
    with pytest.raises(ShardError) as info:
        for rec in read_task(ShardTask(str(damaged)), fields=FIELDS):
            got.append(rec.index)
    assert got == [0, 1, 2]  # the rows before the damage came out
    assert str(damaged) in str(info.value) and "row group 1 (rows 3..5)" in str(info.value)

    garbage = tmp_path / "garbage.parquet"
    garbage.write_bytes(b"PAR1 this is not a parquet file at all" * 10)
    with pytest.raises(ShardError, match=r"garbage\.parquet.*footer"):
        list(read_task(ShardTask(str(garbage)), fields=FIELDS))

    good = tmp_path / "good.parquet"
    write_parquet(good, 20, seed=10, row_group=5)
    recipe = Recipe.from_dict({**BASE, "source": {**BASE["source"], "max_skip_ratio": 0.9}})
    pipe = Pipeline(recipe, shards=[str(damaged), str(good)])
    assert len(labels_texts(pipe)) == 20 + 3
    failed = pipe.ledger.to_dict()["shard_errors"]
    assert len(failed) == 1 and failed[0].startswith(str(damaged)) and "row group 1" in failed[0]


def test_missing_image_column_says_what_to_set(tmp_path):
    path = tmp_path / "cols.parquet"
    pq.write_table(pa.table({"picture": [b"x"], "label": [1]}), path)
    with pytest.raises(ShardError, match=r"cols\.parquet.*none of the image columns image.*picture.*source\.image_keys"):
        list(read_task(ShardTask(str(path)), fields=FIELDS))


def test_oversized_row_is_judged_before_it_is_copied(tmp_path):
    path = tmp_path / "big.parquet"
    pq.write_table(pa.table({"image": [b"a" * 100, b"b" * 5000, b"c" * 100]}), path)
    recs = list(read_task(ShardTask(str(path)), fields=Fields(("image",)), max_sample_bytes=1000))
    assert [r.error is None for r in recs] == [True, False, True]
    assert "5000 bytes" in recs[1].error and "max_sample_bytes=1000" in recs[1].error and recs[1].members == {}


def test_memory_stays_within_a_row_group_plus_the_shuffle_buffer(tmp_path):
    rng = np.random.default_rng(11)
    rows, per_group, cell = 128, 16, 32 * 1024
    path = tmp_path / "large.parquet"
    pq.write_table(pa.table({"image": [rng.bytes(cell) for _ in range(rows)], "label": list(range(rows))}),
                   path, row_group_size=per_group, compression="none")
    group_bytes = per_group * cell
    base = pa.total_allocated_bytes()
    peak, held = 0, 0
    buffer = ShuffleBuffer(8, stream_rng(0, 0, "t"))
    count = 0
    for _ in buffer(read_tasks([ShardTask(str(path))], fields=Fields(("image",), "label"))):
        peak = max(peak, pa.total_allocated_bytes() - base)
        held = max(held, len(buffer.held))
        count += 1
    assert count == rows and held <= 8
    assert peak <= 3 * group_bytes < rows * cell // 2  # not the whole file (8 row groups)
    table = pq.read_table(path)  # the measure does see Arrow's memory: reading it whole takes it all
    assert pa.total_allocated_bytes() - base >= rows * cell
    del table


def test_missing_pyarrow_is_one_line_naming_the_extra(tmp_path, monkeypatch):
    path = tmp_path / "x.parquet"
    path.write_bytes(b"")
    monkeypatch.setitem(sys.modules, "pyarrow", None)  # as if not installed (restored after the test)
    monkeypatch.delitem(sys.modules, "pyarrow.parquet", raising=False)
    with pytest.raises(MissingExtraError) as info:
        expand_shards(str(path))
    assert "patchloom[parquet]" in str(info.value) and "\n" not in str(info.value)


def test_pack_reads_back_as_the_live_pipeline_and_verify_notices_a_changed_file(two_files, tmp_path):
    paths, _ = two_files
    recipe = Recipe.from_dict(BASE)
    out = tmp_path / "packed"
    man = pack_to_dir(recipe, out, shards=paths, progress=False, max_batches_per_shard=2)
    assert [i["path"] for i in man["inputs"]] == paths
    live = list(Pipeline(recipe, shards=paths))
    back = list(read_packed(out, shuffle=False))
    assert len(back) == len(live) > 1
    assert all(batches_equal(a, b) is None for a, b in zip(back, live))
    assert verify_dir(out, progress=False).ok
    write_parquet(Path(paths[1]), 11, seed=2, struct=True, row_group=3, prefix="new ")  # captions changed
    res = verify_dir(out, progress=False)
    assert not res.ok and any("beta.parquet changed since packing" in m for m in res.messages)


def test_equalized_epoch_tops_up_from_row_groups(two_files):
    paths, rows = two_files
    recipe = Recipe.from_dict({**BASE, "epoch": {"batches": 3, "equalize": True},
                               "packing": {"seq_len": 32, "rows": 1, "max_images_per_row": 2, "lookahead": 3}})
    repeated = 0
    for rank in range(5):
        pipe = Pipeline(recipe, shards=paths, rank=rank, world_size=5)
        batches = list(pipe)
        assert len(batches) == 3  # every rank the same count, though shares differ (21 rows, 7 row groups)
        assert all(k in rows for b in batches for keys in b.keys for k in keys)
        repeated += pipe.ledger.repeated
    assert repeated > 0
    check_resume(lambda: Pipeline(recipe, shards=paths, rank=4, world_size=5))


# --- several images per row (source.images_per_sample: all) ----------------------------------------------


def _groups_by_key(batches) -> dict[str, int]:
    """key -> how many images of that sample were packed (all of one sample sit in one row)."""
    out: Counter = Counter()
    for b in batches:
        for r, keys in enumerate(b.keys):
            groups = b.groups[r].tolist()
            for j, key in enumerate(keys):
                out[key] += 1
                if j:  # a sample's images are adjacent and share a group number
                    assert (groups[j] == groups[j - 1]) == (keys[j - 1] == key)
    return dict(out)


@pytest.mark.filterwarnings("ignore:.*has no column 'label'")  # nested.parquet has none, on purpose
def test_a_list_column_and_several_image_columns_are_one_sample_each(tmp_path):
    """A row's images: every element of a list column (binary or struct cells) and every other image
    column, in image_keys order; each comes out once, in one row, as one group."""
    rng = np.random.default_rng(12)
    views = [[_png(rng) for _ in range(k)] for k in (3, 1, 2, 4, 2, 1)]
    extra = [_png(rng) if i % 2 == 0 else None for i in range(6)]  # a second column, null in odd rows
    struct = pa.struct([("bytes", pa.binary()), ("path", pa.string())])
    lists, nested = tmp_path / "lists.parquet", tmp_path / "nested.parquet"
    pq.write_table(pa.table({"views": pa.array(views, pa.list_(pa.binary())), "cover": pa.array(extra, pa.binary()),
                             "label": pa.array(range(6), pa.int64())}), lists, row_group_size=4)
    pq.write_table(pa.table({"views": pa.array([[{"bytes": b, "path": "x.png"} for b in v] for v in views],
                                               pa.list_(struct))}), nested)
    data = {**BASE, "source": {"image_keys": ["views", "cover"], "label_key": "label", "images_per_sample": "all",
                               "shuffle_buffer": 4},
            "packing": {"seq_len": 128, "rows": 2, "max_images_per_row": 8, "lookahead": 4}}
    recipe = Recipe.from_dict(data)
    recs = {r.key: r for r in read_task(ShardTask(str(lists)),
                                          fields=Fields(("views", "cover"), "label", None, all_images=True))}
    assert list(recs["lists/0"].members) == ["0.views", "1.views", "2.views", "3.cover", "label"]
    assert [recs["lists/0"].members[f"{i}.views"] for i in range(3)] == views[0]
    assert recs["lists/0"].members["3.cover"] == extra[0] and "1.cover" not in recs["lists/1"].members
    got = _groups_by_key(Pipeline(recipe, shards=[str(lists), str(nested)]))
    want = {f"lists/{i}": len(v) + (extra[i] is not None) for i, v in enumerate(views)}
    want.update({f"nested/{i}": len(v) for i, v in enumerate(views)})
    assert got == want


def test_a_list_column_without_all_says_what_to_set_and_a_null_element_skips_its_sample(tmp_path):
    rng = np.random.default_rng(13)
    path = tmp_path / "views.parquet"
    views = [[_png(rng), _png(rng)], [_png(rng), None], [], [_png(rng)]]
    pq.write_table(pa.table({"views": pa.array(views, pa.list_(pa.binary()))}), path)
    one = Recipe.from_dict({**BASE, "source": {"image_keys": ["views"], "label_key": None, "text_key": None,
                                               "on_error": "raise"}})
    with pytest.raises(ShardError, match="holds a list of images.*images_per_sample to all"):
        list(Pipeline(one, shards=str(path)))
    all_ = Recipe.from_dict({**BASE, "source": {"image_keys": ["views"], "label_key": None, "text_key": None,
                                                "images_per_sample": "all", "max_skip_ratio": None}})
    pipe = Pipeline(all_, shards=str(path))
    assert _groups_by_key(pipe) == {"views/0": 2, "views/3": 1}
    skips = {s.key: s.reason for s in pipe.ledger.skipped}
    assert set(skips) == {"views/1", "views/2"}
    assert "views[1]" in skips["views/1"] and "null" in skips["views/1"]
    assert "holds no image" in skips["views/2"]


def test_list_view_columns_and_dotted_column_names_keep_the_image_order(tmp_path):
    """A list_view column reads like a list; with image columns `jpg` and `left.jpg` the members
    `0.jpg`, `1.left.jpg`, `2.left.jpg` stay in that order (the longest matching key names the column)."""
    if not hasattr(pa, "ListViewArray"):
        pytest.fail("this pyarrow has no list_view type; the test needs pyarrow >= 16")
    rng = np.random.default_rng(14)
    front = [_png(rng) for _ in range(2)]
    side = [[_png(rng), _png(rng)], [_png(rng)]]
    path = tmp_path / "views.parquet"
    flat = pa.array([b for row in side for b in row], pa.binary())
    views = pa.ListViewArray.from_arrays(pa.array([0, 2], pa.int32()), pa.array([2, 1], pa.int32()), flat)
    table = pa.table({"jpg": pa.array(front, pa.binary()), "left.jpg": views})
    pq.write_table(table, path)
    fields = Fields(("jpg", "left.jpg"), None, None, all_images=True)
    rec = next(iter(read_task(ShardTask(str(path)), fields=fields)))
    assert list(rec.members) == ["0.jpg", "1.left.jpg", "2.left.jpg"]
    from patchloom.image.chain import find_images

    assert [data for _, data in find_images(rec, ["jpg", "left.jpg"])] == [front[0], *side[0]]


def test_a_label_column_named_like_an_image_member_is_refused(tmp_path):
    rng = np.random.default_rng(15)
    path = tmp_path / "odd.parquet"
    pq.write_table(pa.table({"img": pa.array([[_png(rng)]], pa.list_(pa.binary())), "0.img": pa.array([3])}), path)
    fields = Fields(("img",), "0.img", None, all_images=True)
    with pytest.raises(ShardError, match=r"column '0\.img' has the name an image of the row gets"):
        list(read_task(ShardTask(str(path)), fields=fields))
