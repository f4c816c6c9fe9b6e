"""Parts of the HTML model report about how a fit was made and judged: where its standard
errors come from (the covariance kind), the whole-term tests with their GVIFs, a penalised
fit's penalty and lambda path (and the statement that it reports no standard errors), the
family's estimated parameters with their standard errors (a negative binomial's theta), and
the assessments the registry recorded for the version.

Each function takes the stored result (or registry rows) and returns HTML; nothing here
touches a database. :mod:`indb.html_report` places them in the page.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from html import escape
from typing import Any

import numpy as np

from indb import charts as C
from indb.html_parts import Column, Shown, chart_box, fmt_count, fmt_num, fmt_time, note, table
from indb.report import covariance_text, format_chi2_p
from indb.results import FitResult

__all__ = [
    "covariance_note",
    "family_param_rows",
    "penalty_block",
    "recorded_assessments",
    "term_tests_block",
]


def p_shown(p: float, text: str) -> Shown | float:
    """A p-value cell: the text report's wording (a p below the smallest double is given
    from its statistic) with the stored value."""
    return Shown(float(p), text) if math.isfinite(p) else p


def covariance_note(r: FitResult) -> str:
    """Where the coefficient table's standard errors come from, shown above it."""
    if r.penalty:
        return ""
    name, how = covariance_text(r)
    text = f"Standard errors: {name} ({how})."
    if r.covariance_kind == "cluster" and str(r.test).lower().startswith("t"):
        text += f" A t statistic is referred to {fmt_num(r.wald_df)} df (clusters less one)."
    return (
        f'<p class="note" data-covariance="{escape(r.covariance_kind, quote=True)}"'
        + (f' data-clusters="{int(r.clusters)}"' if r.clusters is not None else "")
        + f">{escape(text)}</p>"
    )


def family_param_rows(r: FitResult) -> list[tuple[str, str, Any, str]]:
    """The family's parameters (a negative binomial's theta, a Tweedie power) and, where
    the fit estimated one, its standard error: rows of the model's figure table."""
    rows: list[tuple[str, str, Any, str]] = []
    for name, value in (r.family_params or {}).items():
        rows.append((f"family_params.{name}", f"family: {name}", value, "num"))
        error = (r.family_param_errors or {}).get(name)
        if error is not None:
            rows.append(
                (
                    f"family_param_errors.{name}",
                    f"family: {name}, std error (estimated)",
                    error,
                    "num",
                )
            )
    return rows


def term_tests_block(r: FitResult) -> str:
    """The whole-term Wald tests with each term's generalized VIF."""
    if not r.term_tests:
        return ""
    head = "<h3>Whole terms</h3>" + note(
        "Wald chi-square of all of a term's coefficients at once, its df and tail "
        "probability; GVIF = generalized variance-inflation factor (Fox and Monette), "
        "GVIF^(1/(2 df)) comparable across terms."
    )
    gvif = {c.term: c for c in r.collinearity}
    rows = [
        (
            t.term,
            {
                "term": t.term,
                "df": t.df,
                "wald_chi2": t.wald_chi2,
                "p_value": p_shown(t.p_value, format_chi2_p(t.p_value, t.wald_chi2, t.df)),
                "gvif": gvif[t.term].gvif if t.term in gvif else None,
                "gvif_scaled": gvif[t.term].gvif_scaled if t.term in gvif else None,
            },
        )
        for t in r.term_tests
    ]
    cols = [
        Column("term", "term", "text"),
        Column("df", "df", "count"),
        Column("wald_chi2", "Wald chi-square"),
        Column("p_value", "p", "p"),
        Column("gvif", "GVIF"),
        Column("gvif_scaled", "GVIF^(1/(2 df))"),
    ]
    return head + table("term_tests", cols, rows) + _drop_one_table(r)


