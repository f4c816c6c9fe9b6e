"""The holdout assessment's part of the HTML model report: an :class:`AssessResult` (from
``indb assess``) as a table of totals and charts, each with its numbers behind it.

The views are the functions in :data:`ASSESSMENT_SECTIONS`, in page order, each taking the
assessment and returning HTML ("" when it does not apply). With a second model (``indb
report --against``) two views apply: both models' figures side by side and the double-lift
chart along the ratio of their scores.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import asdict
from html import escape
from typing import Any

import numpy as np

from indb import charts as C
from indb.assessment import AgainstFigures, AssessResult, Level
from indb.html_parts import FORMATS, Column, Shown, chart_box, fmt_num, kv_table, note, table

__all__ = ["ASSESSMENT_SECTIONS"]


def _assess_totals(a: AssessResult) -> str:
    rows: list[tuple[str, str, Any, str]] = [
        ("rows", "rows judged", a.rows, "count"),
        ("rows_read", "rows read", a.rows_read, "count"),
        ("rows_excluded", "rows set aside", a.rows_excluded, "count"),
        ("rows_unseen", "rows with a level the fit never saw", a.rows_unseen, "count"),
        ("weight", "weight", a.weight, "num"),
        ("exposure", "exposure", a.exposure, "num"),
        ("actual", "actual", a.actual, "num"),
        ("expected", "expected", a.expected, "num"),
        ("actual_over_expected", "actual / expected", a.actual_over_expected, "num"),
        ("deviance", "deviance", a.deviance, "num"),
        ("mean_deviance", "mean deviance (per unit weight)", a.mean_deviance, "num"),
        ("null_deviance", "deviance of a constant rate", a.null_deviance, "num"),
        ("deviance_explained", "deviance explained", a.deviance_explained, "share"),
        ("gini", "Gini (ordered Lorenz curve)", a.gini, "num"),
        ("gini_normalized", "Gini / best possible Gini", a.gini_normalized, "num"),
        ("scans", "scans of the holdout", a.scans, "count"),
        ("seconds", "seconds", a.seconds, "num"),
    ]
    for why, n in a.excluded.items():
        rows.insert(3, (f"excluded.{why}", f"set aside: {why}", n, "count"))
    head = note(
        f"Version {a.version} of {a.model} judged on {a.source} ({a.engine}), inside the "
        "database: the figures below come from grouped scans of the holdout."
    )
    return head + kv_table("assessment", rows)


#: the columns every band table starts with: its number and the sums over its rows
_BAND_SUMS = (
    Column("band", "band", "count"),
    Column("rows", "rows", "count"),
    Column("weight", "weight"),
    Column("exposure", "exposure"),
    Column("actual", "actual"),
)


def _rate(num: float, den: float) -> float:
    return num / den if den and math.isfinite(den) and den != 0 else math.nan


def _lift(a: AssessResult) -> str:
    if not a.bands:
        return ""
    svg = C.lift_chart(
        [_rate(b.actual, b.exposure) for b in a.bands],
        [_rate(b.expected, b.exposure) for b in a.bands],
        rate_label="actual or expected per unit of exposure (rate)",
        title="Actual and expected rate by band of the score",
    )
    cols = [
        *_BAND_SUMS,
        Column("expected", "expected"),
        Column("actual_rate", "actual rate"),
        Column("expected_rate", "expected rate"),
        Column("score_low", "score low"),
        Column("score_high", "score high"),
    ]
    rows = [
        (
            str(i),
            {
                **asdict(b),
                "actual_rate": _rate(b.actual, b.exposure),
                "expected_rate": _rate(b.expected, b.exposure),
            },
        )
        for i, b in enumerate(a.bands)
    ]
    caption = (
        f" {len(a.bands)} bands of equal exposure along the score (the mean without the "
        "offset), lowest first; a tie group is never split."
    )
    return chart_box("lift", "Lift by band", svg, caption, table("bands", cols, rows))


def _lorenz(a: AssessResult) -> str:
    if not a.bands or not (a.exposure > 0 and a.actual > 0):
        return ""
    ex = np.concatenate([[0.0], np.cumsum([b.exposure for b in a.bands])]) / a.exposure
    ac = np.concatenate([[0.0], np.cumsum([b.actual for b in a.bands])]) / a.actual
    label = f"ordered Lorenz curve, Gini {fmt_num(a.gini, 4)}"
    svg = C.lorenz_chart(ex, ac, title="Ordered Lorenz curve of the score", label=label)
    cols = [
        Column("band", "after band", "count"),
        Column("exposure_share", "share of exposure", "share"),
        Column("actual_share", "share of actual", "share"),
    ]
    rows = [
        (str(i), {"band": i, "exposure_share": float(x), "actual_share": float(y)})
        for i, (x, y) in enumerate(zip(ex, ac, strict=True))
    ]
    caption = (
        f" Gini {fmt_num(a.gini, 4)} (normalized {fmt_num(a.gini_normalized, 4)}), computed "
        "over every tie group of the score; the curve is drawn through the ends of the "
        f"{len(a.bands)} bands."
    )
    return chart_box("lorenz", "Ordered Lorenz curve", svg, caption, table("lorenz", cols, rows))


def _level_label(lv: Level) -> str:
    return "(NULL)" if lv.level is None else str(lv.level) + (" (unseen)" if lv.unseen else "")


def _levels(a: AssessResult) -> str:
    out = []
    # the columns read by level first, then those cut into bands of their values
    ordered = sorted(a.levels.items(), key=lambda kv: any(lv.band is not None for lv in kv[1]))
    for column, levels in ordered:
        if not levels:
            continue
        shown = C.pick_levels([lv.exposure for lv in levels], [False] * len(levels))
        pts = [levels[i] for i in shown]
        svg = C.ratio_chart(
            [_level_label(lv) for lv in pts],
            [_rate(lv.actual, lv.expected) for lv in pts],
            [lv.exposure for lv in pts],
            title=f"{column}: actual / expected by level on the holdout",
            exposure_label="holdout exposure\n(sum)",
        )
        cols = [
            Column("level", "level", "text"),
            Column("rows", "rows", "count"),
            Column("weight", "weight"),
            Column("exposure", "exposure"),
            Column("actual", "actual"),
            Column("expected", "expected"),
            Column("actual_over_expected", "actual / expected"),
            Column("unseen", "unseen in the fit", "num"),
        ]
        rows = [
            (str(i), {**asdict(lv), "actual_over_expected": _rate(lv.actual, lv.expected)})
            for i, lv in enumerate(levels)
        ]
        banded = any(lv.band is not None for lv in levels)
        caption = (
            " Bands of equal exposure along the column's values." if banded else " One per level."
        )
        if len(pts) < len(levels):
            caption += f" The chart shows the {len(pts)} levels with the most exposure."
        out.append(
            chart_box(
                f"ae:{column}",
                f"{column}: actual / expected",
                svg,
                caption,
                table(f"levels:{column}", cols, rows),
            )
        )
    if not out:
        return ""
    return "<h3>Actual against expected by level</h3>" + "".join(out)


def _calibration(a: AssessResult) -> str:
    if not a.calibration:
        return ""
    cal = a.calibration
    svg = C.calibration_chart(
        [b.predicted for b in cal], [b.observed for b in cal], title="Calibration by band"
    )
    cols = [
        Column("band", "band", "count"),
        Column("rows", "rows", "count"),
        Column("weight", "weight"),
        Column("actual", "actual"),
        Column("expected", "expected"),
        Column("predicted", "mean predicted"),
        Column("observed", "observed rate"),
        Column("p_low", "probability low"),
        Column("p_high", "probability high"),
    ]
    rows = [(str(i), asdict(b)) for i, b in enumerate(cal)]
    hl = a.hosmer_lemeshow
    caption = " Bands of equal weight along the predicted probability."
    if hl is not None:
        caption += (
            f" Hosmer-Lemeshow statistic {fmt_num(hl.statistic, 5)} on {hl.df} df, "
            f"p = {fmt_num(hl.p_value, 3)} ({hl.groups} bands with weight)."
        )
    return chart_box("calibration", "Calibration", svg, caption, table("calibration", cols, rows))


def _name(model: str, version: int) -> str:
    return f"{model} v{version}"


def _side_by_side(a: AssessResult) -> str:
    """Both models' figures on the same rows of the same scans, one column each."""
    two = a.against
    if two is None:
        return ""
    first, second = _name(a.model, a.version), _name(two.model, two.version)
    figures: list[tuple[str, str, str]] = [
        ("expected", "expected", "num"),
        ("actual_over_expected", "actual / expected", "num"),
        ("deviance", "deviance", "num"),
        ("mean_deviance", "mean deviance (per unit weight)", "num"),
        ("deviance_explained", "deviance explained", "share"),
        ("gini", "Gini (ordered Lorenz curve)", "num"),
        ("gini_normalized", "Gini / best possible Gini", "num"),
        ("rows_unseen", "rows with a level the fit never saw", "count"),
    ]
    cols = [
        Column("figure", "figure", "text"),
        Column("first", first, "num"),
        Column("second", second, "num"),
    ]
    rows = [
        (key, {"figure": label, "first": _shown(a, key, kind), "second": _shown(two, key, kind)})
        for key, label, kind in figures
    ]
    offset = f", offset {two.offset}" if two.offset else ""
    head = note(
        f"{second} ({two.family} family, {two.link} link{offset}) was judged in the same "
        f"scans as {first}, on the same {a.rows:,} rows: the actual ({fmt_num(a.actual)}), "
        "weight and exposure are shared; the figures below differ."
    )
    return (
        f"<h3>Against {escape(second)}</h3>"
        + head
        + table("against", cols, rows)
        + _double_lift(a, two, first, second)
    )


