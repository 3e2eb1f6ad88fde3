"""One self-contained HTML page per command (``report.html`` and its siblings).

:class:`Page` is the one page builder every report uses: a title block, a table of
contents, sections with paragraphs, tables (from pandas), figures (PNG bytes,
embedded as base64 data URIs) and lists, and the caution at the top and the end.
The page loads nothing: no scripts, fonts, style sheets or images from anywhere
else, so it can be mailed, archived or printed as it is. The style is plain
(system serif for text, system sans-serif for tables and headings), and a print
style sheet keeps figures and table rows from splitting across pages and prints
link targets of the contents as plain text.
"""

from __future__ import annotations

import base64
import datetime as dt
import html
import math
from typing import Iterable, Sequence

import numpy as np
import pandas as pd

CSS = """
:root { --ink: #1d232a; --muted: #5b6670; --rule: #d5dade; --band: #f3f5f6; --accent: #1f5f8b;
        --warn: #8a4b00; --warnbg: #fff6e8; }
* { box-sizing: border-box; }
html { font-size: 16px; }
body { margin: 0 auto; max-width: 72rem; padding: 1.5rem 2rem 3rem; color: var(--ink);
       font-family: Georgia, "Times New Roman", "DejaVu Serif", serif; line-height: 1.5; background: #fff; }
h1, h2, h3, nav, table, .meta, figcaption, .caution, .kv dt {
       font-family: "Helvetica Neue", Arial, "DejaVu Sans", "Liberation Sans", sans-serif; }
h1 { font-size: 1.7rem; margin: 0 0 .2rem; letter-spacing: -.01em; }
h2 { font-size: 1.25rem; margin: 2.4rem 0 .6rem; padding-bottom: .25rem; border-bottom: 2px solid var(--accent); }
h3 { font-size: 1.05rem; margin: 1.6rem 0 .4rem; color: var(--accent); }
p { margin: .4rem 0 .8rem; max-width: 48rem; }
.meta { color: var(--muted); font-size: .88rem; margin-bottom: 1rem; }
.caution { border-left: 4px solid var(--warn); background: var(--warnbg); padding: .6rem 1rem; margin: 1rem 0;
           font-size: .92rem; max-width: 56rem; }
nav { font-size: .9rem; background: var(--band); padding: .6rem 1rem; margin: 1rem 0 1.5rem; }
nav ol { margin: .2rem 0; padding-left: 1.4rem; columns: 2; }
nav a { color: var(--accent); text-decoration: none; }
table { border-collapse: collapse; font-size: .82rem; margin: .5rem 0 1.2rem; font-variant-numeric: tabular-nums; }
th, td { padding: .22rem .6rem; border-bottom: 1px solid var(--rule); text-align: left; vertical-align: top; }
th { background: var(--band); font-weight: 600; border-bottom: 1.5px solid #aab3ba; max-width: 8.5rem;
     vertical-align: bottom; }
td.num { text-align: right; white-space: nowrap; }
td.short { white-space: nowrap; }
th.num { text-align: right; }
tr.total td { font-weight: 600; border-top: 1.5px solid #aab3ba; }
td.hash { font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: .75rem; word-break: break-all; }
.scroll { overflow-x: auto; }
figure { margin: 1rem 0 1.6rem; }
figure img { max-width: 100%; height: auto; display: block; border: 1px solid var(--rule); }
figcaption { font-size: .82rem; color: var(--muted); margin-top: .3rem; max-width: 56rem; }
ul.notes { font-size: .9rem; max-width: 56rem; }
.kv { display: grid; grid-template-columns: max-content 1fr; gap: .15rem 1.2rem; font-size: .9rem;
      margin: .5rem 0 1rem; }
.kv dt { color: var(--muted); }
.kv dd { margin: 0; }
footer { margin-top: 3rem; font-size: .8rem; color: var(--muted); border-top: 1px solid var(--rule);
         padding-top: .6rem; }
@media print {
  @page { size: A4; margin: 14mm 12mm; }
  html { font-size: 11pt; }
  body { max-width: none; padding: 0; }
  nav { display: none; }
  h2 { break-before: auto; break-after: avoid; }
  h3 { break-after: avoid; }
  figure, tr, .caution, .kv { break-inside: avoid; }
  figure img { border: none; max-height: 24cm; width: auto; max-width: 100%; }
  thead { display: table-header-group; }
  .scroll { overflow: visible; }
  a { color: inherit; text-decoration: none; }
}
"""


def _esc(text) -> str:
    return html.escape(str(text), quote=True)


def cell_text(v, digits: int = 3) -> str:
    """A table cell: numbers rounded for reading, blanks for missing values."""
    if v is None:
        return ""
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        if not math.isfinite(float(v)):
            return ""
        return f"{float(v):.{digits}f}"
    return str(v)