def _drop_one_table(r: FitResult) -> str:
    """The likelihood-ratio tests of leaving each term out (``drop_one``), a table of its
    own so that neither table runs wider than the page; empty when the fit ran none."""
    tests = [t for t in r.term_tests if t.drop_df is not None or t.drop_note is not None]
    if not tests:
        return ""
    head = "<h3>Leaving each term out</h3>" + note(
        "The deviance of the model refitted without the term less the full model's, on the "
        "same rows, and its likelihood-ratio test (chi-square, or F with the full model's "
        "dispersion)."
    )
    rows = [
        (
            t.term,
            {
                "term": t.term,
                "drop_deviance": t.drop_deviance,
                "drop_df": t.drop_df,
                "lr_test": t.lr_test or "",
                # a chi-square tail below the smallest double keeps its power of ten, as
                # the Wald test's does
                "lr_p_value": p_shown(
                    t.lr_p_value, format_chi2_p(t.lr_p_value, t.lr_statistic, t.drop_df)
                )
                if t.lr_test == "chi2" and t.lr_p_value is not None
                else t.lr_p_value,
                "drop_note": t.drop_note or "",
            },
        )
        for t in tests
    ]
    cols = [
        Column("term", "term", "text"),
        Column("drop_deviance", "deviance without it"),
        Column("drop_df", "df dropped", "count"),
        Column("lr_test", "test", "text"),
        Column("lr_p_value", "p", "p"),
    ]
    if any(t.drop_note for t in tests):
        cols.append(Column("drop_note", "note", "text"))
    return head + table("drop_one", cols, rows)


# -- penalised fits ----------------------------------------------------------------------------

#: most coefficients a path chart draws (those largest at the reported lambda; the table
#: behind it lists every one)
MAX_PATH_LINES = 12


def penalty_block(r: FitResult) -> str:
    """A penalised fit: the statement that no standard errors are reported, the penalty's
    figures and, where a path is stored, the coefficients against log lambda."""
    if not r.penalty:
        return ""
    p = r.penalty
    statement = (
        '<div class="caution" role="note" data-penalised="1"><p>'
        + escape(
            "Penalised fit: the estimates are shrunk towards 0 on purpose, so this report "
            "gives no standard errors, Wald statistics, p-values, intervals, whole-term tests, "
            "AIC or BIC, and draws no interval bars."
        )
        + "</p></div>"
    )
    cols = [Column("figure", "figure", "text"), Column("value", "value")]
    figures = [
        ("penalty", "lambda (penalty strength)", p.get("penalty")),
        ("l1_share", "L1 share (0 ridge, 1 lasso)", p.get("l1_share")),
        ("lambda_max", "lambda_max (all penalised coefficients 0)", p.get("lambda_max")),
        ("nonzero", "penalised coefficients not 0", p.get("nonzero")),
        ("penalised_terms", "penalised coefficients", p.get("penalised_terms")),
    ]
    rows = [(k, {"figure": label, "value": v}) for k, label, v in figures if v is not None]
    body = "<h3>Penalty</h3>" + statement + table("penalty", cols, rows)
    return body + _path_box(r) + _cv_box(r)


def _cv_box(r: FitResult) -> str:
    """k-fold cross-validation of the path: the mean out-of-fold deviance with its standard
    error per lambda (chart and table, each fold's deviance in the table)."""
    rows_cv = [row for row in r.cv if _positive(row.get("penalty"))]
    if not rows_cv:
        return ""
    lam = np.array([float(row["penalty"]) for row in rows_cv])
    mean = np.array([_num(row.get("mean_deviance")) for row in rows_cv])
    se = np.array([_num(row.get("se")) for row in rows_cv])
    chosen = _num(r.chosen_penalty)
    finite = np.isfinite(mean)
    best = float(lam[finite][np.argmin(mean[finite])]) if finite.any() else math.nan
    svg = C.cv_chart(
        np.log(lam),
        mean,
        se,
        chosen=math.log(chosen) if _positive(chosen) else None,
        best=math.log(best) if _positive(best) else None,
        title="Out-of-fold deviance along the lambda path",
    )
    folds = max(len(row.get("per_fold", ())) for row in rows_cv)
    cols = [
        Column("penalty", "lambda"),
        Column("log_lambda", "log lambda"),
        Column("mean_deviance", "mean out-of-fold deviance"),
        Column("se", "standard error"),
        *(Column(f"fold:{k}", f"fold {k}") for k in range(folds)),
    ]
    rows = [
        (
            str(i),
            {
                "penalty": float(row["penalty"]),
                "log_lambda": math.log(float(row["penalty"])),
                "mean_deviance": _num(row.get("mean_deviance")),
                "se": _num(row.get("se")),
                **{f"fold:{k}": _num(v) for k, v in enumerate(row.get("per_fold", ()))},
            },
        )
        for i, row in enumerate(rows_cv)
    ]
    rule = {
        "min": "the least mean",
        "one_se": "the largest lambda within one standard error "
        "of the least mean (common practice)",
    }.get(r.chosen_rule or "", r.chosen_rule or "")
    caption = (
        f" {folds}-fold cross-validation: each fold's model fitted on the other folds' rows "
        "along the path, its deviance per unit weight on the fold's own rows; the mean over "
        "the folds with one standard error (their spread over the square root of the number "
        f"of folds). The dashed line marks the chosen lambda, {_g(chosen)}: {rule}."
    )
    return chart_box(
        "cross_validation", "Cross-validation", svg, caption, table("cross_validation", cols, rows)
    )