def _shown(figures: Any, key: str, kind: str) -> Shown | float:
    """A figure printed its own way (a share, a count) with its exact value behind it."""
    value = getattr(figures, key)
    if value is None or not isinstance(value, int | float) or kind == "num":
        return value
    return Shown(float(value), FORMATS[kind](value))


def _double_lift(a: AssessResult, two: AgainstFigures, first: str, second: str) -> str:
    bands = a.ratio_bands or ()
    if not bands:
        return ""
    svg = C.double_lift_chart(
        [_rate(b.actual, b.exposure) for b in bands],
        [_rate(b.expected, b.exposure) for b in bands],
        [_rate(b.expected_against, b.exposure) for b in bands],
        names=(first, second),
        rate_label="actual or expected per unit of exposure (rate)",
        title=f"Double lift: {second} against {first}",
    )
    cols = [
        *_BAND_SUMS,
        Column("expected", f"expected, {first}"),
        Column("expected_against", f"expected, {second}"),
        Column("actual_over_expected", f"actual / expected, {first}"),
        Column("actual_over_against", f"actual / expected, {second}"),
        Column("ratio_low", "score ratio low"),
        Column("ratio_high", "score ratio high"),
    ]
    rows = [
        (
            str(i),
            {
                **asdict(b),
                "actual_over_expected": _rate(b.actual, b.expected),
                "actual_over_against": _rate(b.actual, b.expected_against),
            },
        )
        for i, b in enumerate(bands)
    ]
    caption = (
        f" {len(bands)} bands of equal exposure along the ratio of the scores ({second} over "
        f"{first}), lowest first: where the two models disagree, the one whose expected "
        "line follows the actual rate prices those rows better."
    )
    return chart_box("double_lift", "Double lift", svg, caption, table("ratio_bands", cols, rows))


#: the views of an assessment, in page order; each returns "" when it does not apply
ASSESSMENT_SECTIONS: tuple[Callable[[AssessResult], str], ...] = (
    _assess_totals,
    _side_by_side,
    _lift,
    _lorenz,
    _levels,
    _calibration,
)
