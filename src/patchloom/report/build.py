"""build_report: one watched pipeline pass -> numbers, flags, pictures -> index.html + PNGs."""

from __future__ import annotations

import json
import time
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np

from ..image.patches import PatchSet
from ..recipe import Recipe
from ..read import expand_shards
from . import charts, palette, render
from .collect import Collected, Traced, collect, determinism
from .flags import ASPECT_ERROR_LIMIT, ROW_PADDING_LIMIT, UPSCALE_LIMIT, find_flags
from .page import (
    document,
    esc,
    figure,
    flags_block,
    img,
    span,
    stat,
    swatch,
    table,
    yes_no,
)

#: Panels of a sample card fit in a square of this many pixels.
PANEL = 232
#: Packed batches drawn row by row.
BATCHES_SHOWN = 2
#: The manifest of a written report (also lists its files, so a rewrite removes stale ones).
MANIFEST = "report.json"


def library_versions() -> dict[str, str]:
    """Versions of patchloom and the libraries whose behaviour shapes the numbers."""
    from importlib import metadata

    from .. import __version__

    out = {"patchloom": __version__}
    for name in ("numpy", "Pillow", "webdataset", "albumentations", "torch", "matplotlib"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def cells(ps: PatchSet) -> tuple[np.ndarray, np.ndarray]:
    """(present, masked) bool [gh, gw] of a PatchSet: which grid cells have a token, which are masked."""
    gh, gw = ps.grid
    c = ps.coords.astype(np.int64)
    present = np.zeros((gh, gw), bool)
    present[c[:, 0], c[:, 1]] = True
    masked = np.zeros((gh, gw), bool)
    if ps.masked is not None:
        masked[c[:, 0], c[:, 1]] = ps.masked
    return present, masked


#: Characters of a sample's text shown in the report (the rest is cut, with an ellipsis).
TEXT_SHOWN = 400


def text_html(text: str, recipe: Recipe) -> str:
    """A sample's text for the page ("" when the recipe reads none): quoted, cut to TEXT_SHOWN."""
    if recipe.source.text_key is None:
        return ""
    if not text:
        return '<span class="muted">(no text)</span>'
    shown = text if len(text) <= TEXT_SHOWN else text[: TEXT_SHOWN - 1] + "…"
    return f"“{esc(shown)}”"


def _percentile(values: np.ndarray, q: float) -> float:
    return float(np.percentile(values, q)) if values.size else 0.0


def summarise(col: Collected, recipe: Recipe, *, origin: str, shards: list[str], epoch: int,
              seed: int) -> dict[str, Any]:
    """The report's numbers. Ledger and packing numbers are the pipeline's own (Ledger, RunStats)."""
    run = col.run.to_dict()
    led = col.ledger
    im = col.images
    drop = np.array([i.drop_rate for i in im], float)
    target = np.array([i.target_rate for i in im], float)
    return {
        "recipe": origin,
        "fingerprint": recipe.fingerprint(),
        "shards": len(shards),
        "epoch": epoch,
        "seed": seed,
        "read": int(led["read"]),
        "emitted": int(led["emitted"]),
        "skipped": int(led["skipped"]),
        "in_buffer": int(led["in_buffer"]),
        "repeated": int(led.get("repeated", 0)),
        "skip_reasons": led["skip_reasons"],
        "skip_examples": led["skip_examples"],
        "shard_errors": led["shard_errors"],
        "images_processed": len(im),
        "batches": int(run["batches"]),
        "rows": int(col.row_padding.size),
        "seq_len": recipe.packing.seq_len,
        "tokens_mean": float(run["tokens_mean"]),
        "tokens_p5": float(run["tokens_p5"]),
        "tokens_p95": float(run["tokens_p95"]),
        "padding_pct": float(run["padding_pct"]),
        "images_per_row": float(run["images_per_row"]),
        "drop_rate_mean": float(drop.mean()) if drop.size else 0.0,
        "drop_target_mean": float(target.mean()) if target.size else 0.0,
        "upscaled": sum(1 for i in im if i.scale > UPSCALE_LIMIT),
        "aspect_off": sum(1 for i in im if i.aspect_error > ASPECT_ERROR_LIMIT),
        "rows_over_padding": int(np.count_nonzero(col.row_padding > ROW_PADDING_LIMIT)),
        "traced": len(col.traced),
        "seconds_pass": col.seconds,
        "versions": library_versions(),
    }


class _Writer:
    """Writes PNGs into the report folder and remembers their names."""

    def __init__(self, out: Path) -> None:
        self.out = out
        self.files: list[str] = []

    def png(self, name: str, image: np.ndarray) -> tuple[str, int, int]:
        render.save_png(image, self.out / name)
        self.files.append(name)
        return name, int(image.shape[1]), int(image.shape[0])


def _display_fn(recipe: Recipe):
    out = recipe.output
    standardized = any(op.name == "standardize" for op in recipe.patch_ops)
    return partial(render.patches_to_display, mean=out.mean, std=out.std, standardized=standardized)


def _clip_panels(ps: PatchSet, frames: np.ndarray, stem: str, w: _Writer) -> str:
    """A clip's two extra panels: the strip of its chosen frames (after augmentation), and the
    token-time map (each temporal slice's first frame with the cells that slice kept; dropped cells
    shaded, masked ones hatched)."""
    clip = ps.meta.get("clip", {})
    t = int(clip.get("temporal_patch", 1))
    picks = clip.get("frames", list(range(len(frames))))
    side = max(24, PANEL // 3)
    strip = render.flow([render.fit(f, side) for f in frames], max_width=3 * PANEL, gap=3)
    name, pw_, ph_ = w.png(f"{stem}-frames.png", strip)
    f5 = figure(name, pw_, ph_, "chosen frames",
                f"{len(picks)} frames of {clip.get('of', '?')}: {', '.join(map(str, picks))}")
    gh, gw = ps.grid
    c = ps.coords.astype(np.int64)
    tiles = []
    for s in range(ps.frames):
        sel = ps.times == s
        present = np.zeros((gh, gw), bool)
        present[c[sel, 0], c[sel, 1]] = True
        masked = np.zeros((gh, gw), bool)
        if ps.masked is not None:
            masked[c[sel, 0], c[sel, 1]] = ps.masked[sel]
        shown = render.fit(frames[s * t], side)
        tiles.append(render.draw_grid(render.drop_map(shown, (gh, gw), present, masked), (gh, gw), amount=0.3))
    name, pw_, ph_ = w.png(f"{stem}-times.png", render.flow(tiles, max_width=3 * PANEL, gap=3))
    sent = np.bincount(ps.times, minlength=ps.frames).tolist()
    f6 = figure(name, pw_, ph_, "token-time map",
                f"{ps.frames} slices of {t} frame{'s' if t > 1 else ''}, tokens sent per slice: "
                f"{', '.join(map(str, sent))} of {gh * gw}")
    return f5 + f6


def _sample_card(t: Traced, n: int, recipe: Recipe, w: _Writer) -> str:
    head = f'<h3>{n}. <code>{esc(t.key)}</code> <span class="muted">{esc(Path(t.shard).name)} #{t.index}, ' \
           f"stream position {t.position}</span></h3>"
    if not t.ok:
        err = t.error
        reason = f"stage {err.stage}: {err.cause}" if err is not None else "no result"
        return f'<div class="card bad" data-sample="{esc(t.key)}">{head}<p>Skipped by the pipeline ' \
               f"(<code>{esc(reason)}</code>); the ledger counts it.</p></div>"
    tr = t.trace
    plan = tr["plan"]
    ps: PatchSet = tr["patchset"]
    original, decoded = tr["original"], tr["decoded"]
    meta = ps.meta
    src_h, src_w = (int(v) for v in meta.get("size", (original.height, original.width)))
    stem = f"sample-{n:02d}"

    # 1: the original, with the plan's crop when the plan was made on these very pixels
    shown = render.fit(original, PANEL)
    crop_note = ""
    full = plan.crop == (0, 0, plan.source[1], plan.source[0]) if plan.source != (0, 0) else True
    if decoded is original and not full:
        ph, pw = plan.source if plan.source != (0, 0) else (decoded.height, decoded.width)
        sy, sx = shown.shape[0] / ph, shown.shape[1] / pw
        left, top, right, bottom = plan.crop
        shown = render.draw_box(shown, (left * sx, top * sy, right * sx, bottom * sy))
        crop_note = "; crop outlined"
    decoded_note = ""
    if (original.width, original.height) != (src_w, src_h):
        decoded_note = f", decoded at {original.height}×{original.width}"
    name, pw_, ph_ = w.png(f"{stem}-original.png", shown)
    f1 = figure(name, pw_, ph_, "original", f"original {src_h}×{src_w}{decoded_note}{crop_note}")

    # 2: the resized image with its patch grid
    resized = tr["resized"]
    grid = (plan.grid_h, plan.grid_w)
    big = render.fit(resized, PANEL)
    name, pw_, ph_ = w.png(f"{stem}-grid.png", render.draw_grid(big, grid))
    f2 = figure(name, pw_, ph_, "resized with patch grid",
                f"resized {resized.shape[0]}×{resized.shape[1]}, grid {plan.grid_h}×{plan.grid_w} patches "
                f"of {plan.patch_size}px")

    # 3: after augmentation
    aug = tr["augmented"]
    changed = aug.shape != resized.shape or not np.array_equal(aug, resized)
    name, pw_, ph_ = w.png(f"{stem}-augmented.png", render.fit(aug, PANEL))
    f3 = figure(name, pw_, ph_, "augmented",
                "after augmentation" if changed else "after augmentation (this recipe changed nothing here)")

    # 4: kept / dropped / masked tokens
    present, masked = cells(ps)
    dm = render.draw_grid(render.drop_map(render.fit(aug, PANEL), grid, present, masked), grid, amount=0.3)
    name, pw_, ph_ = w.png(f"{stem}-drop.png", dm)
    total = plan.tokens
    dropped, hidden = int((~present).sum()), int((present & masked).sum())
    f4 = figure(name, pw_, ph_, "token map",
                f"{ps.num_tokens} of {total} tokens sent; {dropped} dropped (shaded), {hidden} masked (hatched)")

    clip_html = _clip_panels(ps, tr["frames"], stem, w) if tr.get("frames") is not None else ""
    left, top, right, bottom = plan.crop
    drop = meta.get("drop")
    rows = [
        ("label", esc(ps.label if ps.label is not None else "none")),
        ("file", esc(f"{meta.get('member', '?')} · {meta.get('format', '?')} {meta.get('mode', '')}")),
        ("source h×w", f"{src_h}×{src_w}"),
        ("crop", f"rows {top}–{bottom}, columns {left}–{right} = {bottom - top}×{right - left}"),
        ("content h×w", f"{plan.content_h}×{plan.content_w}" + (f" at row {plan.pad_top}, column {plan.pad_left}"
                                                                 if plan.pad_top or plan.pad_left else "")),
        ("grid h×w", f"{plan.grid_h}×{plan.grid_w} = {plan.tokens} tokens (budget {plan.budget})"),
        ("aspect error", f"{plan.aspect_error:.4f}" + (" ⚠" if plan.aspect_error > ASPECT_ERROR_LIMIT else "")),
        ("scale", f"{plan.scale:.3f}×" + (" ⚠ upscaled" if plan.scale > UPSCALE_LIMIT else "")),
        ("drop", (f"{drop['mode']}, target {drop['rate']:.3f}, "
                  + ("visible" if recipe.drop.output == "mask" else "kept") + f" {drop['kept']}/{drop['total']}")
         if drop else "none"),
        *([("clip", f"{meta['clip']['slices']} slices × {plan.grid_h}×{plan.grid_w}, frames "
                    f"{', '.join(map(str, meta['clip']['frames']))} of {meta['clip']['of']} "
                    f"({meta['clip']['fps']:g} fps)")] if "clip" in meta else []),
        ("tokens sent", str(ps.num_tokens)),
        ("same as pipeline", yes_no(t.matches_stream, "yes, identical tokens", "NO: tokens differ")),
    ]
    text = text_html(ps.text, recipe)
    text = f'<p class="text" data-text="{esc(ps.text)}">{text}</p>' if text else ""
    return (f'<div class="card" data-sample="{esc(t.key)}">{head}<div class="panels">{f1}{f2}{f3}{f4}{clip_html}'
            f'{table(rows, "plan")}</div>{text}</div>')


def _rows_section(col: Collected, recipe: Recipe, w: _Writer) -> str:
    display = _display_fn(recipe)
    p = recipe.sizing.patch_size
    parts = []
    for b, batch in enumerate(col.batches):
        parts.append(f"<h3>Batch {b} <span class=\"muted\">{batch.rows} rows × {batch.seq_len} tokens, "
                     f"{batch.num_images} images, {100 * batch.padding_fraction:.1f} % padding</span></h3>")
        for r in range(batch.rows):
            picture, items = render.row_picture(batch, r, p, display=display)
            name, pw_, ph_ = w.png(f"row-b{b}-r{r}.png", picture)
            pad = 1 - np.count_nonzero(batch.segment_ids[r]) / batch.seq_len
            texts = batch.texts[r]
            segs = "".join(f'{swatch(palette.segment_colour(it.segment))}<code>{esc(it.key)}</code> '
                           f"{it.grid[0]}×{it.grid[1]}, {it.tokens} tok{render.group_note(items, it)}"
                           + (f" {text_html(texts[it.segment - 1], recipe)}" if recipe.source.text_key else "")
                           for it in items)
            parts.append(f'<div class="row" data-row="{b}-{r}">{img(name, pw_, ph_, f"batch {b} row {r}")}'
                         f'<div class="segs">row {r}: {len(items)} images, {100 * pad:.1f} % padding'
                         f"{swatch(palette.PADDING)}padding{segs}</div></div>")
    if not parts:
        return "<p>No batch was packed.</p>"
    return "".join(parts)


def _determinism_section(col: Collected, recipe: Recipe, epoch: int, w: _Writer) -> tuple[str, bool | None]:
    ok = [t for t in col.traced if t.ok]
    if not ok:
        return "<p>No traced sample could be processed, so there is nothing to compare.</p>", None
    # the most nearly square traced image shows best in a row of four
    first = min(ok, key=lambda t: abs(np.log(t.trace["resized"].shape[1] / t.trace["resized"].shape[0])))
    det = determinism(col.records[first.position], recipe, epoch)

    def tile(trace: dict[str, Any], name: str) -> tuple[str, int, int]:
        ps = trace["patchset"]
        present, masked = cells(ps)
        grid = ps.grid
        pic = render.drop_map(render.fit(trace["augmented"], 220), grid, present, masked)
        return w.png(name, pic)

    figs = []
    for e in det["epochs"]:
        name, pw_, ph_ = tile(det["traces"][e], f"det-epoch-{e}.png")
        tr = det["traces"][e]
        figs.append(figure(name, pw_, ph_, f"epoch {e}",
                           f"epoch {e}: grid {tr['plan'].grid_h}×{tr['plan'].grid_w}, "
                           f"{tr['patchset'].num_tokens} tokens"))
    a = tile(det["traces"][epoch], "det-repeat-a.png")
    b = tile(det["repeat"], "det-repeat-b.png")
    pair = (figure(*a, f"epoch {epoch}, first run", f"epoch {epoch}, first run")
            + figure(*b, f"epoch {epoch}, second run", f"epoch {epoch}, second run"))
    distinct = det["distinct"]
    n_epochs = len(det["epochs"])
    vary = (f"{distinct} distinct results over {n_epochs} epochs"
            + ("" if distinct > 1 else " (this recipe draws nothing that changes with the epoch)"))
    diff = "n/a (sizes differ)" if det["max_diff"] is None else str(det["max_diff"])
    html_ = (f"<p>Sample <code>{esc(first.key)}</code>. Every random draw comes from (seed, epoch, key, "
             f"stage), so epochs may differ and a repeat must not.</p>"
             f'<div class="panels">{"".join(figs)}</div><p>{esc(vary)}.</p>'
             f'<h3>Same epoch twice</h3><div class="panels">{pair}</div>'
             f'<p>Pixel-identical: <span data-stat="identical">{yes_no(det["identical"])}</span> '
             f"(largest pixel difference {esc(diff)}; tokens compared by hash too).</p>")
    return html_, det["identical"]


def _summary_section(s: dict[str, Any]) -> str:
    reasons = s["skip_reasons"]
    skip_text = "; ".join(f"{n} × {r} (e.g. {', '.join(s['skip_examples'].get(r, []))})"
                          for r, n in sorted(reasons.items())) or "none"
    rows = [
        ("images read", stat("read", s["read"])),
        ("images emitted", stat("emitted", s["emitted"])),
        ("images skipped", stat("skipped", s["skipped"])),
        ("skip reasons", esc(skip_text)),
    ]
    if s["in_buffer"]:
        rows.append(("still buffered", stat("in_buffer", s["in_buffer"])))
    if s["repeated"]:
        rows.append(("re-read (equalised epoch)", stat("repeated", s["repeated"])))
    rows += [
        ("batches / rows", "<td class=\"num\">" + span("batches", s["batches"]) + " batches, "
         + span("rows", s["rows"]) + f" rows of {s['seq_len']} tokens</td>"),
        ("tokens / image", "<td class=\"num\">mean " + span("tokens_mean", s["tokens_mean"], f"{s['tokens_mean']:.1f}")
         + " · p5 " + span("tokens_p5", s["tokens_p5"], f"{s['tokens_p5']:.0f}")
         + " · p95 " + span("tokens_p95", s["tokens_p95"], f"{s['tokens_p95']:.0f}") + "</td>"),
        ("padding", stat("padding_pct", s["padding_pct"], f"{s['padding_pct']:.1f} %")),
        ("images / row", stat("images_per_row", s["images_per_row"], f"{s['images_per_row']:.2f}")),
        ("drop rate", "<td class=\"num\">realised " + span("drop_rate_mean", s["drop_rate_mean"],
                                                      f"{s['drop_rate_mean']:.3f}")
         + " · target " + span("drop_target_mean", s["drop_target_mean"], f"{s['drop_target_mean']:.3f}") + "</td>"),
    ]
    checks = table([
        (f"upscaled > {UPSCALE_LIMIT:g}×", stat("upscaled", s["upscaled"])),
        (f"aspect error > {ASPECT_ERROR_LIMIT:g}", stat("aspect_off", s["aspect_off"])),
        (f"rows > {100 * ROW_PADDING_LIMIT:g} % padding", stat("rows_over_padding", s["rows_over_padding"])),
        ("recipe", f"<code>{esc(s['recipe'])}</code>"),
        ("fingerprint", f'<td class="mono" data-stat="fingerprint">{esc(s["fingerprint"])}</td>'),
        ("shards", stat("shards", s["shards"])),
        ("epoch", stat("epoch", s["epoch"])),
        ("sampling seed", stat("seed", s["seed"])),
        ("traced samples", stat("traced", s["traced"])),
        ("versions", '<td class="mono">' + "<br>".join(
            f'<span data-version="{esc(name)}">{esc(name)} {esc(v)}</span>' for name, v in s["versions"].items())
         + "</td>"),
    ])
    return f'<div class="cols">{table(rows)}{checks}</div>'


def _clear_previous(out: Path) -> None:
    manifest = out / MANIFEST
    if not manifest.is_file():
        return
    try:
        old = json.loads(manifest.read_text(encoding="utf-8")).get("files", [])
    except (OSError, ValueError):
        return
    for name in old:
        path = out / name
        if "/" not in name and path.is_file():
            path.unlink()


def build_report(recipe: Recipe | str | Path, out_dir: str | Path, *, shards=None, samples: int = 12,
                 epoch: int = 0, progress: bool = True, allow_shell: bool = False, seed: int | None = None,
                 max_images: int | None = None) -> dict[str, Any]:
    """Write index.html and its PNGs into out_dir; return the summary numbers, flags and file list.

    One pass of the recipe's own Pipeline over its shards (or `shards`) gives every number; a
    seeded reservoir over the records read picks `samples` of them to draw stage by stage. `seed`
    seeds that choice (default: the recipe's seed); `max_images` stops reading after that many
    records (default: all).
    """
    started = time.perf_counter()
    if isinstance(recipe, (str, Path)):
        origin = str(recipe)
        recipe = Recipe.from_file(recipe)
    else:
        origin = "recipe object"
    seed = recipe.seed if seed is None else int(seed)
    shard_list = expand_shards(shards if shards is not None else recipe.source.shards, allow_shell=allow_shell,
                               image_keys=recipe.source.sample_keys)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    _clear_previous(out)

    col = collect(recipe, shards=shard_list, epoch=epoch, samples=samples, seed=seed, max_images=max_images,
                  keep_batches=BATCHES_SHOWN, progress=progress, allow_shell=allow_shell)
    summary = summarise(col, recipe, origin=origin, shards=shard_list, epoch=epoch, seed=seed)
    w = _Writer(out)

    cards = "".join(_sample_card(t, i + 1, recipe, w) for i, t in enumerate(col.traced)) or \
        "<p>No record was read.</p>"
    rows_html = _rows_section(col, recipe, w)
    det_html, identical = _determinism_section(col, recipe, epoch, w)

    notes = []
    if charts.available():
        chart_files = charts.write_charts(
            out, tokens=np.concatenate(col.run.tokens) if col.run.tokens else [],
            aspect_before=[i.aspect_before for i in col.images], aspect_after=[i.aspect_after for i in col.images],
            drop_rates=[i.drop_rate for i in col.images], target_rates=[i.target_rate for i in col.images],
            row_padding=col.row_padding, row_images=col.row_images, seq_len=recipe.packing.seq_len,
            has_drop=recipe.drop.mode != "none",
        )
        w.files += [c[0] for c in chart_files]
        charts_html = '<div class="charts">' + "".join(
            figure(name, width, height, caption, esc(caption)) for name, caption, width, height in chart_files) + "</div>"
    else:
        chart_files = []
        notes.append("charts need matplotlib: pip install 'patchloom[report]'")
        charts_html = "<p>Charts need matplotlib, which is not installed: <code>pip install " \
                      "'patchloom[report]'</code>.</p>"

    mismatched = [t.key for t in col.traced if t.matches_stream is False]
    flags = [f.to_dict() for f in find_flags(
        images=col.images, ledger=col.ledger, row_padding=col.row_padding,
        rows_in_last_batch=col.rows_in_last_batch, mismatched=mismatched, identical=identical,
    )]

    legend = ('<p class="legend">Colours (Okabe–Ito):'
              f"{swatch(palette.SEGMENTS[0])}{swatch(palette.SEGMENTS[1])}{swatch(palette.SEGMENTS[2])}"
              f"… one per image of a row{swatch(palette.PADDING)}padding"
              f"{swatch(palette.SHADE)}dropped token (shaded){swatch(palette.HATCH)}masked token (hatched)"
              f"{swatch(palette.GRID)}patch grid{swatch(palette.CROP)}crop</p>")
    n_traced = len(col.traced)
    body = [
        (f"<h1>patchloom inspect</h1><p class=\"lead\"><code>{esc(origin)}</code> · epoch {epoch} · "
         f"{summary['shards']} shards · recipe <code>{esc(summary['fingerprint'][:12])}</code></p>"),
        flags_block(flags),
        "<h2 id=\"summary\">Summary</h2>", _summary_section(summary),
        *(f"<p class=\"muted\">{esc(n)}</p>" for n in notes),
        (f"<h2 id=\"samples\">Samples</h2><p class=\"muted\">{n_traced} records chosen by seeded reservoir "
         f"sampling (seed {seed}) over the {summary['read']} records read, each run again through the "
         "pipeline's per-sample chain with every stage kept.</p>" + legend), cards,
        ("<h2 id=\"rows\">Packed rows</h2><p class=\"muted\">Each row of the first packed batches: its tokens "
         "as cells coloured by segment id, then every image of the row rebuilt from its tokens alone, "
         "placed by their (row, col) coords.</p>"), rows_html,
        "<h2 id=\"charts\">Distributions</h2>", charts_html,
        "<h2 id=\"determinism\">Determinism</h2>", det_html,
        (f"<footer>Written by patchloom {esc(summary['versions']['patchloom'])}. One page, "
         f"{len(w.files)} PNG files beside it; no scripts, no network.</footer>"),
    ]
    (out / "index.html").write_text(document(f"patchloom inspect: {origin}", body), encoding="utf-8")
    files = ["index.html", *w.files]
    summary["seconds"] = time.perf_counter() - started
    result = {"summary": summary, "flags": flags, "files": files + [MANIFEST], "notes": notes,
              "out_dir": str(out), "index": str(out / "index.html")}
    (out / MANIFEST).write_text(json.dumps(result, indent=2, default=str) + "\n", encoding="utf-8")
    return result


def format_summary(result: dict[str, Any]) -> str:
    """The terminal version: the same numbers and flags as the page."""
    s = result["summary"]
    title = f"patchloom inspect {s['recipe']}  (recipe {s['fingerprint'][:12]})"
    rows = [
        ("images read", f"{s['read']}"),
        ("images emitted", f"{s['emitted']}"),
        ("images skipped", f"{s['skipped']}"),
        ("batches", f"{s['batches']} ({s['rows']} rows of {s['seq_len']})"),
        ("tokens / image", f"mean {s['tokens_mean']:.1f}  p5 {s['tokens_p5']:.0f}  p95 {s['tokens_p95']:.0f}"),
        ("padding", f"{s['padding_pct']:.1f} %"),
        ("images / row", f"{s['images_per_row']:.2f}"),
        ("drop rate", f"realised {s['drop_rate_mean']:.3f}  target {s['drop_target_mean']:.3f}"),
    ]
    width = max(len(k) for k, _ in rows)
    lines = [title, "-" * len(title)] + [f"  {k:<{width}}  {v}" for k, v in rows]
    for reason, n in sorted(s["skip_reasons"].items()):
        eg = ", ".join(s["skip_examples"].get(reason, []))
        lines.append(f"  {'skipped':<{width}}  {n} x {reason}" + (f"  (e.g. {eg})" if eg else ""))
    flags = result["flags"]
    lines.append(f"flags: {len(flags) or 'none'}")
    for f in flags:
        lines.append(f"  ! {f['code']}: {f['message']}")
    for note in result.get("notes", []):
        lines.append(f"  note: {note}")
    lines.append(f"report: {result['index']}  ({len(result['files'])} files, {s['seconds']:.1f} s)")
    return "\n".join(lines)
