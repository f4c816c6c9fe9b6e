"""Text and JSON renderings of an :class:`~indb.exploration.Exploration` (``indb explore``).

The text layout is indb's own and compact: two lines on what was read and how exposure is
counted, one line of totals, then one small table per column (its name and kind on the
line above), levels in the order the exploration gives them. Numbers in a table column
share their decimals, so the points line up; a rate without exposure prints ``n/a``.
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence

from indb.exploration import Column, Exploration, Figures

NA = "n/a"
#: how NULL in an explored column shows (JSON: a level of null)
MISSING = "(missing)"


def exploration_text(found: Exploration) -> str:
    """The exploration as text, ending with a newline."""
    base = found.total.rate
    blocks = [_head(found), _table(["all rows used"], [found.total], base)]
    for column in found.columns:
        blocks.append(_column_block(column, found, base))
    return "\n\n".join(blocks) + "\n"


def exploration_json(found: Exploration) -> str:
    """The exploration as one JSON document (:meth:`Exploration.to_dict`; strict JSON)."""
    return json.dumps(found.to_dict(), indent=2, allow_nan=False)


# -- blocks ------------------------------------------------------------------------------------


def _head(found: Exploration) -> str:
    set_aside = found.rows_read - found.rows_used
    why = ", ".join(f"{n:,} with NULL {k}" for k, n in found.excluded.items() if n)
    rows = f"{found.rows_read:,} rows read, {found.rows_used:,} used"
    rows += f"; {set_aside:,} set aside ({why})" if set_aside else ""
    weight, offset = f"weight {found.weight}", f"offset {found.offset}"
    exposure = {
        "weight x exp(offset)": f"weight x exp(offset), {weight}, {offset}",
        "exp(offset)": f"exp(offset), {offset}",
        "weight": weight,
        "rows": "1 per row",
    }[found.exposure_basis]
    weighted = found.weight if found.weight and found.weight.isidentifier() else f"({found.weight})"
    actual = f"{weighted} x {found.response}" if found.weight else found.response
    return "\n".join(
        [
            f"{found.response} on {found.source}: {rows}",
            f"exposure = {exposure}; actual = sum of {actual}",
            "rate = actual / exposure; rel = rate / the rate of all rows used",
        ]
    )


def _column_block(column: Column, found: Exploration, base: float) -> str:
    if column.kind == "numeric":
        if column.cuts or column.low is not None:
            span = f"{_short(column.low)} to {_short(column.high)}"
            bands = sum(1 for lv in column.levels if lv.band)
            about = f"numeric {span}, {bands} bands (quantile cuts at k/{found.bands})"
        else:
            about = "numeric, no finite values"
    else:
        about = f"categorical, {column.level_count:,} levels"
        if column.other is not None:
            about += f", the {found.max_shown:,} with the most exposure shown"
    labels = [MISSING if lv.level is None else lv.level for lv in column.levels]
    rows: list[Figures] = list(column.levels)
    if column.other is not None:
        n = column.other_levels
        labels.append(f"{n:,} other level{'' if n == 1 else 's'}")
        rows.append(column.other)
    return f"{column.name}  {about}\n" + _table(labels, rows, base)


def _table(labels: Sequence[str], rows: Sequence[Figures], base: float) -> str:
    """One row per label: rows, exposure, actual, rate, rel (rate over ``base``)."""
    numbers = [
        ("rows", [f"{r.rows:,}" for r in rows]),
        ("exposure", _column([r.exposure for r in rows])),
        ("actual", _column([r.actual for r in rows])),
        ("rate", _column([r.rate for r in rows], significant=4)),
        ("rel", [_fixed(r.rate / base if base > 0 else math.nan, 3) for r in rows]),
    ]
    label_width = max(len("level"), *(len(x) for x in labels))
    widths = [max(len(h), *(len(v) for v in vals)) for h, vals in numbers]
    lines = ["  " + "level".ljust(label_width) + _cells([h for h, _ in numbers], widths)]
    for i, label in enumerate(labels):
        cells = [vals[i] for _, vals in numbers]
        lines.append("  " + label.ljust(label_width) + _cells(cells, widths))
    return "\n".join(line.rstrip() for line in lines)


# -- numbers -------------------------------------------------------------------------------------


def _cells(cells: Sequence[str], widths: Sequence[int]) -> str:
    return "".join("  " + c.rjust(w) for c, w in zip(cells, widths, strict=True))


def _column(values: Sequence[float], significant: int = 6) -> list[str]:
    """Fixed-point with the decimals that give the largest value ``significant`` digits
    (none when every value is a whole number), thousands separated."""
    finite = [abs(v) for v in values if math.isfinite(v)]
    if not finite:
        return [NA for _ in values]
    if all(float(v).is_integer() for v in values if math.isfinite(v)):
        decimals = 0
    else:
        top = max(finite)
        digits = math.floor(math.log10(top)) + 1 if top > 0 else 1
        decimals = max(0, min(8, significant - digits))
    return [f"{v:,.{decimals}f}" if math.isfinite(v) else NA for v in values]


def _fixed(value: float, decimals: int) -> str:
    return f"{value:.{decimals}f}" if math.isfinite(value) else NA


def _short(value: float | None) -> str:
    return NA if value is None else f"{value:.6g}"
