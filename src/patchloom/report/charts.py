"""Histograms of the collected numbers, drawn with matplotlib's Agg canvas (no pyplot, no display).

matplotlib is the `report` extra: it is imported here, lazily, and `available()` says whether it
can be. Each chart is one small PNG with our own labels; colours are Okabe–Ito (see palette).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from . import palette

#: Pixel size of every chart.
SIZE = (430, 290)


def available() -> bool:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def _figure(title: str, xlabel: str, ylabel: str = "images"):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(SIZE[0] / 100, SIZE[1] / 100), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0.13, 0.17, 0.83, 0.72))
    ax.set_title(title, fontsize=10, loc="left")
    ax.set_xlabel(xlabel, fontsize=9)
    ax.set_ylabel(ylabel, fontsize=9)
    ax.tick_params(labelsize=8)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.grid(axis="y", color="#dddddd", linewidth=0.6)
    ax.set_axisbelow(True)
    return fig, ax


def _rgb(c: tuple[int, int, int]) -> tuple[float, float, float]:
    return tuple(v / 255 for v in c)


def _save(fig, path: Path) -> Path:
    fig.savefig(path, format="png")
    return path


def _empty(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, fontsize=9, color="#555555")
    ax.set_yticks([])


def histogram(values: Sequence[float], path: Path, *, title: str, xlabel: str, ylabel: str = "images",
              bins: int | np.ndarray = 30, colour=palette.BLUE, integer: bool = False,
              empty: str = "nothing to show") -> Path:
    """One histogram; `integer` puts one bar per whole number."""
    fig, ax = _figure(title, xlabel, ylabel)
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        _empty(ax, empty)
    else:
        if integer:
            lo, hi = int(v.min()), int(v.max())
            bins = np.arange(lo - 0.5, hi + 1.5, 1.0)
        ax.hist(v, bins=bins, color=_rgb(colour), edgecolor="white", linewidth=0.5)
        ax.axvline(float(v.mean()), color=_rgb(palette.VERMILLION), linewidth=1.2, linestyle="--",
                   label=f"mean {v.mean():.3g}")
        ax.legend(fontsize=8, frameon=False)
    return _save(fig, path)


def aspect_chart(before: Sequence[float], after: Sequence[float], path: Path) -> Path:
    """Aspect ratios (width / height) of the sources and of their patch grids, log-scaled axis."""
    fig, ax = _figure("Aspect ratio, source vs patch grid", "width / height (log scale)")
    b = np.asarray(before, dtype=float)
    a = np.asarray(after, dtype=float)
    b, a = b[np.isfinite(b) & (b > 0)], a[np.isfinite(a) & (a > 0)]
    if b.size == 0 and a.size == 0:
        _empty(ax, "no images")
        return _save(fig, path)
    both = np.concatenate([b, a])
    lo, hi = both.min() / 1.15, both.max() * 1.15
    bins = np.geomspace(lo, hi, 36)
    ax.hist(b, bins=bins, color=_rgb(palette.ORANGE), alpha=0.85, label="source", histtype="stepfilled")
    ax.hist(a, bins=bins, color=_rgb(palette.BLUE), label="grid", histtype="step", linewidth=1.6)
    ax.set_xscale("log")
    ticks = [t for t in (1 / 16, 1 / 8, 1 / 4, 1 / 2, 1, 2, 4, 8, 16) if lo <= t <= hi]
    if ticks:
        ax.set_xticks(ticks, [f"1/{round(1 / t)}" if t < 1 else f"{t:g}" for t in ticks])
        ax.xaxis.set_minor_formatter("")
    ax.legend(fontsize=8, frameon=False)
    return _save(fig, path)


def write_charts(out_dir: Path, *, tokens: Sequence[float], aspect_before: Sequence[float],
                 aspect_after: Sequence[float], drop_rates: Sequence[float], target_rates: Sequence[float],
                 row_padding: Sequence[float], row_images: Sequence[float], seq_len: int,
                 has_drop: bool) -> list[tuple[str, str, int, int]]:
    """Every chart as (file name, caption, width, height)."""
    out: list[tuple[str, str, int, int]] = []

    def add(name: str, caption: str, draw) -> None:
        draw(out_dir / name)
        out.append((name, caption, *SIZE))

    add("chart-tokens.png", "Tokens per image as packed (after dropping).",
        lambda p: histogram(tokens, p, title="Tokens per image", xlabel="tokens", colour=palette.BLUE))
    add("chart-aspect.png", "Aspect ratios of the sources (filled) and of the patch grids they got (line).",
        lambda p: aspect_chart(aspect_before, aspect_after, p))

    def drops(p: Path) -> Path:
        fig, ax = _figure("Drop rate per image", "share of grid cells dropped or masked")
        d = np.asarray(drop_rates, dtype=float)
        if not has_drop or d.size == 0:
            _empty(ax, "this recipe drops no tokens")
        else:
            t = np.asarray(target_rates, float)
            lo, hi = float(min(d.min(), t.min(initial=1.0))), float(max(d.max(), t.max(initial=0.0)))
            pad = max(0.02, 0.05 * (hi - lo))
            bins = np.linspace(max(0.0, lo - pad), min(1.0, hi + pad), 26)
            ax.hist(d, bins=bins, color=_rgb(palette.BLUISH_GREEN), edgecolor="white", linewidth=0.5,
                    label=f"realised (mean {d.mean():.3f})")
            ax.hist(t, bins=bins, histtype="step", linewidth=1.4,
                    color=_rgb(palette.REDDISH_PURPLE), label="drawn target")
            ax.legend(fontsize=8, frameon=False)
        return _save(fig, p)

    add("chart-drop.png", "Realised drop rate per image, with the target rate drawn for it.", drops)
    add("chart-padding.png", f"Padding per packed row (share of the {seq_len} token slots).",
        lambda p: histogram(np.asarray(row_padding, float) * 100, p, title="Padding per row",
                            xlabel="padding (% of the row)", ylabel="rows", colour=palette.SKY_BLUE,
                            bins=np.linspace(0, 100, 21)))
    add("chart-images-per-row.png", "Images per packed row.",
        lambda p: histogram(row_images, p, title="Images per row", xlabel="images", ylabel="rows",
                            colour=palette.ORANGE, integer=True))
    return out
