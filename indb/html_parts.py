"""The building blocks of the HTML model report: the style sheet, number formatting, tables
and chart boxes. Plain functions from numbers and text to HTML text; every text that comes
from data (names, levels, SQL) is escaped here.

Tables carry the exact numbers as well as the printed ones: each cell has
``data-field`` (the JSON key of the number it shows) and ``data-v`` (the number written with
``repr``, which reads back as the same double), each row ``data-key``, each table
``data-table``. A reader sees rounded figures; a program (or a test) reads the exact ones.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from html import escape
from typing import Any

#: what a cell without a value shows (n/a is a number that is not available)
NONE = "\u2014"
#: most rows a table shows (the rest are named in a line under it)
MAX_TABLE_ROWS = 1_000

STYLE = """
:root { --ink:#1f2a30; --muted:#56656d; --rule:#d5dde0; --band:#12343b; --accent:#b4531f;
  --teal:#0d5c63; --soft:#f3f6f7; }
* { box-sizing: border-box; }
html { -webkit-text-size-adjust: 100%; }
body { margin: 0; color: var(--ink); background: #fff; line-height: 1.45;
  font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", Arial, sans-serif; }
main, .masthead-inner { max-width: 60rem; margin: 0 auto; padding: 0 1.25rem; }
.masthead { background: var(--band); color: #f4f1ea; padding: 1.4rem 0 1.1rem;
  border-bottom: 4px solid var(--accent); }
.kicker { margin: 0; letter-spacing: .08em; text-transform: uppercase; font-size: .78rem;
  color: #cfe0e2; }
.masthead h1 { margin: .2rem 0 .3rem; font-size: 1.7rem; font-weight: 650;
  overflow-wrap: anywhere; }
.masthead .lede { margin: 0 0 .8rem; color: #dfe9ea; }
.tag { display: inline-block; font-size: .8rem; font-weight: 600; padding: .05rem .5rem;
  border: 1.5px solid currentColor; border-radius: .2rem; vertical-align: middle;
  margin-left: .4rem; }
.figures { display: flex; flex-wrap: wrap; gap: .6rem 1.6rem; list-style: none; margin: 0;
  padding: 0; }
.figures li { display: flex; flex-direction: column; }
.figures .v { font-size: 1.25rem; font-weight: 650; font-variant-numeric: tabular-nums; }
.figures .l { font-size: .78rem; color: #cfe0e2; }
nav.toc { margin: 1rem 0 0; font-size: .9rem; }
nav.toc ol { display: flex; flex-wrap: wrap; gap: .2rem 1.2rem; padding: 0; margin: 0;
  list-style: none; }
nav.toc a { color: var(--teal); }
section { margin: 2rem 0 0; }
h2 { font-size: 1.25rem; margin: 0 0 .6rem; padding: .15rem 0 .15rem .7rem;
  border-left: 5px solid var(--teal); }
h3 { font-size: 1.02rem; margin: 1.4rem 0 .4rem; }
p.note { color: var(--muted); font-size: .9rem; margin: .3rem 0 .8rem; }
figure.chart-box { margin: 1rem 0 1.4rem; padding: .7rem .8rem .5rem; border: 1px solid var(--rule);
  border-radius: .3rem; background: #fff; max-width: 100%; }
figure.chart-box figcaption { font-size: .9rem; margin-bottom: .4rem; }
figure.chart-box figcaption strong { display: block; font-size: .98rem; }
svg.chart { display: block; max-width: 100%; height: auto; margin: 0 auto; }
details { margin-top: .4rem; }
details summary { cursor: pointer; color: var(--teal); font-size: .88rem; }
.scroll { overflow-x: auto; max-width: 100%; }
table { border-collapse: collapse; font-size: .85rem; margin: .4rem 0; }
th, td { padding: .22rem .55rem; border-bottom: 1px solid var(--rule); text-align: left;
  vertical-align: top; }
thead th { border-bottom: 2px solid var(--ink); font-weight: 600; white-space: nowrap; }
td.n { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.t { overflow-wrap: break-word; }
td.nw { white-space: nowrap; }
tbody tr:nth-child(even) { background: var(--soft); }
table.kv th { font-weight: 500; color: var(--muted); width: 15rem; }
code, .code { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace;
  font-size: .82rem; overflow-wrap: anywhere; }
.caution { border: 2px solid var(--accent); padding: .6rem .9rem; border-radius: .3rem; }
footer { margin: 2.5rem 0 2rem; color: var(--muted); font-size: .85rem;
  border-top: 1px solid var(--rule); padding-top: .8rem; }
ul.notes li { margin: .25rem 0; }
@page { size: A4; margin: 14mm 12mm; }
@media print {
  body { font-size: 10.5pt; }
  .masthead { background: none; color: var(--ink); border-bottom: 3px solid var(--ink); }
  .kicker, .masthead .lede, .figures .l { color: var(--muted); }
  nav.toc, details { display: none; }
  .scroll { overflow: visible; }
  /* a page does not scroll sideways: wide tables get smaller type and padding */
  table { max-width: 100%; font-size: 7.5pt; }
  th, td { padding: .12rem .28rem; }
  thead th { white-space: normal; }
  figure.chart-box, table.kv, .caution { break-inside: avoid; }
  h2, h3 { break-after: avoid; }
  section { margin-top: 1.2rem; }
}
"""


# -- numbers ---------------------------------------------------------------------------------


def finite(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)


def fmt_num(v: Any, significant: int = 6) -> str:
    """A number to ``significant`` digits, with thousands separators; ``n/a`` when missing
    or not finite (infinities are named)."""
    if v is None or isinstance(v, bool):
        return "n/a" if v is None else ("yes" if v else "no")
    if isinstance(v, int):
        return f"{v:,}"
    if not isinstance(v, float):
        return escape(str(v))
    if math.isnan(v):
        return "n/a"
    if math.isinf(v):
        return "infinite" if v > 0 else "minus infinite"
    if v == 0:
        return "0"
    mag = math.floor(math.log10(abs(v)))
    if -4 <= mag < 12:
        decimals = min(max(significant - 1 - mag, 0), 10)
        return f"{v:,.{decimals}f}"
    return f"{v:.{significant - 1}e}"


def fmt_count(v: Any) -> str:
    if finite(v) and float(v) == int(v):
        return f"{int(v):,}"
    return fmt_num(v)


def fmt_p(p: Any) -> str:
    """A p-value: three decimals, or two significant digits below 0.001."""
    if not finite(p):
        return "n/a"
    if p >= 0.001:
        return f"{p:.3f}"
    return f"{p:.2g}"


def fmt_share(v: Any) -> str:
    return f"{100.0 * v:.1f}%" if finite(v) else "n/a"


def fmt_time(v: Any) -> str:
    if hasattr(v, "isoformat"):
        return v.isoformat(sep=" ", timespec="seconds")
    return "n/a" if v is None else str(v)


# -- tables ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Shown:
    """A number and the text a cell shows for it (when the kind's format will not do: a
    p-value below the smallest double, printed from its statistic)."""

    value: float
    text: str


@dataclass(frozen=True)
class Column:
    """A table column: the field (the JSON key) its cells show, its heading and how its
    numbers print (``num``, ``count``, ``p``, ``share``, ``text``, ``code``, ``time``)."""

    field: str
    head: str
    kind: str = "num"


FORMATS = {"num": fmt_num, "count": fmt_count, "p": fmt_p, "share": fmt_share}


def cell(field: str, value: Any, kind: str = "num") -> str:
    """One ``<td>``: the printed value, and the exact one in ``data-v`` for a number."""
    # a field can carry a data value (a coefficient's term names a level)
    field = escape(field, quote=True)
    if kind in ("text", "code", "time"):
        text = NONE if value is None else escape(str(value))
        inner = f"<code>{text}</code>" if kind == "code" and value is not None else text
        raw = "" if value is None else f' data-v="{escape(str(value), quote=True)}"'
        css = "t nw" if kind == "time" else "t"
        return f'<td class="{css}" data-field="{field}"{raw}>{inner}</td>'
    if value is None:
        return f'<td class="n" data-field="{field}">{NONE}</td>'
    if isinstance(value, Shown):
        raw = f' data-v="{_exact(value.value)}"'
        return f'<td class="n" data-field="{field}"{raw}>{escape(value.text)}</td>'
    raw = ""
    if isinstance(value, bool):
        raw = f' data-v="{str(value).lower()}"'
    elif isinstance(value, int | float):
        raw = f' data-v="{_exact(value)}"'
    return f'<td class="n" data-field="{field}"{raw}>{FORMATS[kind](value)}</td>'


def _exact(value: float | int) -> str:
    if isinstance(value, int):
        return str(value)
    if math.isnan(value):
        return "nan"
    return repr(float(value))


def table(
    name: str,
    columns: Sequence[Column],
    rows: Iterable[tuple[str, Mapping[str, Any]]],
    *,
    caption: str = "",
    limit: int = MAX_TABLE_ROWS,
) -> str:
    """A table named ``name`` (``data-table``): one row per (key, values by field)."""
    head = "".join(f'<th scope="col">{escape(c.head)}</th>' for c in columns)
    body, total = [], 0
    for key, values in rows:
        total += 1
        if total > limit:
            continue
        cells = "".join(cell(c.field, values.get(c.field), c.kind) for c in columns)
        body.append(f'<tr data-key="{escape(str(key), quote=True)}">{cells}</tr>')
    cap = f"<caption>{escape(caption)}</caption>" if caption else ""
    more = ""
    if total > limit:
        more = f'<p class="note">The first {limit:,} of {total:,} rows are shown.</p>'
    return (
        f'<div class="scroll"><table data-table="{escape(name, quote=True)}">{cap}'
        f"<thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table></div>{more}"
    )


def kv_table(name: str, rows: Sequence[tuple[str, str, Any, str]]) -> str:
    """A two-column table of (field, label, value, kind): one figure per row."""
    body = "".join(
        f'<tr data-key="{escape(field, quote=True)}"><th scope="row">{escape(label)}</th>'
        f"{cell('value', value, kind)}</tr>"
        for field, label, value, kind in rows
    )
    return (
        f'<table class="kv" data-table="{escape(name, quote=True)}"><tbody>{body}</tbody></table>'
    )


# -- page pieces -----------------------------------------------------------------------------


def chart_box(key: str, title: str, svg: str, caption: str, table_html: str) -> str:
    """A chart with its title and caption, and its numbers in a collapsed table."""
    return (
        f'<figure class="chart-box" data-chart="{escape(key, quote=True)}">'
        f"<figcaption><strong>{escape(title)}</strong>{escape(caption)}</figcaption>"
        f"{svg}<details><summary>The numbers behind this chart</summary>{table_html}"
        "</details></figure>"
    )


def section(key: str, title: str, body: str) -> str:
    head = f'<h2 id="{key}-h">{escape(title)}</h2>'
    return f'<section id="{key}" aria-labelledby="{key}-h">{head}{body}</section>'


def note(text: str) -> str:
    return f'<p class="note">{escape(text)}</p>'
