"""Texts travel with their images: source.text_key, PackedBatch.texts, text tokens from a caller's
encoder (text.max_tokens, truncation counted), and texts through torch, the store and the report.

Each test sample is a solid grey image whose caption names its key and grey level, so alignment
is checked by content: the tokens of a segment must have the grey its caption names."""

from __future__ import annotations

import json
import re
import tarfile
from pathlib import Path

import numpy as np
import pytest

from patchloom import Pipeline, Recipe, image_to_patches, pack
from patchloom.image.chain import SampleError
from patchloom.packing.text import TEXT_PAD_ID, add_text_tokens, encode_texts
from patchloom.recipe import RecipeError
from patchloom.store import pack_to_dir, read_packed, verify_dir
from patchloom.testing import batches_equal, check_resume

from conftest import encode_png, write_shard

CAPTION = re.compile(r"sample (\S+) grey (\d+)")


def grey(i: int) -> int:
    return (37 * i + 11) % 256


def caption(key: str, level: int) -> str:
    return f"sample {key} grey {level} — café"  # non-ASCII on purpose: UTF-8 end to end


def byte_encoder(text: str) -> list[int]:
    """The toy tokenizer: the UTF-8 bytes of the string, shifted by one so no token is the pad value."""
    return [b + 1 for b in text.encode("utf-8")]


def make_text_shards(folder: Path, *, shards: int = 3, per_shard: int = 10, extra=None) -> list[str]:
    """Solid grey PNGs of varied sizes, each with a `txt` caption naming its key and grey level.
    `extra(key, i) -> dict` may replace or add members (None drops the member)."""
    rng = np.random.default_rng(7)
    paths = []
    for s in range(shards):
        samples = []
        for i in range(per_shard):
            n = s * per_shard + i
            key = f"t{s}-{i:03d}"
            h, w = (int(v) for v in rng.integers(16, 80, size=2))
            members = {"png": encode_png(np.full((h, w, 3), grey(n), np.uint8)), "cls": str(n % 3).encode(),
                       "txt": caption(key, grey(n)).encode("utf-8")}
            for name, data in (extra(key, n) if extra else {}).items():
                if data is None:
                    members.pop(name, None)
                else:
                    members[name] = data
            samples.append((key, members))
        paths.append(str(write_shard(folder / f"text-{s}.tar", samples)))
    return paths


def text_recipe(shards, **over) -> Recipe:
    data = {
        "seed": 3,
        "source": {"shards": shards, "text_key": "txt", "shuffle_buffer": 8, "label_key": "cls"},
        "sizing": {"patch_size": 8, "max_tokens": 24, "min_tokens": 1},
        "packing": {"seq_len": 64, "rows": 2, "max_images_per_row": 6, "lookahead": 6},
        "text": {"max_tokens": 40},
    }
    for section, values in over.items():
        data[section] = {**data.get(section, {}), **values}
    return Recipe.from_dict(data)


def segments(batch):
    """(key, text, tokens of the segment) for every segment of a batch."""
    for r, keys in enumerate(batch.keys):
        for j, key in enumerate(keys):
            yield key, batch.texts[r][j], batch.patches[r][batch.segment_ids[r] == j + 1]


def check_aligned(batches) -> list[str]:
    """Every segment's caption names its own key and the grey its tokens have; returns the keys."""
    seen = []
    for b in batches:
        assert [len(t) for t in b.texts] == [len(k) for k in b.keys]
        for key, text, tokens in segments(b):
            m = CAPTION.match(text)
            assert m is not None, f"{key}: caption {text!r}"
            assert m.group(1) == key
            assert int(np.median(tokens)) == int(m.group(2)), f"{key}: tokens are not the grey its caption names"
            seen.append(key)
    return seen


@pytest.fixture
def text_shards(tmp_path) -> list[str]:
    return make_text_shards(tmp_path)


# --------------------------------------------------------------------------------------------
# recipe keys


