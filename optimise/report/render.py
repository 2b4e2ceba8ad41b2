"""Rendering of the report's sections: the blocks a section is made of, the self-contained HTML
page (inline style sheet and column-sorting script, figures as data URIs) and its Markdown twin.

A section is (key, title, blocks); a block is a paragraph (str), `Link` (a paragraph with a
link to a file beside the report), `Bullets`, `Table`, `Details` (a folded table),
`Figure` (PNG bytes) or the margin `Legend`. The caution is the report's first section and
appears once.
"""
from __future__ import annotations

import base64
import html
from dataclasses import dataclass, field

import numpy as np

from ..review.text import markdown_table

# Margin tones: below TIGHT (relative margin) the cell is red, below CLOSE amber, else green.
TIGHT, CLOSE = 0.05, 0.20
TONES = {"tight": "#f2b8b2", "close": "#f7dc8f", "ample": "#bfe3c6", "off": "#e4e4e4"}


@dataclass
class Cell:
    """A table cell: shown text, value to sort by (number or text) and an optional tone."""

    text: str
    sort: object = None
    tone: str = ""


@dataclass
class Table:
    """A table with an HTML id; header is a list of (key, label); rows of Cells."""

    key: str
    header: list
    rows: list
    row_class: list = field(default_factory=list)
    sortable: bool = True


@dataclass
class Figure:
    key: str
    png: bytes
    caption: str


@dataclass
class Bullets:
    items: list


@dataclass
class Details:
    """A block shown folded in the HTML page (a long table), plainly in Markdown."""

    summary: str
    table: Table


@dataclass
class Link:
    """A paragraph ending in a link to a file beside the report: text, href, text after."""

    text: str
    href: str
    after: str = ""


@dataclass
class Legend:
    """The margin colour legend."""


def short(v, digits: int = 4) -> str:
    """A number to `digits` significant digits, "n/a" when not finite."""
    v = float(v)
    return f"{v:.{digits}g}" if np.isfinite(v) else "n/a"


