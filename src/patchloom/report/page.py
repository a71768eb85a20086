"""The report's single HTML page: inline CSS, no scripts, no external resources.

Every number a test or a script may want to read carries `data-stat="name"` (and, for floats, the
unrounded value in `data-value`), so the page can be checked without parsing its prose.
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Sequence
from typing import Any

from . import palette

CSS = """
:root { --ink:#1d1d1f; --muted:#5b5b60; --line:#d9d9de; --panel:#f6f6f8; }
* { box-sizing: border-box; }
body { margin: 0; padding: 24px 32px 48px; color: var(--ink); background: #fff;
       font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width: 1340px; margin: 0 auto; }
h1 { font-size: 22px; margin: 0 0 4px; }
h2 { font-size: 17px; margin: 32px 0 10px; padding-bottom: 4px; border-bottom: 1px solid var(--line); }
h3 { font-size: 14px; margin: 0 0 6px; }
p.lead, .muted { color: var(--muted); }
code, .mono { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size: 12.5px; }
table { border-collapse: collapse; }
td, th { padding: 2px 12px 2px 0; max-width: 380px; overflow-wrap: anywhere; vertical-align: top; text-align: left; }
th { color: var(--muted); font-weight: 600; white-space: nowrap; }
table.stats td.num { font-variant-numeric: tabular-nums; }
.cols { display: flex; gap: 40px; flex-wrap: wrap; align-items: flex-start; }
.flags { margin: 16px 0 8px; }
.flag { border-left: 5px solid #d55e00; background: #fbf1ea; padding: 7px 12px; margin: 6px 0; }
.flag.ok { border-left-color: #009e73; background: #eaf6f1; }
.flag .eg { color: var(--muted); font-size: 12.5px; }
.legend span.sw { display: inline-block; width: 14px; height: 14px; vertical-align: -2px;
                  margin: 0 4px 0 12px; border: 1px solid #999; }
.card { border: 1px solid var(--line); border-radius: 6px; padding: 12px; margin: 14px 0; background: #fff; }
.card.bad { border-color: #d55e00; }
.panels { display: flex; gap: 12px; align-items: flex-start; flex-wrap: wrap; }
.card .panels { flex-wrap: nowrap; }
.card figure { flex: 0 0 auto; width: 236px; }
.card table.plan { flex: 1 1 auto; }
figure { margin: 0; }
figure img { display: block; border: 1px solid var(--line); background: var(--panel);
             image-rendering: pixelated; }
figcaption { font-size: 12px; color: var(--muted); margin-top: 4px; max-width: 236px; }
table.plan { font-size: 12px; }
table.plan td, table.plan th { padding: 1px 8px 1px 0; }
.row { margin: 12px 0 18px; }
.row img { display: block; border: 0; image-rendering: pixelated; }
.segs { font-size: 12px; color: var(--muted); margin: 4px 0 0; }
.segs span.sw { display: inline-block; width: 11px; height: 11px; vertical-align: -1px; margin: 0 3px 0 10px; }
.charts { display: flex; flex-wrap: wrap; gap: 18px; }
.charts img { border: 0; image-rendering: auto; }
.yes { color: #007a5a; font-weight: 600; } .no { color: #b84c00; font-weight: 600; }
footer { margin-top: 40px; color: var(--muted); font-size: 12px; }
"""


def esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def stat(name: str, value: Any, text: str | None = None) -> str:
    """A table cell holding a machine-readable number."""
    extra = f' data-value="{esc(repr(float(value)))}"' if isinstance(value, float) else ""
    shown = esc(text if text is not None else value)
    return f'<td class="num" data-stat="{esc(name)}"{extra}>{shown}</td>'


def span(name: str, value: Any, text: str | None = None) -> str:
    """An inline machine-readable number (several in one cell)."""
    extra = f' data-value="{esc(repr(float(value)))}"' if isinstance(value, float) else ""
    shown = esc(text if text is not None else value)
    return f'<span data-stat="{esc(name)}"{extra}>{shown}</span>'


def img(src: str, width: int, height: int, alt: str) -> str:
    return f'<img src="{esc(src)}" width="{width}" height="{height}" alt="{esc(alt)}">'


def figure(src: str, width: int, height: int, alt: str, caption: str) -> str:
    return f"<figure>{img(src, width, height, alt)}<figcaption>{caption}</figcaption></figure>"


def swatch(rgb: tuple[int, int, int], cls: str = "sw") -> str:
    return f'<span class="{cls}" style="background:{palette.hex_colour(rgb)}"></span>'


def table(rows: Iterable[tuple[str, str]], cls: str = "stats") -> str:
    """Rows of (label, cell html) where the cell html is a full <td> or plain text."""
    body = []
    for label, cell in rows:
        cell = cell if cell.startswith("<td") else f"<td>{cell}</td>"
        body.append(f"<tr><th>{esc(label)}</th>{cell}</tr>")
    return f'<table class="{cls}">' + "".join(body) + "</table>"


def yes_no(flag: bool | None, yes: str = "yes", no: str = "no", unknown: str = "not checked") -> str:
    if flag is None:
        return f'<span class="muted">{esc(unknown)}</span>'
    return f'<span class="yes">{esc(yes)}</span>' if flag else f'<span class="no">{esc(no)}</span>'


def flags_block(flags: Sequence[dict[str, Any]]) -> str:
    if not flags:
        return '<div class="flags" id="flags"><div class="flag ok" data-flag="none">Nothing looks wrong: ' \
               "no flags.</div></div>"
    items = []
    for f in flags:
        eg = ", ".join(f["examples"])
        eg_html = f'<div class="eg">e.g. {esc(eg)}</div>' if eg else ""
        items.append(f'<div class="flag" data-flag="{esc(f["code"])}"><b>{esc(f["code"])}</b>: '
                     f'{esc(f["message"])}{eg_html}</div>')
    return '<div class="flags" id="flags">' + "".join(items) + "</div>"


def document(title: str, body: Sequence[str]) -> str:
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<title>{esc(title)}</title><style>{CSS}</style></head>\n<body><main>\n"
        + "\n".join(body) + "\n</main></body></html>\n"
    )