def test_text_key_and_text_section_are_validated():
    assert Recipe().source.text_key is None and Recipe().text.max_tokens == 64
    assert Recipe.from_dict({"source": {"text_key": "json:caption"}}).source.text_key == "json:caption"
    for bad in ("", "json:", " txt"):
        with pytest.raises(RecipeError, match=r"source\.text_key: must be a member extension"):
            Recipe.from_dict({"source": {"text_key": bad}})
    with pytest.raises(RecipeError, match=r"text\.max_tokens: must be >= 1"):
        Recipe.from_dict({"text": {"max_tokens": 0}})
    with pytest.raises(RecipeError, match="did you mean 'max_tokens'"):
        Recipe.from_dict({"text": {"max_token": 8}})


# --------------------------------------------------------------------------------------------
# alignment through shuffle, packing, resume and rank split


def test_captions_stay_with_their_images_through_shuffle_and_packing(text_shards):
    recipe = text_recipe(text_shards)
    batches = list(Pipeline(recipe))
    keys = check_aligned(batches)
    assert sorted(keys) == sorted(f"t{s}-{i:03d}" for s in range(3) for i in range(10))
    stored = [k for b in batches for k in b.keys[0]]  # shuffled: not in shard order
    assert stored != sorted(stored)


def test_captions_stay_aligned_across_rank_split(text_shards):
    recipe = text_recipe(text_shards)
    got = [check_aligned(Pipeline(recipe, rank=r, world_size=2)) for r in range(2)]
    assert not set(got[0]) & set(got[1])
    assert len(got[0]) + len(got[1]) == 30


def test_resume_reproduces_texts_and_tokens(text_shards):
    recipe = text_recipe(text_shards, text={"max_tokens": 12})  # every caption is cut: the count must resume
    report = check_resume(lambda: Pipeline(recipe, text_encoder=byte_encoder), every=1)
    assert report.batches >= 3
    pipe = Pipeline(recipe, text_encoder=byte_encoder)
    state = None
    for n, _ in enumerate(pipe):
        if n == 1:
            state = json.loads(json.dumps(pipe.state_dict()))
            break
    resumed = Pipeline(recipe, text_encoder=byte_encoder)
    resumed.load_state_dict(state)
    rest = list(resumed)
    check_aligned(rest)
    assert resumed.ledger.texts_truncated == 30  # counted before the state was saved, and after


def test_batches_equal_sees_texts():
    ps = image_to_patches(np.zeros((16, 16, 3), np.uint8), Recipe.from_dict({"sizing": {"patch_size": 8, "max_tokens": 4}}),
                          key="a", text="one")
    a, b = pack([ps], 16), pack([ps], 16)
    assert batches_equal(a, b) is None
    b.texts[0][0] = "two"
    assert batches_equal(a, b) == "texts"


# --------------------------------------------------------------------------------------------
# reading the text: missing, invalid UTF-8, json:field


def test_a_missing_text_member_gives_an_empty_text(tmp_path):
    shards = make_text_shards(tmp_path, shards=1, extra=lambda key, n: {"txt": None} if n % 2 else {})
    batches = list(Pipeline(text_recipe(shards)))
    texts = {k: t for b in batches for k, t, _ in segments(b)}
    assert len(texts) == 10
    assert all((t == "") == (int(k[-3:]) % 2 == 1) for k, t in texts.items())


def test_no_text_key_gives_empty_texts_and_skips_the_text_stage(text_shards):
    recipe = text_recipe(text_shards, source={"text_key": None})
    batches = list(Pipeline(recipe))
    assert all(t == "" for b in batches for row in b.texts for t in row)
    assert sum(len(row) for b in batches for row in b.texts) == 30


def test_invalid_utf8_is_a_clear_sample_error(tmp_path):
    bad = lambda key, n: {"txt": b"caf\xe9 \xff"} if n == 4 else {}  # noqa: E731 - Latin-1, not UTF-8
    shards = make_text_shards(tmp_path, shards=1, extra=bad)
    with pytest.raises(SampleError) as info:
        list(Pipeline(text_recipe(shards, source={"on_error": "raise"})))
    err = info.value
    assert err.stage == "text" and err.key == "t0-004"
    assert "text member 'txt' is not UTF-8" in str(err) and "source.text_key" in str(err)
    pipe = Pipeline(text_recipe(shards, source={"max_skip_ratio": None}))
    assert "t0-004" not in check_aligned(pipe)
    assert [(s.key, s.stage) for s in pipe.ledger.skipped] == [("t0-004", "text")]