def num_cell(v, factor: float = 1.0, digits: int = 4) -> Cell:
    """A numeric cell: v times factor shown `short`, sorted by its value (blank sort key when not finite)."""
    v = float(v)
    return Cell(short(v * factor, digits), v * factor if np.isfinite(v) else None)


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:0 auto;max-width:1240px;padding:0 18px 40px;
color:#1e2328;line-height:1.45}
h1{font-size:1.6em;margin:18px 0 6px}h2{font-size:1.2em;margin:28px 0 8px;border-bottom:2px solid #2f5d7c;
padding-bottom:3px}
nav{font-size:.9em;margin:6px 0 10px}nav a{margin-right:12px;color:#2f5d7c}
.caution{border:3px solid #b3261e;background:#fdecea;padding:10px 14px;font-weight:600;font-size:1.05em}
.scroll{overflow-x:auto}
table{border-collapse:collapse;font-size:.85em;margin:8px 0}
th,td{border:1px solid #c9d1d9;padding:3px 7px;text-align:right;white-space:nowrap}
th{background:#e8eef3;position:sticky;top:0}
table.sortable th{cursor:pointer;user-select:none}
table.sortable th[aria-sort=ascending]::after{content:" \\25B2";font-size:.75em}
table.sortable th[aria-sort=descending]::after{content:" \\25BC";font-size:.75em}
td.text,th.text{text-align:left}
tr.nominal td{font-weight:700}
#job-table td{text-align:left;white-space:normal}
td.tight,.sw.tight{background:%(tight)s}td.close,.sw.close{background:%(close)s}
td.ample,.sw.ample{background:%(ample)s}td.off,.sw.off{background:%(off)s}
.legend{font-size:.85em}.sw{display:inline-block;width:1.1em;height:.9em;border:1px solid #999;
vertical-align:middle;margin:0 4px 0 12px}
details summary{cursor:pointer;color:#2f5d7c;margin:6px 0}
figure{margin:10px 0}figure img{max-width:100%%;border:1px solid #dde}#fig-fronts img{max-width:980px}figcaption{font-size:.85em;color:#444}
""" % TONES

_JS = """
(function () {
  // Sort key of a cell: its data-sort value (else its text) as a number when it reads as
  // one, else as lower-case text; empty cells give null and always sort last.
  function key(cell) {
    var raw = cell.getAttribute("data-sort");
    if (raw === null) { raw = cell.textContent; }
    if (raw === "") { return null; }
    var x = Number(raw);
    return isNaN(x) ? raw.toLowerCase() : x;
  }
  function compare(a, b) {
    var na = typeof a === "number", nb = typeof b === "number";
    if (na !== nb) { return na ? -1 : 1; }
    return a < b ? -1 : (a > b ? 1 : 0);
  }
  function sortBy(table, col, th) {
    var body = table.tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    var dir = th.getAttribute("aria-sort") === "ascending" ? -1 : 1;
    rows.sort(function (r1, r2) {
      var a = key(r1.cells[col]), b = key(r2.cells[col]);
      if (a === null || b === null) { return (a === null) - (b === null); }
      return dir * compare(a, b);
    });
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (h) { h.removeAttribute("aria-sort"); });
    th.setAttribute("aria-sort", dir === 1 ? "ascending" : "descending");
    rows.forEach(function (r) { body.appendChild(r); });
  }
  Array.prototype.forEach.call(document.querySelectorAll("table.sortable"), function (table) {
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (th, col) {
      th.title = "click to sort";
      th.tabIndex = 0;
      th.addEventListener("click", function () { sortBy(table, col, th); });
      th.addEventListener("keydown", function (e) { if (e.key === "Enter") { sortBy(table, col, th); } });
    });
  });
})();
"""


def _legend_text(md: bool) -> str:
    if md:
        return (f"Margins: `!!` below {100 * TIGHT:g} % of the limit, `!` below {100 * CLOSE:g} %, unmarked above; "
                f"`off` where the target is not set.")
    sw = lambda tone, text: f'<span class="sw {tone}"></span>{text}'  # noqa: E731
    return ('<p class="legend">Margin colours:' + sw("tight", f"below {100 * TIGHT:g} % of the limit")
            + sw("close", f"{100 * TIGHT:g} to {100 * CLOSE:g} %") + sw("ample", f"{100 * CLOSE:g} % or more")
            + sw("off", "target not set") + "</p>")


def _is_text_column(rows, k) -> bool:
    return any(isinstance(r[k].sort, str) or (r[k].sort is None and r[k].text) for r in rows)


def _sort_text(v) -> str:
    """A data-sort attribute value: text as is, numbers as JavaScript's Number() reads them."""
    if isinstance(v, str):
        return v
    v = float(v)
    return repr(v) if np.isfinite(v) else ("" if np.isnan(v) else "Infinity" if v > 0 else "-Infinity")


def _html_table(b: Table) -> str:
    e = html.escape
    text_cols = [_is_text_column(b.rows, k) for k in range(len(b.header))]
    text_attr = ' class="text"'
    head = "".join(f'<th data-key="{e(k)}"{text_attr if text_cols[i] else ""}>{e(lab)}</th>'
                   for i, (k, lab) in enumerate(b.header))
    body = []
    for i, row in enumerate(b.rows):
        rc = b.row_class[i] if i < len(b.row_class) else ""
        tds = []
        for k, c in enumerate(row):
            classes = " ".join(x for x in ("text" if text_cols[k] else "", c.tone) if x)
            attr = (f' class="{classes}"' if classes else "") + (
                "" if c.sort is None else f' data-sort="{e(_sort_text(c.sort))}"')
            tds.append(f"<td{attr}>{e(c.text)}</td>")
        body.append((f'<tr class="{rc}">' if rc else "<tr>") + "".join(tds) + "</tr>")
    cls = ' class="sortable"' if b.sortable else ""
    return (f'<div class="scroll"><table id="{b.key}"{cls}><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(body)}</tbody></table></div>")


def render_html(title: str, secs: list) -> str:
    """The self-contained page: inline CSS and JS, figures as data URIs, no external resource."""
    e = html.escape
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">', f"<title>{e(title)}</title>",
           f"<style>{_CSS}</style></head><body>", f"<h1>{e(title)}</h1>",
           "<nav>" + "".join(f'<a href="#{k}">{e(t)}</a>' for k, t, _ in secs) + "</nav>"]
    for key, name, blocks in secs:
        out.append(f'<section id="{key}"><h2>{e(name)}</h2>')
        for b in blocks:
            if isinstance(b, str):
                out.append(f'<p class="caution">{e(b)}</p>' if key == "caution" else f"<p>{e(b)}</p>")
            elif isinstance(b, Link):
                out.append(f'<p>{e(b.text)} <a href="{e(b.href)}">{e(b.href)}</a>{e(b.after)}</p>')
            elif isinstance(b, Bullets):
                out.append("<ul>" + "".join(f"<li>{e(x)}</li>" for x in b.items) + "</ul>")
            elif isinstance(b, Legend):
                out.append(_legend_text(False))
            elif isinstance(b, Figure):
                src = base64.b64encode(b.png).decode("ascii")
                out.append(f'<figure id="fig-{b.key}"><img alt="{e(b.caption)}" src="data:image/png;base64,{src}">'
                           f"<figcaption>{e(b.caption)}</figcaption></figure>")
            elif isinstance(b, Table):
                out.append(_html_table(b))
            elif isinstance(b, Details):
                out.append(f"<details><summary>{e(b.summary)}</summary>{_html_table(b.table)}</details>")
        out.append("</section>")
    out.append(f"<script>{_JS}</script></body></html>")
    return "\n".join(out) + "\n"


def render_markdown(title: str, secs: list, figure_files: dict) -> str:
    """The Markdown twin: same sections, Markdown tables, figures as PNG files beside it."""
    mark = {"tight": " !!", "close": " !"}
    esc = lambda s: str(s).replace("|", "\\|")  # noqa: E731
    out = [f"# {title}", ""]
    for key, name, blocks in secs:
        out += [f"## {name}", ""]
        for b in blocks:
            if isinstance(b, str):
                out += [f"> **{b}**" if key == "caution" else b, ""]
            elif isinstance(b, Link):
                out += [f"{b.text} [{b.href}]({b.href}){b.after}", ""]
            elif isinstance(b, Bullets):
                out += [f"- {x}" for x in b.items] + [""]
            elif isinstance(b, Legend):
                out += [_legend_text(True), ""]
            elif isinstance(b, Figure):
                out += [f"![{b.caption}]({figure_files[b.key]})", "", f"*{b.caption}*", ""]
            elif isinstance(b, (Table, Details)):
                t = b if isinstance(b, Table) else b.table
                if isinstance(b, Details):
                    out += [f"{b.summary}:", ""]
                rows = [[esc(c.text + mark.get(c.tone, "")) for c in r] for r in t.rows]
                out += [markdown_table([esc(lab) for _, lab in t.header], rows), ""]
    return "\n".join(out)
