"""The inspection report: its renderers on generated inputs, its flags on crafted inputs, and one
small end-to-end report whose numbers must equal the training pipeline's own."""

from __future__ import annotations

import argparse
import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from patchloom import Pipeline, Recipe, image_to_patches, pack, unpatchify
from patchloom.image.patches import PatchSet, grid_coords, normalize, patchify
from patchloom.report import (
    add_inspect_command,
    build_report,
    format_summary,
    palette,
    render,
)
from patchloom.report import flags as fl
from patchloom.report.collect import ImageFacts, Reservoir, image_facts
from patchloom.seeding import stream_rng
from patchloom.summary import RunStats

# ---------------------------------------------------------------------------------------------
# renderers


def _patchset(rng, grid, p, key, *, keep=None, shuffle=False) -> PatchSet:
    gh, gw = grid
    img = rng.integers(0, 256, size=(gh * p, gw * p, 3), dtype=np.uint8)
    patches, coords = patchify(img, p), grid_coords(gh, gw)
    order = np.arange(gh * gw)
    if shuffle:
        order = rng.permutation(order)
    if keep is not None:
        order = order[np.isin(order, keep)]
    return PatchSet(patches[order], coords[order], grid, key)


def test_reconstructed_row_equals_patches_placed_by_coords():
    rng = np.random.default_rng(0)
    p = 4
    sets = [
        _patchset(rng, (2, 3), p, "a"),
        _patchset(rng, (3, 3), p, "b", keep=[0, 2, 4, 5, 7], shuffle=True),  # dropped and reordered
        _patchset(rng, (1, 4), p, "c", shuffle=True),
    ]
    batch = pack(sets, seq_len=32, rows=1, max_images_per_row=4)
    items = render.reconstruct_row(batch, 0, p)
    assert [it.key for it in items] == ["a", "b", "c"]
    for it, ps in zip(items, sets):
        expected = unpatchify(ps.patches, ps.coords, ps.grid, p, fill=palette.EMPTY[0])
        assert it.image.dtype == np.uint8
        np.testing.assert_array_equal(it.image, expected)
        present = np.zeros(ps.grid, bool)
        present[ps.coords[:, 0], ps.coords[:, 1]] = True
        np.testing.assert_array_equal(it.present, present)
        assert it.tokens == ps.num_tokens
    # a float batch, shown through the recipe's mean/std, gives the same pixels back
    mean, std = (0.48, 0.45, 0.40), (0.23, 0.22, 0.26)
    floats = [PatchSet(normalize(ps.patches, mean, std, "float32"), ps.coords, ps.grid, ps.key) for ps in sets]
    fbatch = pack(floats, seq_len=32, rows=1, max_images_per_row=4)
    shown = render.reconstruct_row(fbatch, 0, p, display=lambda x: render.patches_to_display(x, mean=mean, std=std))
    for it, ref in zip(shown, items):
        np.testing.assert_array_equal(it.image, ref.image)


def test_standardized_patches_are_stretched_per_patch():
    x = np.array([[-1.0, 0.0, 1.0] * 4, [5.0] * 12], dtype=np.float32)
    out = render.patches_to_display(x, mean=(0.5,) * 3, std=(0.5,) * 3, standardized=True)
    assert out[0].min() == 0 and out[0].max() == 255
    assert (out[1] == 128).all()  # a flat patch has nothing to stretch


def test_drop_map_shades_dropped_hatches_masked_keeps_kept():
    rng = np.random.default_rng(1)
    img = rng.integers(40, 256, size=(16, 24, 3), dtype=np.uint8)  # grid 2 x 3 of 8 px cells
    present = np.ones((2, 3), bool)
    present[0, 1] = False
    masked = np.zeros((2, 3), bool)
    masked[1, 2] = True
    out = render.drop_map(img, (2, 3), present, masked)
    cell = lambda a, r, c: a[r * 8 : (r + 1) * 8, c * 8 : (c + 1) * 8].astype(int)
    # kept cells: untouched
    for r, c in [(0, 0), (0, 2), (1, 0), (1, 1)]:
        np.testing.assert_array_equal(cell(out, r, c), cell(img, r, c))
    # dropped cell: shaded towards black, every pixel
    np.testing.assert_array_equal(cell(out, 0, 1), cell(render.blend(img, palette.SHADE, 0.7), 0, 1))
    assert (cell(out, 0, 1) < cell(img, 0, 1)).all()
    # masked cell: hatch colour on the stripes, the pixels elsewhere
    stripes = render.hatch_mask(16, 24)[8:16, 16:24]
    m = cell(out, 1, 2)
    assert stripes.any() and (~stripes).any()
    assert (m[stripes] == palette.HATCH).all()
    np.testing.assert_array_equal(m[~stripes], cell(img, 1, 2)[~stripes])