def test_json_field_text(tmp_path):
    def meta(key, n):
        fields = {"key": key} if n == 2 else {"caption": caption(key, grey(n)), "n": n}
        if n == 5:
            fields["caption"] = 17
        return {"txt": None, "json": json.dumps(fields).encode()}

    shards = make_text_shards(tmp_path, shards=1, extra=meta)
    pipe = Pipeline(text_recipe(shards, source={"text_key": "json:caption", "max_skip_ratio": None}))
    batches = list(pipe)
    texts = {k: t for b in batches for k, t, _ in segments(b)}
    assert texts["t0-002"] == ""  # the field is absent
    assert "t0-005" not in texts  # not a string
    (skip,) = pipe.ledger.skipped
    assert skip.key == "t0-005" and skip.stage == "text" and "must be a JSON string" in skip.reason
    for b in batches:
        for key, text, tokens in segments(b):
            if key != "t0-002":
                assert text == caption(key, int(np.median(tokens)))


def test_label_and_text_share_one_member_parser(tmp_path):
    both = lambda key, n: {"json": json.dumps({"label": n, "caption": f"c{n}"}).encode()}  # noqa: E731
    shards = make_text_shards(tmp_path, shards=1, extra=both)
    recipe = text_recipe(shards, source={"text_key": "json:caption", "label_key": "json:label"})
    for b in Pipeline(recipe):
        for r, row in enumerate(b.texts):
            assert [f"c{lab}" for lab in b.labels[r][: len(row)]] == row


# --------------------------------------------------------------------------------------------
# text tokens


def test_text_tokens_have_static_shapes_count_truncation_and_match_lengths(text_shards):
    recipe = text_recipe(text_shards, text={"max_tokens": 30})
    pipe = Pipeline(recipe, text_encoder=byte_encoder)
    batches = list(pipe)
    rows, s, t = recipe.packing.rows, recipe.packing.max_images_per_row, 30
    cut = 0
    for b in batches:
        assert b.text_tokens.shape == (rows, s, t) and b.text_tokens.dtype == np.int32
        assert b.text_lengths.shape == (rows, s) and b.text_lengths.dtype == np.int32
        for r in range(rows):
            n_seg = len(b.keys[r])
            assert not b.text_lengths[r, n_seg:].any() and not b.text_tokens[r, n_seg:].any()
            for j, text in enumerate(b.texts[r]):
                ids = byte_encoder(text)
                n = int(b.text_lengths[r, j])
                assert n == min(len(ids), t)
                assert b.text_tokens[r, j, :n].tolist() == ids[:n]
                assert (b.text_tokens[r, j, n:] == TEXT_PAD_ID).all()
                cut += len(ids) > t
    assert cut > 0 and pipe.ledger.texts_truncated == cut
    assert pipe.ledger.to_dict()["texts_truncated"] == cut


def test_nothing_is_counted_when_texts_fit(text_shards):
    pipe = Pipeline(text_recipe(text_shards, text={"max_tokens": 200}), text_encoder=byte_encoder)
    batches = list(pipe)
    assert pipe.ledger.texts_truncated == 0
    assert all(b.text_tokens.shape[2] == 200 for b in batches)
    assert next(iter(Pipeline(text_recipe(text_shards)))).text_tokens is None  # no encoder, no tokens


