"""The report opened in a real headless Chromium: every picture loads, the numbers read from the
rendered page equal the pipeline's ledger, and a screenshot is not blank.

The report itself has no scripts. The test writes its own probe page beside it that loads the
report in an iframe and writes what it finds (each <img>'s naturalWidth, each data-stat value)
into its DOM, which Chromium then dumps.
"""

from __future__ import annotations

import html
import json
import os
import re
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from patchloom import Pipeline, Recipe
from patchloom.report import build_report
from patchloom.report.browser import dump_dom, find_chromium, screenshot

RECIPE = {
    "seed": 11,
    "source": {"label_key": "cls", "shuffle_buffer": 8},
    "sizing": {"patch_size": 16, "max_tokens": 96, "min_tokens": 8, "mode": "budget", "max_aspect": 8.0},
    "drop": {"mode": "block", "output": "mask", "rate": 0.3, "block": {"min_area": 4}, "min_keep": 4},
    "patch_ops": [{"name": "standardize"}],
    "packing": {"seq_len": 256, "rows": 2, "max_images_per_row": 8, "lookahead": 8},
    "output": {"dtype": "float32"},
}

PROBE = """<!DOCTYPE html><html><head><meta charset="utf-8"></head><body>
<pre id="result">pending</pre>
<img id="missing" src="no-such-picture.png" alt="">
<iframe id="report" src="REPORT" width="1400" height="2400"></iframe>
<script>
document.getElementById("report").addEventListener("load", function () {
  var out = {};
  try {
    var d = this.contentDocument;
    out.images = Array.prototype.map.call(d.images, function (im) {
      return {src: im.getAttribute("src"), complete: im.complete, naturalWidth: im.naturalWidth,
              naturalHeight: im.naturalHeight, width: Number(im.getAttribute("width"))};
    });
    out.stats = {};
    d.querySelectorAll("[data-stat]").forEach(function (el) {
      out.stats[el.getAttribute("data-stat")] = el.textContent.trim();
    });
    out.title = d.title;
  } catch (e) { out.error = String(e); }
  out.missing = document.getElementById("missing").naturalWidth;
  document.getElementById("result").textContent = JSON.stringify(out);
});
</script></body></html>
"""


def under_ci() -> bool:
    """CI=true (or 1, yes), as CI services set it: there a missing browser is an error, not a skip."""
    return os.environ.get("CI", "").strip().lower() in ("true", "1", "yes")


def require_chromium() -> str:
    """The Chromium executable; fails under CI (.ci/run installs it), skips elsewhere."""
    exe = find_chromium()
    if exe is None:
        message = "Chromium not found (install the `chromium` package, or put chromium on PATH)"
        if under_ci():
            pytest.fail(message + "; CI installs it (.ci/run), so its absence there is an error")
        pytest.skip(message)
    return exe


@pytest.fixture(scope="module")
def chromium() -> str:
    return require_chromium()


@pytest.mark.parametrize(("ci", "outcome"), [("true", pytest.fail.Exception), ("1", pytest.fail.Exception),
                                             ("", pytest.skip.Exception), ("false", pytest.skip.Exception)])
def test_a_missing_chromium_fails_under_ci_and_skips_elsewhere(monkeypatch, ci, outcome):
    """This runs without a browser: the browser tests cannot be silently absent in CI."""
    monkeypatch.setitem(globals(), "find_chromium", lambda: None)
    monkeypatch.setenv("CI", ci)
    with pytest.raises(outcome):
        require_chromium()


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    from patchloom.demo.data import make_demo_shards

    root = tmp_path_factory.mktemp("browser")
    make_demo_shards(root / "data", shards=1, per_shard=12, progress=False)
    shard = str(root / "data" / "demo-000000.tar")
    recipe = Recipe.from_dict(RECIPE)
    result = build_report(recipe, root / "site" / "report", shards=shard, samples=4, progress=False)
    pipe = Pipeline(recipe, shards=shard)
    for _ in pipe:
        pass
    return result, pipe.ledger.to_dict()


def test_every_image_loads_and_the_numbers_match(chromium, report):
    result, ledger = report
    index = Path(result["index"])
    probe = index.parent.parent / "probe.html"
    probe.write_text(PROBE.replace("REPORT", "report/index.html"), encoding="utf-8")
    dom = dump_dom(probe, extra=["--allow-file-access-from-files"], browser=chromium)
    found = re.search(r'<pre id="result">(.*?)</pre>', dom, re.DOTALL)
    assert found, f"probe page did not render: {dom[:300]!r}"
    text = html.unescape(found.group(1))
    assert text != "pending", "the report did not finish loading within the virtual time budget"
    data = json.loads(text)
    assert "error" not in data, data.get("error")
    assert data["missing"] == 0  # the probe does see a picture that fails to load

    srcs = re.findall(r'<img src="([^"]+)"', index.read_text(encoding="utf-8"))
    assert [im["src"] for im in data["images"]] == srcs and len(srcs) > 10
    broken = [im["src"] for im in data["images"] if not im["complete"] or im["naturalWidth"] <= 0]
    assert not broken, f"pictures that did not load: {broken}"
    wrong = [im["src"] for im in data["images"] if im["naturalWidth"] != im["width"]]
    assert not wrong, f"width attribute differs from the PNG's: {wrong}"

    stats = data["stats"]
    for k in ("read", "emitted", "skipped"):
        assert int(stats[k]) == ledger[k], k
    assert stats["identical"] == "yes"
    assert data["title"].startswith("patchloom inspect")


def test_screenshot_is_not_blank(chromium, report, tmp_path):
    result, _ = report
    png = screenshot(result["index"], tmp_path / "shot.png", width=1400, height=2400, browser=chromium)
    im = np.asarray(Image.open(png).convert("RGB"))
    assert im.shape == (2400, 1400, 3)
    flat = im.reshape(-1, 3)
    assert flat.std(axis=0).max() > 20, "screenshot is (nearly) one colour"
    assert len(np.unique(flat[::7], axis=0)) > 200, "screenshot has too few colours to be the report"
    # the flag box border (Okabe-Ito vermillion) is drawn: the page's CSS took effect
    assert (np.abs(flat.astype(int) - (213, 94, 0)).sum(axis=1) < 12).sum() > 100