def test_segment_strip_colours_each_segment_and_padding():
    seg = np.array([1, 1, 2, 2, 2, 3, 8, 0, 0], dtype=np.int32)
    strip = render.segment_strip(seg)
    for i, s in enumerate(seg):
        y, x = render.strip_cell_centre(i, length=seg.size)
        assert tuple(strip[y, x]) == palette.segment_colour(int(s)), i
    assert tuple(strip[render.strip_cell_centre(8, length=9)]) == palette.PADDING
    assert palette.PADDING not in palette.SEGMENTS
    assert palette.segment_colour(8) == palette.segment_colour(1)  # 7 colours cycle
    # neighbouring segments always differ
    assert all(palette.segment_colour(k) != palette.segment_colour(k + 1) for k in range(1, 30))
    # long rows wrap into lines
    long = np.repeat(np.arange(1, 5, dtype=np.int32), 600)
    wrapped = render.segment_strip(long)
    y, x = render.strip_cell_centre(2000, length=long.size)
    assert y > 14 and tuple(wrapped[y, x]) == palette.segment_colour(4)


def test_grid_lines_sit_on_cell_boundaries():
    img = np.full((32, 48, 3), 255, np.uint8)
    out = render.draw_grid(img, (2, 3), amount=1.0)
    assert tuple(out[16, 5]) == palette.GRID and tuple(out[5, 16]) == palette.GRID
    assert tuple(out[8, 8]) == (255, 255, 255)


# ---------------------------------------------------------------------------------------------
# flags


def _facts(**kw) -> ImageFacts:
    base = {"key": "k", "shard": "s.tar", "height": 100, "width": 100, "grid_h": 10, "grid_w": 10,
            "tokens": 100, "aspect_error": 0.0, "scale": 1.0, "drop_rate": 0.0, "target_rate": 0.0}
    return ImageFacts(**{**base, **kw})


def test_tiny_thumbnail_in_budget_mode_is_flagged_upscaled():
    recipe = Recipe.from_dict({"sizing": {"patch_size": 16, "max_tokens": 256, "mode": "budget"}})
    thumb = np.random.default_rng(0).integers(0, 256, size=(2, 3, 3), dtype=np.uint8)  # 3 wide, 2 high
    facts = image_facts(image_to_patches(thumb, recipe, key="thumb"))
    assert facts.scale > fl.UPSCALE_LIMIT
    flags = fl.image_flags([facts, _facts()])
    assert [f.code for f in flags] == ["upscale"]
    assert flags[0].count == 1 and "thumb" in flags[0].examples[0]
    # a normal photo-sized image is not
    photo = np.zeros((480, 640, 3), np.uint8)
    assert fl.image_flags([image_facts(image_to_patches(photo, recipe, key="photo"))]) == []


def test_flags_fire_on_crafted_inputs_and_stay_quiet_otherwise():
    assert fl.find_flags(images=[_facts()], ledger={"read": 1, "skipped": 0}, row_padding=np.array([0.05])) == []
    off = fl.image_flags([_facts(aspect_error=0.2, key="wide")])
    assert off[0].code == "aspect" and "wide" in off[0].message
    pad = fl.padding_flag(np.array([0.02, 0.5, 0.11, 1.0]), rows_in_last_batch=1)
    assert pad[0].code == "padding" and pad[0].count == 3 and "1 of them in the epoch's last batch" in pad[0].message
    led = fl.ledger_flags({"read": 9, "skipped": 2, "skip_reasons": {"decode: truncated": 2},
                           "skip_examples": {"decode: truncated": ["x (a.tar)", "y (a.tar)"]},
                           "shard_errors": []})
    assert led[0].code == "skipped" and led[0].examples == ("x (a.tar)", "y (a.tar)")
    det = fl.determinism_flags(["k1"], identical=False)
    assert [f.code for f in det] == ["determinism", "determinism"]