def test_a_text_cut_on_several_images_of_one_sample_counts_once():
    recipe = Recipe.from_dict({"sizing": {"patch_size": 8, "max_tokens": 4}})
    sets = [image_to_patches(np.zeros((16, 16, 3), np.uint8), recipe, key=k, text=t)
            for k, t in (("a", "long text a"), ("a", "long text a"), ("b", "long text b"), ("c", "ok"))]
    batch = pack(sets, 64, max_images_per_row=5)
    assert add_text_tokens(batch, byte_encoder, 4) == 3  # one per segment while each is its own sample
    batch.groups = np.array([[1, 1, 2, 3, 0]], np.int32)  # the first two images are one sample
    assert add_text_tokens(batch, byte_encoder, 4) == 2
    assert batch.text_lengths.tolist() == [[4, 4, 4, 2, 0]]


def test_encoder_output_is_checked():
    texts = [["a", "bb"]]
    with pytest.raises(TypeError, match="flat list of int token ids.*sample 'k2'"):
        encode_texts(texts, lambda s: [[1, 2]] if s == "bb" else [1], max_tokens=4, max_images=2,
                     keys=[["k1", "k2"]])
    with pytest.raises(ValueError, match="outside int32"):
        encode_texts(texts, lambda s: [2**40], max_tokens=4, max_images=2)
    out = encode_texts(texts, lambda s: [], max_tokens=4, max_images=3)
    assert out.tokens.shape == (1, 3, 4) and not out.lengths.any() and not out.truncated.any()


def test_to_torch_carries_texts_as_lists(text_shards):
    torch = pytest.importorskip("torch")
    batch = next(iter(Pipeline(text_recipe(text_shards), text_encoder=byte_encoder)))
    out = batch.to_torch()
    assert out["texts"] == batch.texts and isinstance(out["texts"][0][0], str)
    assert out["text_tokens"].dtype == torch.int32 and tuple(out["text_tokens"].shape) == batch.text_tokens.shape
    assert torch.equal(out["text_lengths"], torch.from_numpy(batch.text_lengths))
    plain = next(iter(Pipeline(text_recipe(text_shards)))).to_torch()
    assert plain["text_tokens"] is None and plain["text_lengths"] is None


def test_torch_dataset_tokenizes_in_its_workers(text_shards):
    pytest.importorskip("torch")
    from torch.utils.data import DataLoader

    from patchloom.adapters.torch import PatchloomDataset

    recipe = text_recipe(text_shards, text={"max_tokens": 16})
    ds = PatchloomDataset(recipe, text_encoder=byte_encoder)
    seen = 0
    for item in DataLoader(ds, batch_size=None, num_workers=1):
        assert tuple(item["text_tokens"].shape) == (2, 6, 16)
        for r, row in enumerate(item["texts"]):
            for j, text in enumerate(row):
                assert item["text_tokens"][r, j].tolist() == byte_encoder(text)[:16]
                seen += 1
    assert seen == 30


def test_pack_and_image_to_patches_carry_texts():
    recipe = Recipe.from_dict({"sizing": {"patch_size": 8, "max_tokens": 16}})
    sets = [image_to_patches(np.full((16, 16, 3), i, np.uint8), recipe, key=f"k{i}", text=f"text {i}")
            for i in range(3)]
    batch = pack(sets, 64)
    assert batch.texts == [["text 0", "text 1", "text 2"]]


# --------------------------------------------------------------------------------------------
# the store


def _members(shard: Path) -> list[str]:
    with tarfile.open(shard) as tar:
        return tar.getnames()


def test_texts_round_trip_through_pack_read_packed_and_verify(tmp_path, text_shards):
    recipe = text_recipe(text_shards, text={"max_tokens": 20})
    out = tmp_path / "packed"
    pack_to_dir(recipe, out, progress=False)
    shard = sorted(out.glob("packed-*.tar"))[0]
    assert any(n.endswith(".texts.json") for n in _members(shard))
    read = list(read_packed(out, shuffle=False))
    assert sorted(check_aligned(read)) == sorted(k for b in Pipeline(recipe) for k in sum(b.keys, []))
    assert all(b.text_tokens is None for b in read)
    assert verify_dir(out, progress=False).ok
    tokens = list(read_packed(out, shuffle=False, text_encoder=byte_encoder))
    for b in tokens:
        assert b.text_tokens.shape == (2, 6, 20)
        assert b.text_lengths[0, 0] == min(20, len(byte_encoder(b.texts[0][0])))

    # a changed caption breaks the batch hash: verify and the reader both notice
    data = shard.read_bytes()
    needle = b"grey"
    at = data.index(needle)
    shard.write_bytes(data[:at] + b"GREY" + data[at + 4:])
    assert not verify_dir(out, progress=False).ok
    with pytest.raises(Exception, match="do not hash to the manifest"):
        list(read_packed(out, shuffle=False))