class Page:
    """A report page. Add sections in order, then :meth:`render` the HTML text."""

    def __init__(self, title: str, subtitle: str = "", caution: str = "", meta: dict | None = None):
        self.title, self.subtitle, self.caution = title, subtitle, caution
        self.meta = meta or {}
        self.parts: list[str] = []
        self.toc: list[tuple[str, str]] = []
        self.n_figures = 0

    # -- structure -------------------------------------------------------
    def section(self, title: str) -> "Page":
        anchor = f"s{len(self.toc) + 1}"
        self.toc.append((anchor, title))
        self.parts.append(f'<h2 id="{anchor}">{_esc(title)}</h2>')
        return self

    def subsection(self, title: str, anchor: str | None = None) -> "Page":
        a = f' id="{_esc(anchor)}"' if anchor else ""
        self.parts.append(f"<h3{a}>{_esc(title)}</h3>")
        return self

    def paragraph(self, text: str) -> "Page":
        self.parts.append(f"<p>{_esc(text)}</p>")
        return self

    def notes(self, items: Iterable[str], empty: str = "None.") -> "Page":
        items = list(items)
        if not items:
            return self.paragraph(empty)
        self.parts.append('<ul class="notes">' + "".join(f"<li>{_esc(i)}</li>" for i in items) + "</ul>")
        return self

    def facts(self, pairs: Sequence[tuple[str, object]]) -> "Page":
        """A two-column list of labels and values."""
        self.parts.append('<dl class="kv">' + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(cell_text(v))}</dd>"
                                                      for k, v in pairs) + "</dl>")
        return self

    def table(self, df: pd.DataFrame, digits: dict | None = None, headers: dict | None = None,
              total_rows: Sequence[bool] | None = None, hash_columns: Sequence[str] = ()) -> "Page":
        """A table of ``df``; ``digits`` per column (default 3), ``headers`` to rename columns,
        ``total_rows`` marks rows to set in bold (e.g. all glaciers)."""
        digits = digits or {}
        headers = headers or {}
        numeric = {c: df[c].dtype.kind in "if" for c in df.columns}
        head = "".join(f'<th class="{"num" if numeric[c] else ""}">{_esc(headers.get(c, c))}</th>'
                       for c in df.columns)
        rows = []
        for i, r in enumerate(df.itertuples(index=False)):
            cls = ' class="total"' if total_rows is not None and total_rows[i] else ""
            cells = []
            for c, v in zip(df.columns, r):
                text = cell_text(v, digits.get(c, 3))
                klass = "num" if numeric[c] else ("hash" if c in hash_columns else
                                                  ("short" if len(text) <= 24 else ""))
                cells.append(f'<td class="{klass}">{_esc(text)}</td>')
            rows.append(f"<tr{cls}>{''.join(cells)}</tr>")
        self.parts.append(f'<div class="scroll"><table><thead><tr>{head}</tr></thead>'
                          f'<tbody>{"".join(rows)}</tbody></table></div>')
        return self

    def figure(self, png: bytes, alt: str, caption: str = "") -> "Page":
        """Embed a PNG (bytes) with its alternative text and caption."""
        self.n_figures += 1
        data = base64.b64encode(png).decode("ascii")
        w, h = png_size(png)
        cap = f"<figcaption>{_esc(caption)}</figcaption>" if caption else ""
        self.parts.append(f'<figure><img src="data:image/png;base64,{data}" alt="{_esc(alt)}" '
                          f'width="{w}" height="{h}" loading="eager">{cap}</figure>')
        return self

    # -- output ----------------------------------------------------------
    def render(self) -> str:
        created = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        meta = " · ".join(_esc(f"{k}: {v}") for k, v in {**self.meta, "written": created}.items())
        toc = "".join(f'<li><a href="#{a}">{_esc(t)}</a></li>' for a, t in self.toc)
        caution = f'<div class="caution"><strong>Caution.</strong> {_esc(self.caution)}</div>' if self.caution else ""
        return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
                "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
                f"<title>{_esc(self.title)}</title><style>{CSS}</style></head><body>"
                f"<header><h1>{_esc(self.title)}</h1>"
                + (f"<div class=\"meta\">{_esc(self.subtitle)}</div>" if self.subtitle else "")
                + f"<div class=\"meta\">{meta}</div>{caution}</header>"
                f"<nav><strong>Contents</strong><ol>{toc}</ol></nav><main>"
                + "\n".join(self.parts)
                + f"</main><footer>{caution}</footer></body></html>\n")


def png_size(png: bytes) -> tuple[int, int]:
    """Width and height in pixels from a PNG's IHDR chunk (PNG specification, ISO/IEC 15948)."""
    if png[:8] != b"\x89PNG\r\n\x1a\n":
        raise ValueError("not a PNG")
    return int.from_bytes(png[16:20], "big"), int.from_bytes(png[20:24], "big")