def test_flag_sizes_read_height_by_width():
    tall = fl.image_flags([_facts(aspect_error=0.2, key="tall", height=300, width=100, grid_h=12, grid_w=4)])
    assert "300×100 -> 12×4 patches, h×w" in tall[0].message


def test_reservoir_is_seeded_and_uniformish():
    def pick(seed):
        r = Reservoir(5, stream_rng(seed, 0, "report"))
        for i in range(200):
            r.offer(i)
        return [item for _, item in r.sample()]

    assert pick(3) == pick(3) and pick(3) != pick(4)
    assert len(set(pick(3))) == 5
    counts = np.zeros(200)
    for s in range(300):
        counts[pick(s)] += 1
    assert counts[:100].sum() == pytest.approx(counts[100:].sum(), rel=0.25)  # not biased to the start


# ---------------------------------------------------------------------------------------------
# end to end on a small demo shard

RECIPE = {
    "seed": 7,
    "source": {"label_key": "cls", "shuffle_buffer": 8},
    "sizing": {"patch_size": 16, "max_tokens": 96, "min_tokens": 8, "mode": "budget", "max_aspect": 8.0},
    "drop": {"mode": "random", "rate": 0.25, "min_keep": 4},
    "packing": {"seq_len": 256, "rows": 2, "max_images_per_row": 8, "lookahead": 8},
    "output": {"dtype": "float32"},
}


class _Page(HTMLParser):
    """The <img> sources, the tags used, and the text of every data-stat element."""

    def __init__(self) -> None:
        super().__init__()
        self.imgs: list[str] = []
        self.stats: dict[str, tuple[str, str | None]] = {}
        self.tags: set[str] = set()
        self._open: list[list] = []  # [name, data-value, nested depth, text parts]

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.add(tag)
        if tag == "img":
            self.imgs.append(a["src"])
            return
        for o in self._open:
            o[2] += 1
        if "data-stat" in a:
            self._open.append([a["data-stat"], a.get("data-value"), 0, []])

    def handle_endtag(self, tag):
        if not self._open:
            return
        if self._open[-1][2] == 0:  # the data-stat element itself closes
            name, value, _, parts = self._open.pop()
            self.stats[name] = ("".join(parts).strip(), value)
        for o in self._open:
            o[2] -= 1

    def handle_data(self, data):
        for o in self._open:
            o[3].append(data)


@pytest.fixture(scope="module")
def small_report(tmp_path_factory):
    from patchloom.demo.data import make_demo_shards

    root = tmp_path_factory.mktemp("report")
    make_demo_shards(root / "data", shards=1, per_shard=12, progress=False)
    shard = str(root / "data" / "demo-000000.tar")
    recipe = Recipe.from_dict(RECIPE)
    result = build_report(recipe, root / "out", shards=shard, samples=5, progress=False)
    return recipe, shard, result


def _reference(recipe, shard):
    pipe = Pipeline(recipe, shards=shard)
    stats = RunStats()
    for batch in pipe:
        stats.add(batch)
    return pipe.ledger.to_dict(), stats.to_dict()


def test_report_numbers_equal_the_pipeline_ledger(small_report):
    recipe, shard, result = small_report
    ledger, run = _reference(recipe, shard)
    s = result["summary"]
    assert (s["read"], s["emitted"], s["skipped"]) == (ledger["read"], ledger["emitted"], ledger["skipped"])
    assert s["read"] == 12 and s["skipped"] == 1  # the demo's one truncated JPEG
    assert s["skip_reasons"] == ledger["skip_reasons"] and s["skip_examples"] == ledger["skip_examples"]
    for k in ("batches", "tokens_mean", "tokens_p5", "tokens_p95", "padding_pct", "images_per_row"):
        assert s[k] == pytest.approx(run[k]), k
    assert s["fingerprint"] == recipe.fingerprint()

    out = Path(result["out_dir"])
    page = _Page()
    page.feed((out / "index.html").read_text(encoding="utf-8"))
    for k in ("read", "emitted", "skipped", "batches"):
        assert int(page.stats[k][0]) == ledger.get(k, run.get(k)), k
    for k in ("tokens_mean", "padding_pct", "images_per_row", "tokens_p5", "tokens_p95"):
        assert float(page.stats[k][1]) == pytest.approx(run[k]), k
    assert page.stats["fingerprint"][0] == recipe.fingerprint()
    codes = {f["code"] for f in result["flags"]}
    assert {"skipped", "upscale"} <= codes  # the truncated JPEG and the 3x2 thumbnail
    assert "determinism" not in codes
    assert "yes" in page.stats["identical"][0]