def test_a_damaged_texts_member_is_refused(text_shards):
    from patchloom.store.format import StoreError, decode_batch, encode_batch
    from patchloom.store.jobs import batch_shape

    batch = next(iter(Pipeline(text_recipe(text_shards))))
    members = {k: v for k, v in encode_batch("w000-b00000000", batch).items() if k != "__key__"}
    shape = batch_shape(batch)
    assert decode_batch(members, "here", shape).texts == batch.texts
    short = [row[:-1] for row in batch.texts]
    for bad, why in ((json.dumps(short).encode(), "one string per segment"),
                     (json.dumps([[""] * len(r) for r in batch.texts]).encode(), "only empty texts"),
                     (b"\xff[", "not UTF-8 JSON")):
        with pytest.raises(StoreError, match=why):
            decode_batch({**members, "texts.json": bad}, "here", shape)


def test_a_pack_without_texts_writes_no_texts_member(tmp_path, text_shards):
    out = tmp_path / "plain"
    pack_to_dir(text_recipe(text_shards, source={"text_key": None}), out, progress=False)
    names = [n for s in sorted(out.glob("packed-*.tar")) for n in _members(s)]
    assert names and not any("texts" in n for n in names)
    assert all(t == "" for b in read_packed(out) for row in b.texts for t in row)
    assert verify_dir(out, progress=False).ok


# --------------------------------------------------------------------------------------------
# the report and the demo


def test_report_shows_each_traced_samples_caption(tmp_path, text_shards):
    from patchloom.report import build_report

    result = build_report(text_recipe(text_shards), tmp_path / "rep", samples=4, progress=False)
    page = Path(result["index"]).read_text(encoding="utf-8")
    cards = re.findall(r'data-sample="([^"]+)".*?<p class="text" data-text="([^"]*)">', page, flags=re.S)
    assert len(cards) == 4
    for key, text in cards:
        assert text.startswith(f"sample {key} grey ")
    rows = page[page.index('id="rows"'):]
    assert "sample t" in rows and "café" in rows  # the packed rows name each segment's text too


def test_demo_samples_have_a_caption_member(tmp_path):
    from patchloom.demo.data import make_demo_shards

    (path,) = make_demo_shards(tmp_path, shards=1, per_shard=12, seed=1, progress=False)
    with tarfile.open(path) as tar:
        members = {m.name: tar.extractfile(m).read() for m in tar}
    keys = {n.split(".", 1)[0] for n in members}
    for key in keys:
        text = members[f"{key}.txt"].decode("utf-8")
        assert text and "\n" not in text and text.endswith(".")
        assert json.loads(members[f"{key}.json"])["caption"] == text
    assert len({members[f"{k}.txt"] for k in keys}) > len(keys) // 2  # written from each scene, not one line


def test_contrastive_recipe_reads_the_demo_captions(demo_dir):
    from patchloom.demo.data import demo_shard_pattern

    recipe = Recipe.from_file(Path(__file__).parent.parent / "recipes" / "contrastive.yaml")
    assert recipe.source.text_key == "txt"
    assert Path(__file__).parent.parent.joinpath("recipes", "contrastive.yaml").read_text().startswith(
        "# Contrastive image–text pretraining")
    pipe = Pipeline(recipe, shards=demo_shard_pattern(demo_dir), text_encoder=byte_encoder, max_records=40)
    batch = next(iter(pipe))
    assert batch.text_tokens.shape == (recipe.packing.rows, recipe.packing.max_images_per_row, 64)
    assert all(t for row in batch.texts for t in row)