def _g(v: float) -> str:
    return f"{v:.4g}" if math.isfinite(v) else "n/a"


def _path_box(r: FitResult) -> str:
    path = [row for row in r.penalty_path if _positive(row.get("penalty"))]
    if len(path) < 2:
        return ""
    lam = np.array([float(row["penalty"]) for row in path])
    terms = list(dict.fromkeys(t for row in path for t in row["coefficients"]))
    est = {t: [_num(row["coefficients"].get(t)) for row in path] for t in terms}
    # the intercept is not penalised and sits far from the others: its line would squash
    # theirs (the table keeps it)
    intercepts = {c.term for c in r.coefficients if not c.columns}
    drawn = [t for t in terms if t not in intercepts]
    drawn.sort(key=lambda t: -abs(est[t][-1]) if math.isfinite(est[t][-1]) else 0.0)
    drawn = drawn[:MAX_PATH_LINES]
    chosen = _num(r.penalty.get("penalty"))
    svg = C.path_chart(
        np.log(lam),
        [est[t] for t in drawn],
        drawn,
        chosen=math.log(chosen) if _positive(chosen) else None,
        title="Coefficients along the lambda path",
    )
    cols = [
        Column("penalty", "lambda"),
        Column("log_lambda", "log lambda"),
        Column("deviance", "deviance"),
        Column("nonzero", "not 0", "count"),
        *(Column(f"coef:{t}", t) for t in terms),
    ]
    rows = [
        (
            str(i),
            {
                "penalty": float(row["penalty"]),
                "log_lambda": math.log(float(row["penalty"])),
                "deviance": _num(row.get("deviance")),
                "nonzero": row.get("nonzero"),
                **{f"coef:{t}": est[t][i] for t in terms},
            },
        )
        for i, row in enumerate(path)
    ]
    caption = (
        f" {len(path)} values of lambda, the largest on the right; the dashed vertical line "
        "marks the reported fit's lambda. The intercept (not penalised) is in the table only."
    )
    if len(drawn) < len([t for t in terms if t not in intercepts]):
        caption += (
            f" The chart draws the {len(drawn)} coefficients largest at that lambda; the "
            "table lists all."
        )
    return chart_box("penalty_path", "Lambda path", svg, caption, table("penalty_path", cols, rows))


def _positive(v: Any) -> bool:
    return v is not None and math.isfinite(float(v)) and float(v) > 0


def _num(v: Any) -> float:
    return math.nan if v is None else float(v)


# -- the registry's record of assessments ------------------------------------------------------


def recorded_assessments(rows: Sequence[Mapping[str, Any]]) -> str:
    """The assessments the registry recorded for the version (a retrain's holdout gates,
    ``indb assess --record``), oldest first."""
    if not rows:
        return note("The registry has recorded no assessment of this version.")
    cols = [
        Column("assessed_at", "assessed at (UTC)", "text"),
        Column("purpose", "purpose", "text"),
        Column("source", "source", "code"),
        Column("n_used", "rows", "count"),
        Column("actual", "actual"),
        Column("expected", "expected"),
        Column("deviance", "deviance"),
        Column("deviance_explained", "deviance explained", "share"),
        Column("gini", "Gini"),
        Column("compared", "compared with", "text"),
    ]
    shown = []
    for i, r in enumerate(rows):
        compared = None
        if r.get("compared_model"):
            compared = f"{r['compared_model']} v{fmt_count(r.get('compared_version'))}"
        shown.append(
            (str(i), {**r, "assessed_at": fmt_time(r.get("assessed_at")), "compared": compared})
        )
    return table("recorded_assessments", cols, shown)