def test_report_is_self_contained_and_every_png_exists(small_report):
    _, _, result = small_report
    out = Path(result["out_dir"])
    html = (out / "index.html").read_text(encoding="utf-8")
    page = _Page()
    page.feed(html)
    assert page.imgs, "the report shows no images"
    for src in page.imgs:
        assert "://" not in src and not src.startswith("/")
        assert (out / src).is_file(), src
        assert (out / src).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert not {"script", "link", "iframe"} & page.tags
    assert "http://" not in html and "https://" not in html and "url(" not in html
    listed = set(result["files"])
    assert set(page.imgs) <= listed and "index.html" in listed
    assert all((out / f).is_file() for f in listed)
    assert sum(src.startswith("sample-") for src in page.imgs) >= 4 * 4  # 5 traced, one may be skipped
    assert any(src.startswith("row-") for src in page.imgs) and any(src.startswith("chart-") for src in page.imgs)
    manifest = json.loads((out / "report.json").read_text())
    assert manifest["summary"]["read"] == result["summary"]["read"]


def test_report_sizes_are_height_by_width(small_report):
    html = (Path(small_report[2]["out_dir"]) / "index.html").read_text(encoding="utf-8")
    assert "grid h×w" in html and "source h×w" in html
    assert "w×h" not in html


def test_traced_samples_reproduce_the_pipeline_tokens(small_report):
    result = small_report[2]
    html = (Path(result["out_dir"]) / "index.html").read_text(encoding="utf-8")
    assert html.count("yes, identical tokens") >= 4
    assert "NO: tokens differ" not in html


def test_inspect_command_max_images_and_rerun_cleans_up(small_report, tmp_path, capsys):
    shard = small_report[1]
    rpath = tmp_path / "r.yaml"
    rpath.write_text(json.dumps(RECIPE))  # JSON is YAML
    parser = argparse.ArgumentParser(prog="patchloom")
    add_inspect_command(parser.add_subparsers(dest="command"))
    out = tmp_path / "rep"
    args = parser.parse_args(["inspect", str(rpath), "--shards", shard, "--out", str(out), "--samples", "2",
                              "--max-images", "6", "--no-progress"])
    assert args.func(args) == 0
    printed = capsys.readouterr().out
    assert "images read     6" in printed and "flags:" in printed and "index.html" in printed
    first = set(json.loads((out / "report.json").read_text())["files"])
    args = parser.parse_args(["inspect", str(rpath), "--shards", shard, "--out", str(out), "--samples", "1",
                              "--max-images", "3", "--no-progress", "--fail-on-flags"])
    assert args.func(args) == 1  # the truncated JPEG (index 3) is not read, but the 3-image run pads rows
    second = set(json.loads((out / "report.json").read_text())["files"])
    on_disk = {p.name for p in out.iterdir()}
    assert on_disk == second and first - second  # the first run's extra sample pictures are gone
    assert "images read     3" in capsys.readouterr().out


def test_format_summary_lists_flags(small_report):
    _, _, result = small_report
    text = format_summary(result)
    assert "! skipped:" in text and "! upscale:" in text and f"images read     {result['summary']['read']}" in text


def test_report_without_matplotlib_still_writes_the_page(small_report, tmp_path, monkeypatch):
    import sys

    _, shard, _ = small_report
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib now raises ImportError
    result = build_report(Recipe.from_dict(RECIPE), tmp_path / "rep", shards=shard, samples=1, max_images=4,
                          progress=False)
    assert not any(f.startswith("chart-") for f in result["files"])
    assert any("patchloom[report]" in n for n in result["notes"])
    assert "patchloom[report]" in (tmp_path / "rep" / "index.html").read_text(encoding="utf-8")
