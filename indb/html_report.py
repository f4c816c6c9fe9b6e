"""The HTML model report: one self-contained page about one registry version.

:func:`render_html` lays out a :class:`ReportPage` (what the registry holds about the
version, and optionally an assessment on a holdout) as one HTML document: the style sheet
inline, every chart an inline SVG (:mod:`indb.charts`), no script and nothing fetched, so
the file opens offline, prints and archives as it is. Sections, in order: the model and its
version history, fit quality with the iteration trace, one chart per term, the coefficient
table, the holdout assessment (lift, ordered Lorenz curve, actual against expected by level,
a binomial model's calibration), notes, the caution and where the numbers came from.

The assessment's views are in :mod:`indb.html_assessment`. Nothing here touches a
database.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from datetime import datetime
from html import escape
from typing import Any

import numpy as np

from indb import charts as C
from indb.assessment import CAUTION as ASSESS_CAUTION
from indb.assessment import AssessResult
from indb.html_assessment import ASSESSMENT_SECTIONS
from indb.html_fit import (
    covariance_note,
    family_param_rows,
    p_shown,
    penalty_block,
    recorded_assessments,
    term_tests_block,
)
from indb.html_parts import (
    STYLE,
    Column,
    chart_box,
    fmt_count,
    fmt_num,
    fmt_share,
    fmt_time,
    kv_table,
    note,
    section,
    table,
)
from indb.report import CAUTION, format_p
from indb.results import FitResult
from indb.term_effects import (
    CoefficientEffect,
    CurveEffect,
    Effect,
    FactorEffect,
    PointEffect,
    Scale,
    ValueRange,
    scale_for,
    term_effects,
)

__all__ = ["ReportPage", "render_html", "holdout_ranges"]


@dataclass(frozen=True)
class ReportPage:
    """What one report shows: a registry version (its result, its row, the model's other
    versions and events), an optional assessment, and where and when it was made."""

    name: str
    version: int
    result: FitResult
    version_row: Mapping[str, Any]
    versions: Sequence[Mapping[str, Any]]
    events: Sequence[Mapping[str, Any]]
    engine: str
    made_at: datetime
    indb_version: str
    assessment: AssessResult | None = None
    #: the model's scoring view (schema.name), which serves its live version
    scoring_view: str | None = None
    #: the assessments the registry recorded for the version (oldest first)
    recorded: Sequence[Mapping[str, Any]] = ()


def render_html(page: ReportPage) -> str:
    """The report as one HTML document (a string)."""
    r = page.result
    a = page.assessment
    effects = term_effects(r, holdout_ranges(r, a) if a is not None else None)
    parts = [
        ("model", "The model", _model_section(page)),
        ("quality", "Fit quality", _quality_section(r)),
        ("terms", "Term by term", _terms_section(r, effects, a)),
        ("coefficients", "Coefficients", _coefficients_section(r)),
    ]
    if a is not None:
        body = "".join(f(a) for f in ASSESSMENT_SECTIONS)
        parts.append(("holdout", "On the holdout", body))
    parts.append(("notes", "Notes and caution", _notes_section(r, a)))
    toc = "".join(f'<li><a href="#{k}">{escape(t)}</a></li>' for k, t, _ in parts)
    sections = "".join(section(k, t, b) for k, t, b in parts)
    title = f"{page.name} version {page.version}: indb model report"
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{escape(title)}</title><style>{STYLE}</style></head><body>"
        f"{_masthead(page)}<main>"
        f'<nav class="toc" aria-label="Sections"><ol>{toc}</ol></nav>{sections}'
        f"{_footer(page)}</main></body></html>\n"
    )


# -- masthead and the model --------------------------------------------------------------------


def _masthead(page: ReportPage) -> str:
    r, a = page.result, page.assessment
    status = str(page.version_row.get("status", ""))
    lede = (
        f"{r.family} family, {r.link} link; response {r.response}; {fmt_count(r.n_used)} rows used"
    )
    figures = [
        (fmt_share(_explained(r.deviance, r.null_deviance)), "deviance explained in the fit"),
        (fmt_count(r.iterations), "IRLS scans" + ("" if r.converged else " (NOT converged)")),
    ]
    if a is not None:
        figures += [
            (fmt_num(a.actual_over_expected, 4), "actual / expected on the holdout"),
            (fmt_num(a.gini, 4), "Gini on the holdout"),
        ]
    items = "".join(
        f'<li><span class="v">{v}</span><span class="l">{escape(lbl)}</span></li>'
        for v, lbl in figures
    )
    return (
        '<header class="masthead"><div class="masthead-inner">'
        '<p class="kicker">indb model report</p>'
        f'<h1>{escape(page.name)} <span class="tag">version {page.version}</span>'
        f'<span class="tag">{escape(status)}</span></h1>'
        f'<p class="lede">{escape(lede)}</p><ul class="figures">{items}</ul></div></header>'
    )


def _explained(deviance: float, null: float) -> float:
    return 1.0 - deviance / null if null and math.isfinite(null) and null > 0 else math.nan


def _model_section(page: ReportPage) -> str:
    r = page.result
    spec = r.spec if isinstance(r.spec, dict) else {}
    fp = r.fingerprint or {}
    rows: list[tuple[str, str, Any, str]] = [
        ("family", "family", r.family, "text"),
        ("link", "link", r.link, "text"),
        ("response", "response", r.response, "code"),
    ]
    for key, label in (
        ("offset", "offset"),
        ("weight", "prior weight"),
        ("frequency_weight", "frequency weight"),
        ("trials", "trials"),
    ):
        if spec.get(key) not in (None, ""):
            rows.append((key, label, spec[key], "code"))
    rows += family_param_rows(r)
    rows += [
        ("source", "source", _source_text(r), "code"),
        ("n_used", "rows used", r.n_used, "count"),
        ("n_excluded", "rows set aside", r.n_excluded, "count"),
    ]
    for column, n in (r.excluded_by_column or {}).items():
        if n:
            rows.append((f"excluded_by_column.{column}", f"NULL in {column}", n, "count"))
    if finite_diff(r.n_weighted, r.n_used):
        rows.append(("n_weighted", "weighted row total", r.n_weighted, "num"))
    rows += [
        ("fingerprint.rows", "rows read (fingerprint)", fp.get("rows"), "count"),
        ("fingerprint.sum_weights", "sum of weights (fingerprint)", fp.get("sum_weights"), "num"),
        (
            "fingerprint.sum_weighted_response",
            "sum of weighted response (fingerprint)",
            fp.get("sum_weighted_response"),
            "num",
        ),
        ("spec_hash", "spec hash", page.version_row.get("spec_hash"), "code"),
        ("scoring_view", "scoring view (serves the live version)", page.scoring_view, "code"),
    ]
    body = kv_table("model", rows)
    body += "<h3>Version history</h3>" + _history_table(page)
    body += "<h3>Registry events</h3>" + _events_table(page.events)
    body += "<h3>Recorded assessments of this version</h3>" + recorded_assessments(page.recorded)
    return body


def _source_text(r: FitResult) -> str:
    source = (r.spec or {}).get("source")
    if isinstance(source, dict) and source.get("text"):
        return str(source["text"])
    return str(r.source)


def finite_diff(a: Any, b: Any) -> bool:
    return a is not None and b is not None and math.isfinite(float(a)) and float(a) != float(b)


def _history_table(page: ReportPage) -> str:
    """Each version: when fitted, its status, what it replaced when it went live (from the
    promote events), the version it was refitted from, and its note (a retrain's gates)."""
    went_live: dict[int, tuple[Any, int | None]] = {}
    live: int | None = None
    for e in page.events:
        if e.get("action") == "promote":
            v = int(e["version"])
            went_live[v] = (e.get("at"), live if live != v else None)
            live = v
    cols = [
        Column("version", "version", "count"),
        Column("created_at", "fitted at (UTC)", "time"),
        Column("status", "status", "text"),
        Column("n_used", "rows used", "count"),
        Column("deviance", "deviance"),
        Column("went_live", "went live (UTC)", "text"),
        Column("parent_version", "refit of", "count"),
    ]
    rows = []
    for v in page.versions:
        at, replaced = went_live.get(int(v["version"]), (None, None))
        values = dict(v)
        values["created_at"] = fmt_time(v.get("created_at"))
        values["went_live"] = None
        if at is not None:
            values["went_live"] = fmt_time(at) + (
                f", replacing version {replaced}" if replaced is not None else ""
            )
        rows.append((str(v["version"]), values))
    out = table("versions", cols, rows)
    # notes (a retrain's gate outcomes) are long: a table of their own, one line each
    notes = [(str(v["version"]), v) for v in page.versions if v.get("note")]
    if notes:
        cols = [Column("version", "version", "count"), Column("note", "note", "text")]
        out += "<h3>Notes of the versions (gate outcomes)</h3>" + table(
            "version_notes", cols, notes
        )
    return out


def _events_table(events: Sequence[Mapping[str, Any]]) -> str:
    cols = [
        Column("at", "at (UTC)", "time"),
        Column("version", "version", "count"),
        Column("action", "action", "text"),
        Column("detail", "detail", "text"),
    ]
    rows = [(str(i), {**e, "at": fmt_time(e.get("at"))}) for i, e in enumerate(events)]
    return table("events", cols, rows)


# -- fit quality -------------------------------------------------------------------------------


def _quality_section(r: FitResult) -> str:
    rows: list[tuple[str, str, Any, str]] = [
        ("deviance", "deviance", r.deviance, "num"),
        ("null_deviance", "null deviance (intercept only)", r.null_deviance, "num"),
        (
            "deviance_explained",
            "deviance explained",
            _explained(r.deviance, r.null_deviance),
            "share",
        ),
        ("residual_df", "residual df", r.residual_df, "num"),
        ("model_df", "model df", r.model_df, "count"),
        ("pearson_chi2", "Pearson chi-square", r.pearson_chi2, "num"),
        (
            "dispersion",
            "dispersion" + (" (estimated)" if r.dispersion_estimated else " (fixed)"),
            r.dispersion,
            "num",
        ),
        ("log_likelihood", "log-likelihood", r.log_likelihood, "num"),
        ("aic", "AIC", r.aic, "num"),
        ("bic", "BIC", r.bic, "num"),
        ("condition_number", "condition number of X'WX", r.condition_number, "num"),
        ("iterations", "IRLS iterations", r.iterations, "count"),
        ("converged", "converged", bool(r.converged), "num"),
        ("path", "route", r.path, "text"),
        ("seconds", "wall time (s)", r.seconds, "num"),
    ]
    return kv_table("quality", rows) + _iteration_box(r) + term_tests_block(r)


#: what the scans of a phase other than the model's own fit are, for the trace's caption
_PHASE_NOTES = {
    "sample": "a sample start reads fewer rows",
    "null": "the null scans fit the intercept-only model for the null deviance",
    "drop_one": (
        "a drop-one scan fits every reduced model of the drop-one tests at once, so it has "
        "no single deviance; its relative change is the largest among those models, none "
        "on the scan that starts them"
    ),
    "cv": (
        "a cross-validation scan fits the folds' models at once; its relative change is "
        "the largest among them"
    ),
    "cv_score": "a held-out scan sums each fold's deviance on its own rows",
}


def _iteration_box(r: FitResult) -> str:
    log = list(r.iteration_log)
    if not log:
        return note("The stored version has no iteration log.")
    svg = C.iteration_chart(
        [x.deviance for x in log],
        [x.relative_change for x in log],
        [x.step_halvings for x in log],
        [x.phase for x in log],
    )
    cols = [
        Column("scan", "scan", "count"),
        Column("phase", "phase", "text"),
        Column("iteration", "iteration", "count"),
        Column("deviance", "deviance"),
        Column("relative_change", "relative change"),
        Column("step_halvings", "step-halvings", "count"),
        Column("seconds", "seconds"),
    ]
    rows = [(str(i + 1), {"scan": i + 1, **asdict(x)}) for i, x in enumerate(log)]
    halved = sum(1 for x in log if x.step_halvings)
    counts = {p: sum(1 for x in log if x.phase == p) for p in dict.fromkeys(x.phase for x in log)}
    phases = ", ".join(f"{n} {p}" for p, n in counts.items())
    caption = (
        f" {len(log)} scans of the data ({phases}), each summing the deviance at the "
        "coefficients it was given; the first fit scan's is at the starting means."
    )
    others = [p for p in counts if p not in C.FULL_MODEL]
    if others:
        what = ", ".join(_PHASE_NOTES[p] for p in others if p in _PHASE_NOTES)
        caption += (
            " The upper panel shows the model's deviance on all rows; the "
            f"{' and '.join(others)} scans appear in the lower panel and the table"
            + (f" ({what})." if what else ".")
        )
    caption += f" {halved} scan(s) halved the step."
    return chart_box("iterations", "Iteration trace", svg, caption, table("iterations", cols, rows))


# -- terms -------------------------------------------------------------------------------------


def holdout_ranges(r: FitResult, a: AssessResult) -> dict[str, ValueRange]:
    """The range of each numeric column the assessment cut into bands (its values on the
    holdout), for drawing that term's curve."""
    out = {}
    for column, levels in a.levels.items():
        banded = [lv for lv in levels if lv.band is not None]
        if banded:
            lo = min(float(lv.low) for lv in banded)
            hi = max(float(lv.high) for lv in banded)
            if hi > lo:
                out[column] = ValueRange(lo, hi, f"the values of {column} on the holdout")
    return out


def _terms_section(r: FitResult, effects: Sequence[Effect], a: AssessResult | None) -> str:
    scale = scale_for(r.link)
    # a penalised fit has no standard errors: its charts say so instead of a level
    level = "no" if r.penalty else f"{100 * float(r.confidence):g}%"
    weighted = bool((r.spec or {}).get("frequency_weight"))
    rows_label = "frequency-weighted rows in the fit" if weighted else "rows in the fit"
    intro = (
        f"Each term on the {scale.name} scale"
        + (" (exp of the linear predictor)" if scale.exponentiate else "")
        + f", with {level} intervals; the reference level sits at {scale.reference:g}. "
        f"Bars beneath a categorical term count its {rows_label} (the fit's level counts)."
    )
    if not effects:
        return note("The model has no terms besides the intercept.")
    boxes = []
    shared = [e.term for e in effects if isinstance(e, CoefficientEffect)]
    for e in effects:
        if isinstance(e, FactorEffect):
            inside = [t for t in shared if e.column in t.split(" & ")]
            boxes.append(_factor_box(e, scale, level, rows_label, inside))
        elif isinstance(e, CurveEffect):
            inside = [t for t in shared if e.column in t.split(" & ")]
            boxes.append(_curve_box(e, scale, level, a, inside))
        else:
            boxes.append(_points_box(e, scale, level))
    return note(intro) + "".join(boxes)


def _value_label(scale: Scale) -> str:
    if scale.exponentiate:
        return f"{scale.name} (multiplier, ratio)"
    return "effect on the linear predictor (link units)"


def _point_columns(scale: Scale, first: Column) -> list[Column]:
    cols = [
        first,
        Column("estimate", "estimate"),
        Column("std_error", "std error"),
        Column("lower_bound", "interval low"),
        Column("upper_bound", "interval high"),
    ]
    if scale.exponentiate:
        cols += [
            Column("value", scale.name),
            Column("lower", f"{scale.name} low"),
            Column("upper", f"{scale.name} high"),
        ]
    return cols


def _point_values(p: PointEffect) -> dict[str, Any]:
    return {
        "label": p.label,
        "term": p.term,
        "rows": p.rows,
        "estimate": p.estimate,
        "std_error": p.std_error,
        "lower_bound": p.lower_estimate,
        "upper_bound": p.upper_estimate,
        "value": p.value,
        "lower": p.lower,
        "upper": p.upper,
        "reference": "reference" if p.reference else ("aliased" if p.aliased else ""),
    }


def _interaction_note(column: str, inside: Sequence[str]) -> str:
    if not inside:
        return ""
    return (
        f" {column} also enters {', '.join(inside)}: these values hold where the other "
        "columns of those terms are at 0 (a numeric column) or at their reference level."
    )


def _factor_box(
    e: FactorEffect, scale: Scale, level: str, rows_label: str, inside: Sequence[str] = ()
) -> str:
    shown = C.pick_levels([p.rows for p in e.levels], [p.reference for p in e.levels])
    pts = [e.levels[i] for i in shown]
    svg = C.level_chart(
        [p.label for p in pts],
        [p.value for p in pts],
        [p.lower for p in pts],
        [p.upper for p in pts],
        [p.reference for p in pts],
        [p.rows for p in pts],
        value_label=_value_label(scale),
        count_label=f"{rows_label}\n(count)",
        guide=scale.reference,
        title=f"{e.column}: {scale.name} by level",
    )
    cols = _point_columns(scale, Column("label", "level", "text"))
    cols.insert(1, Column("rows", rows_label, "count"))
    cols.append(Column("reference", "", "text"))
    rows = [(p.label, _point_values(p)) for p in e.levels]
    caption = f" {len(e.levels)} levels; {level} intervals; open diamond: the reference level."
    caption += _interaction_note(e.column, inside)
    if len(pts) < len(e.levels):
        caption += (
            f" The chart shows the {len(pts)} levels with the most rows; the table lists all."
        )
    return chart_box(
        f"term:{e.column}", f"{e.column}", svg, caption, table(f"term:{e.column}", cols, rows)
    )


def _curve_box(
    e: CurveEffect, scale: Scale, level: str, a: AssessResult | None, inside: Sequence[str] = ()
) -> str:
    bars = None
    holdout = a.levels.get(e.column) if a is not None else None
    banded = [lv for lv in holdout or () if lv.band is not None]
    if banded:
        bars = (
            [lv.low for lv in banded],
            [lv.high for lv in banded],
            [lv.exposure for lv in banded],
        )
    what = "restricted cubic spline" if e.kind == "spline" else "straight line"
    svg = C.curve_chart(
        e.x,
        e.value,
        e.lower,
        e.upper,
        x_label=f"{e.column} (units of the column)",
        value_label=_value_label(scale),
        guide=scale.reference,
        x_ref=e.x_ref,
        title=f"{e.column}: {scale.name} over its range ({what})",
        knots=e.knots,
        bars=bars,
        bar_label="holdout exposure\n(sum)",
    )
    band = (
        f"{level} pointwise band"
        if np.isfinite(e.lower).any()
        else "no band (the stored version has no covariance)"
    )
    caption = (
        f" A {what} ({', '.join(e.coefficients)}), relative to {e.column} = "
        f"{fmt_num(e.x_ref, 5)} (its training mean); {band}; drawn over {e.range_note}."
    )
    if bars is not None:
        caption += (
            " Bars: the holdout's exposure in each band of its values, drawn at the band's "
            "middle (the bands are listed with the holdout's actual against expected)."
        )
    if e.knots:
        caption += f" Knots at {', '.join(f'{k:.6g}' for k in e.knots)}."
    caption += _interaction_note(e.column, inside)
    cols = [
        Column("x", e.column),
        Column("value", scale.name if scale.exponentiate else "effect"),
        Column("lower", "band low"),
        Column("upper", "band high"),
    ]
    step = max(1, len(e.x) // 24)
    picks = sorted({*range(0, len(e.x), step), len(e.x) - 1})
    rows = [
        (
            str(i),
            {
                "x": float(e.x[i]),
                "value": float(e.value[i]),
                "lower": float(e.lower[i]),
                "upper": float(e.upper[i]),
            },
        )
        for i in picks
    ]
    return chart_box(
        f"term:{e.column}", e.column, svg, caption, table(f"curve:{e.column}", cols, rows)
    )


def _points_box(e: CoefficientEffect, scale: Scale, level: str) -> str:
    svg = C.points_chart(
        [p.label for p in e.points],
        [p.value for p in e.points],
        [p.lower for p in e.points],
        [p.upper for p in e.points],
        value_label=_value_label(scale),
        guide=scale.reference,
        title=f"{e.term}: {scale.name} per coefficient",
    )
    cols = _point_columns(scale, Column("label", "coefficient", "text"))
    rows = [(p.label, _point_values(p)) for p in e.points]
    caption = (
        f" One point per coefficient of the term, with {'no' if level == 'no' else 'its ' + level}"
        " interval; a coefficient "
        "of a numeric column is per unit of that column."
    )
    return chart_box(f"term:{e.term}", e.term, svg, caption, table(f"term:{e.term}", cols, rows))


# -- coefficients ------------------------------------------------------------------------------


def _coefficients_section(r: FitResult) -> str:
    scale = scale_for(r.link)
    test = "t" if str(r.test).strip().lower().startswith("t") else "z"
    level = f"{100 * float(r.confidence):g}%"
    cols = [
        Column("term", "term", "text"),
        Column("estimate", "estimate"),
        Column("std_error", "std error"),
        Column("wald", f"Wald {test}"),
        Column("p_two_sided", "two-sided p", "p"),
        Column("lower_bound", f"{level} low"),
        Column("upper_bound", f"{level} high"),
    ]
    if scale.exponentiate:
        cols.append(Column("exp_estimate", scale.name))
    if any(c.aliased for c in r.coefficients):
        cols.append(Column("aliased", "aliased", "text"))
    rows = []
    for c in r.coefficients:
        values = dict(asdict(c))
        values["p_two_sided"] = p_shown(
            c.p_two_sided, format_p(c.p_two_sided, c.wald, test, r.wald_df)
        )
        values["exp_estimate"] = float(scale.apply(c.estimate)) if not c.aliased else None
        values["aliased"] = "aliased: not estimated" if c.aliased else ""
        rows.append((c.term, values))
    text = (
        f"Wald {test} = estimate / std error"
        + (f", on {fmt_num(r.wald_df)} df" if test == "t" else "")
        + "; interval = estimate -/+ quantile x std error."
    )
    if r.penalty:
        text = "No standard errors, Wald statistics, p-values or intervals: a penalised fit."
    return penalty_block(r) + covariance_note(r) + note(text) + table("coefficients", cols, rows)


# -- notes, caution, provenance ----------------------------------------------------------------


def _notes_section(r: FitResult, a: AssessResult | None) -> str:
    notes = [str(w) for w in r.warnings] + [str(n) for n in (a.notes if a is not None else ())]
    body = "<h3>Notes from the fit</h3>"
    if notes:
        body += '<ul class="notes">' + "".join(f"<li>{escape(n)}</li>" for n in notes) + "</ul>"
    else:
        body += note("None.")
    paragraphs = [CAUTION] + ([ASSESS_CAUTION] if a is not None else [])
    text = "".join(f"<p>{escape(p)}</p>" for p in paragraphs)
    body += f'<h3>Caution</h3><div class="caution" role="note">{text}</div>'
    return body


def _utc(t: datetime) -> str:
    return t.strftime("%Y-%m-%d %H:%M:%S UTC")


def _footer(page: ReportPage) -> str:
    row = page.version_row
    fitted_by = row.get("package_version") or "an unrecorded version"
    return (
        '<footer><p data-provenance="1">'
        f"Made by indb {escape(page.indb_version)} at {escape(_utc(page.made_at))} on the "
        f"{escape(page.engine)} engine, from the registry's version {page.version} of "
        f"{escape(page.name)} (fitted at {escape(fmt_time(row.get('created_at')))} by indb "
        f"{escape(str(fitted_by))}). Every number comes from the registry or from grouped "
        "scans inside the database; no row of data was read into this report.</p></footer>"
    )
