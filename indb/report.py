"""Plain-text and JSON renderings of a :class:`~indb.results.FitResult`.

The text layout is indb's own: four titled blocks (model, fit quality, terms, notes) and a
closing caution. Numbers in a column share their decimals so the decimal points line up;
missing or non-finite numbers print as ``n/a``. Nothing here touches a database.
"""

from __future__ import annotations

import json
import math
import textwrap
from collections.abc import Sequence
from typing import Any

import numpy as np

from indb.results import TEXT_RENDERER, Coefficient, FitResult

__all__ = ["render_report", "render_json", "CAUTION", "format_p", "format_chi2_p"]

NA = "n/a"

CAUTION = (
    "A model that drives pricing, credit or any other decision about people needs "
    "independent validation, a fairness review and a regulatory review before it is used. "
    "Local regulation and qualified professionals take precedence over anything printed here."
)

# Label column of the key/value blocks and the field the value is right-aligned in.
_LABEL_WIDTH = 22
_VALUE_WIDTH = 18
_GAP = "  "
# The term column never shrinks below this; a table with little room runs past ``width``.
_MIN_TERM_WIDTH = 16


# -- public ---------------------------------------------------------------------------


def render_report(result: FitResult, *, width: int = 100) -> str:
    """Render a fitted model as a readable plain-text report.

    Parameters
    ----------
    result:
        The fit to describe.
    width:
        Target line width in characters. Rules and wrapped prose use it exactly; the term
        column of the coefficient table is shortened (with ``…``) when the table would
        otherwise be wider.

    Returns
    -------
    str
        The report, lines separated by ``\\n``, ending with a newline.
    """
    width = max(int(width), 60)
    blocks = [
        _title(result, width),
        _model_block(result, width),
        _quality_block(result, width),
        _penalty_block(result, width),
        _terms_block(result, width),
        _whole_terms_block(result, width),
        _drop_one_block(result, width),
        _notes_block(result, width),
        _caution_block(width),
    ]
    return "\n\n".join(b.rstrip("\n") for b in blocks if b) + "\n"


def render_json(result: FitResult) -> str:
    """Render a fit as one JSON object (``result.to_dict()``, indented, strict JSON).

    Non-finite numbers are already ``null`` in ``to_dict()``; ``allow_nan=False`` makes any
    that slip through fail loudly instead of producing invalid JSON.
    """
    return json.dumps(result.to_dict(), indent=2, allow_nan=False, default=_json_default)


# -- blocks ---------------------------------------------------------------------------


def _title(result: FitResult, width: int) -> str:
    rule = "=" * width
    text = f" indb | generalized linear model | {result.family} family, {result.link} link"
    return f"{rule}\n{text}\n{rule}"


def _model_block(result: FitResult, width: int) -> str:
    rows: list[tuple[str, str, str]] = [
        ("response", str(result.response), ""),
        ("source", _one_line(str(result.source)), ""),
    ]
    for key, label in (
        ("trials", "trials"),
        ("offset", "offset"),
        ("weight", "prior weight"),
        ("frequency_weight", "frequency weight"),
    ):
        value = result.spec.get(key) if isinstance(result.spec, dict) else None
        if value not in (None, ""):
            rows.append((label, _one_line(str(value)), ""))
    rows.append(("standard errors", *covariance_text(result)))
    rows.append(("rows used", _fmt_count(result.n_used), ""))
    rows.append(("rows set aside", _fmt_count(result.n_excluded), _exclusion_note(result)))
    if _finite(result.n_weighted) and result.n_weighted != result.n_used:
        rows.append(("weighted row total", _fmt_value(result.n_weighted), ""))
    state = "converged" if result.converged else "NOT converged (stopped at the iteration cap)"
    rows.append(("IRLS iterations", _fmt_count(result.iterations), state))
    rows.append(("fit path", str(result.path), ""))
    timing = ""
    if _finite(result.seconds_per_iteration):
        timing = f"{result.seconds_per_iteration:.3f} s per scan"
    rows.append(("wall time", _fmt_seconds(result.seconds), timing))
    return _kv_block("MODEL", rows, width)


def covariance_text(result: FitResult) -> tuple[str, str]:
    """The standard errors' source, in two parts: a name and how it is formed."""
    kind = result.covariance_kind
    if kind == "robust":
        return "robust", "each row's score squared, no small-sample factor (HC0)"
    if kind == "cluster":
        cluster = result.spec.get("cluster") if isinstance(result.spec, dict) else None
        over = f"{_fmt_count(result.clusters)} clusters of {_one_line(str(cluster))}"
        return "cluster-robust", f"scores summed in {over}, x G/(G-1)(N-1)/(N-K)"
    return "model-based", "inverse information times the dispersion"


def _quality_block(result: FitResult, width: int) -> str:
    if result.dispersion_estimated:
        disp_note = "estimated (Pearson chi-square / residual df)"
    else:
        disp_note = "fixed by the family"
    rows: list[tuple[str, str, str]] = [
        ("deviance", _fmt_value(result.deviance), ""),
        ("null deviance", _fmt_value(result.null_deviance), _null_note(result)),
        ("residual df", _fmt_df(result.residual_df), "rows (or frequency weights) less rank"),
        ("Pearson chi-square", _fmt_value(result.pearson_chi2), ""),
        ("dispersion", _fmt_value(result.dispersion), disp_note),
        ("log-likelihood", _fmt_value(result.log_likelihood), ""),
        ("AIC", _fmt_value(result.aic), ""),
        ("BIC", _fmt_value(result.bic), ""),
        ("model df", _fmt_count(result.model_df), ""),
    ]
    for name, value in result.family_params.items():
        text = f"{float(value):.6g}" if _finite(value) else NA
        error = result.family_param_errors.get(name)
        note = f"estimated, std error {error:.4g}" if error is not None and _finite(error) else ""
        rows.append((f"family: {name}", text, note))
    if _finite(result.condition_number):
        rows.append(("condition number", _fmt_value(result.condition_number), "of X'WX"))
    return _kv_block("FIT QUALITY", rows, width)


def _terms_block(result: FitResult, width: int) -> str:
    test = _test_label(result)
    level = _level_label(result.confidence)
    exp_name = _exp_column_name(result.link)
    legend = f"std error = standard error; Wald {test} = estimate / std error"
    if test == "t" and result.covariance_kind == "cluster":
        legend += f", referred to t on {_fmt_df(result.wald_df)} df (clusters less one)"
    elif test == "t":
        legend += f", referred to t on {_fmt_df(result.residual_df)} residual df"
    else:
        legend += ", referred to the normal distribution"
    legend += f"; {level} interval = estimate -/+ quantile x std error"
    if exp_name is not None:
        legend += f"; {exp_name} = exp(estimate)"
    lines = ["TERMS", "-" * len("TERMS"), *_wrap(legend + ".", width, indent="  "), ""]
    coefs = list(result.coefficients)
    if not coefs:
        lines.append("  (the model has no terms)")
        return "\n".join(lines)
    lines.extend(_coefficient_table(coefs, test, level, exp_name, width, result.wald_df))
    # An aliased term in the table says so on its row, and the notes say it once more; a
    # term set aside before the table was built gets its line here.
    shown = {c.term for c in coefs}
    unshown = [term for term in result.aliased_terms if term not in shown]
    if unshown:
        lines.append("")
        lines.extend(
            _wrap(
                "also set aside as linear combinations of earlier terms: " + ", ".join(unshown),
                width,
                indent="  ",
            )
        )
    return "\n".join(lines)


def _whole_terms_block(result: FitResult, width: int) -> str:
    """Each term as a whole: its Wald chi-square (all its coefficients zero) and its
    generalized VIF; empty when the model has no terms."""
    if not result.term_tests:
        return ""
    title = "WHOLE TERMS"
    legend = (
        "Wald chi-square of all the term's coefficients at once, its df and chi-square tail "
        "probability; GVIF = generalized variance-inflation factor (Fox and Monette), "
        "GVIF^(1/2df) comparable across terms."
    )
    lines = [title, "-" * len(title), *_wrap(legend, width, indent="  "), ""]
    gvif = {c.term: c for c in result.collinearity}
    rows = [
        (
            t.term,
            str(t.df),
            _fmt_value(t.wald_chi2),
            _chi2_p(t.p_value, t.wald_chi2, t.df),
            _fmt_value(gvif[t.term].gvif) if t.term in gvif else NA,
            _fmt_fixed(gvif[t.term].gvif_scaled, 3) if t.term in gvif else NA,
        )
        for t in result.term_tests
    ]
    heads = ("term", "df", "Wald chi-square", "p", "GVIF", "GVIF^(1/2df)")
    lines += _term_table(heads, rows)
    return "\n".join(lines)


def _term_table(heads: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    """A table of one row per term: the term left-aligned, the other cells right-aligned."""
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(heads)]
    lines = [
        "  "
        + heads[0].ljust(widths[0])
        + "".join(_GAP + h.rjust(w) for h, w in zip(heads[1:], widths[1:], strict=True))
    ]
    for r in rows:
        cells = "".join(_GAP + v.rjust(w) for v, w in zip(r[1:], widths[1:], strict=True))
        lines.append("  " + r[0].ljust(widths[0]) + cells)
    return lines


def _drop_one_block(result: FitResult, width: int) -> str:
    """The drop-one likelihood-ratio tests (with ``drop_one``): per term, what leaving it
    out costs in deviance, on how many df, and the test; terms not tested say why."""
    ran = [t for t in result.term_tests if t.drop_df is not None or t.drop_note is not None]
    if not ran:
        return ""
    kind = "F" if result.dispersion_estimated else "chi-square"
    title = "LEAVING EACH TERM OUT"
    legend = (
        "Each term's model refitted without it on the same rows: the deviance it adds and "
        "the coefficients it removes (df); "
        + (
            "F = added deviance / df / the full model's dispersion, on (df, residual df)."
            if result.dispersion_estimated
            else "the added deviance is referred to chi-square on df."
        )
    )
    lines = [title, "-" * len(title), *_wrap(legend, width, indent="  "), ""]
    tested = [t for t in ran if t.drop_df is not None]
    rows = [
        (
            t.term,
            str(t.drop_df),
            _fmt_value(t.drop_deviance),
            _fmt_value(t.lr_statistic) if result.dispersion_estimated else "",
            _chi2_p(t.lr_p_value, t.drop_deviance, t.drop_df)
            if not result.dispersion_estimated and t.drop_df
            else _fmt_p(t.lr_p_value),
        )
        for t in tested
    ]
    heads = ("term", "df", "added deviance", "F" if kind == "F" else "", "p")
    keep = [i for i, h in enumerate(heads) if h or any(r[i] for r in rows)]
    heads = tuple(heads[i] for i in keep)
    rows = [tuple(r[i] for i in keep) for r in rows]
    if rows:
        lines += _term_table(heads, rows)
    for t in ran:
        if t.drop_note:
            lines.extend(_wrap(f"{t.term}: {t.drop_note}", width, indent="  "))
    return "\n".join(lines)


def _penalty_block(result: FitResult, width: int) -> str:
    """A penalised fit's lambda, share and path, and why no standard errors are shown."""
    pen = result.penalty
    if not pen:
        return ""
    lines = ["PENALTY (ELASTIC NET)", "-" * len("PENALTY (ELASTIC NET)")]
    lines.append(
        f"  lambda {pen['penalty']:.6g}, L1 share {pen['l1_share']:g}; "
        f"{pen['nonzero']} of {pen['penalised_terms']} penalised coefficients non-zero"
    )
    if result.penalty_path:
        first, last = result.penalty_path[0], result.penalty_path[-1]
        which = "the chosen lambda's (cross-validation below)" if result.cv else "the last's"
        lines.append(
            f"  path of {len(result.penalty_path)} lambdas from lambda_max "
            f"{first['penalty']:.6g} down to {last['penalty']:.6g}; the estimates below are "
            f"{which}"
        )
        for r in result.penalty_path:
            lines.append(
                f"    lambda {r['penalty']:<12.6g} deviance {r['deviance']:<14.8g} "
                f"non-zero {r['nonzero']}"
            )
    lines += _cv_lines(result, width)
    lines.extend(_wrap(str(pen["note"]).upper()[:1] + str(pen["note"])[1:], width, indent="  "))
    return "\n".join(lines)


def _cv_lines(result: FitResult, width: int) -> list[str]:
    """The cross-validation table: mean out-of-fold deviance per unit weight and its
    standard error per lambda, the rule's choice marked."""
    if not result.cv:
        return []
    k = len(result.cv[0]["per_fold"])
    rule = {"min": "least mean deviance", "one_se": "largest lambda within one SE of the least"}
    lines = _wrap(
        f"{k}-fold cross-validation (held-out deviance per unit weight); chosen by "
        f"{rule.get(str(result.chosen_rule), str(result.chosen_rule))}: lambda "
        f"{result.chosen_penalty:.6g}",
        width,
        indent="  ",
    )
    for r in result.cv:
        mark = "  <- chosen" if r["penalty"] == result.chosen_penalty else ""
        lines.append(
            f"    lambda {r['penalty']:<12.6g} mean {r['mean_deviance']:<14.8g} "
            f"SE {r['se']:<12.6g}{mark}".rstrip()
        )
    return lines


def _notes_block(result: FitResult, width: int) -> str:
    lines = ["NOTES FROM THE FIT", "-" * len("NOTES FROM THE FIT")]
    if not result.warnings:
        lines.append("  none")
    for message in result.warnings:
        lines.extend(_wrap(str(message), width, indent="  * ", subsequent="    "))
    return "\n".join(lines)


def _caution_block(width: int) -> str:
    lines = ["CAUTION", "-" * len("CAUTION")]
    lines.extend(_wrap(CAUTION, width, indent="  "))
    return "\n".join(lines)


# -- coefficient table ----------------------------------------------------------------


def _coefficient_table(
    coefs: Sequence[Coefficient],
    test: str,
    level: str,
    exp_name: str | None,
    width: int,
    df: float = math.nan,
) -> list[str]:
    live = [c for c in coefs if not c.aliased]
    numeric: list[tuple[str, list[str]]] = [
        ("estimate", _fmt_column([c.estimate for c in live])),
        ("std error", _fmt_column([c.std_error for c in live])),
        (f"Wald {test}", [_fmt_fixed(c.wald, 2) for c in live]),
        ("two-sided p", [_fmt_p(c.p_two_sided, c.wald, test, df) for c in live]),
        (f"{level} interval", _interval_column(live)),
    ]
    if exp_name is not None:
        numeric.append((exp_name, _fmt_column([_safe_exp(c.estimate) for c in live])))
    widths = [max(len(h), *(len(v) for v in vals)) if vals else len(h) for h, vals in numeric]
    numbers_width = sum(widths) + len(_GAP) * len(widths)
    # A term longer than the room left by the numbers gets a line of its own, with its
    # numbers on the next line: names are never cut, as clipped level names can collide.
    longest = max(len("term"), *(len(c.term) for c in coefs))
    room = width - 2 - numbers_width
    term_width = min(longest, max(room, _MIN_TERM_WIDTH))

    header = "  " + "term".ljust(term_width)
    header += "".join(_GAP + h.rjust(w) for (h, _), w in zip(numeric, widths, strict=True))
    out = [header.rstrip()]
    live_row = 0
    for c in coefs:
        if len(c.term) > term_width:
            out.append(f"  {c.term}")
            name = " " * term_width
        else:
            name = c.term.ljust(term_width)
        if c.aliased:
            out.append(f"  {name}{_GAP}aliased: linear combination of earlier terms, not estimated")
            continue
        cells = [vals[live_row].rjust(w) for (_, vals), w in zip(numeric, widths, strict=True)]
        out.append(("  " + name + "".join(_GAP + cell for cell in cells)).rstrip())
        live_row += 1
    return out


# -- formatting helpers ---------------------------------------------------------------


def _kv_block(title: str, rows: Sequence[tuple[str, str, str]], width: int) -> str:
    lines = [title, "-" * len(title)]
    value_indent = " " * (2 + _LABEL_WIDTH)
    numeric_width = max(
        [_VALUE_WIDTH, *(len(v) for _, v, _ in rows if _looks_numeric(v))], default=0
    )
    for label, value, note in rows:
        value_cell = value.rjust(numeric_width) if _looks_numeric(value) else value
        line = f"  {label.ljust(_LABEL_WIDTH)}{value_cell}"
        if note:
            line += f"   {note}"
        if len(line) <= width:
            lines.append(line.rstrip())
            continue
        # Long text (an inline query as the source, say) wraps under the value column.
        lines.extend(
            textwrap.wrap(
                line.strip()[len(label) :].strip(),
                width=width,
                initial_indent=f"  {label.ljust(_LABEL_WIDTH)}",
                subsequent_indent=value_indent,
                break_on_hyphens=False,
            )
        )
    return "\n".join(lines)


def _looks_numeric(text: str) -> bool:
    if text == NA:
        return True
    try:
        float(text.replace(",", ""))
    except ValueError:
        return False
    return True


def _finite(value: Any) -> bool:
    try:
        return math.isfinite(float(value))
    except (TypeError, ValueError):
        return False


def _fmt_count(value: Any) -> str:
    if not _finite(value):
        return NA
    return f"{int(value):,}"


def _fmt_df(value: Any) -> str:
    if not _finite(value):
        return NA
    v = float(value)
    return f"{int(v):,}" if v.is_integer() else f"{v:,.2f}"


def _fmt_seconds(value: Any) -> str:
    return f"{float(value):.3f} s" if _finite(value) else NA


def _decimals_for(magnitude: float, significant: int = 6, cap: int = 8) -> int:
    if magnitude == 0:
        return 4
    return max(0, min(cap, significant - 1 - math.floor(math.log10(magnitude))))


def _fmt_value(value: Any) -> str:
    """One number with about six significant digits, fixed-point when that stays readable."""
    if not _finite(value):
        return NA
    v = float(value)
    a = abs(v)
    if a != 0 and (a < 1e-6 or a >= 1e15):
        return f"{v:.5e}"
    if v.is_integer():
        return f"{int(v):,}"
    return f"{v:,.{_decimals_for(a)}f}"


def _fmt_sig(value: Any, significant: int = 5) -> str:
    """About five significant digits: fixed-point for everyday sizes, scientific otherwise."""
    if not _finite(value):
        return NA
    v = float(value)
    a = abs(v)
    if a == 0:
        return "0"
    if a < 1e-4 or a >= 1e9:
        return f"{v:.{significant - 1}e}"
    return f"{v:.{_decimals_for(a, significant=significant)}f}"


def _fmt_column(values: Sequence[float]) -> list[str]:
    """Format a column so that the decimal points (or mantissa points) line up."""
    cells = [_fmt_sig(v) for v in values]
    heads, tails = [], []
    for cell in cells:
        head, dot, tail = cell.partition(".")
        heads.append(head)
        tails.append(dot + tail)
    head_width = max((len(h) for h in heads), default=0)
    tail_width = max((len(t) for t in tails), default=0)
    return [h.rjust(head_width) + t.ljust(tail_width) for h, t in zip(heads, tails, strict=True)]


def _fmt_fixed(value: Any, decimals: int) -> str:
    return f"{float(value):.{decimals}f}" if _finite(value) else NA


def _fmt_p(value: Any, wald: Any = math.nan, test: str = "z", df: Any = math.nan) -> str:
    """A two-sided p-value: four decimals, then two significant digits, and past the
    smallest double (where the stored value is 0) the power of ten from the Wald value."""
    if not _finite(value):
        return NA
    p = float(value)
    if p >= 1e-4:
        return f"{p:.4f}"
    if p > 0.0 or not _finite(wald):
        return f"{p:.1e}"
    return _tiny_p(float(wald), test, df)


def _tiny_p(wald: float, test: str, df: Any) -> str:
    from scipy import stats  # only for p-values below the smallest double

    z = abs(wald)
    if test == "t" and _finite(df):
        log_sf = float(stats.t(float(df)).logsf(z))
        if not math.isfinite(log_sf):
            # scipy's t.logsf is log(sf): -inf once sf underflows (t 100 on 6,000 df)
            log_sf = _t_log_sf(z, float(df))
    else:
        log_sf = float(stats.norm.logsf(z))
    return _from_log(math.log(2.0) + log_sf)


def _t_log_sf(t: float, df: float) -> float:
    """ln P(T > t) for Student's t on ``df`` degrees of freedom, far in the tail: P(T > t) =
    I_x(df/2, 1/2) / 2 with x = df / (df + t^2) (Abramowitz & Stegun 26.7.1), the
    regularized incomplete beta from its continued fraction (A&S 26.5.8), in logarithms."""
    a, b = df / 2.0, 0.5
    log_den = 2.0 * math.log(t) + math.log1p(df / t / t)  # ln(df + t^2), t^2 never formed
    log_x, log_1mx = math.log(df) - log_den, 2.0 * math.log(t) - log_den
    log_beta = math.lgamma(a) + math.lgamma(b) - math.lgamma(a + b)
    front = a * log_x + b * log_1mx - log_beta - math.log(a)
    return math.log(0.5) + front + math.log(_beta_fraction(a, b, math.exp(log_x)))


def _beta_fraction(a: float, b: float, x: float) -> float:
    """The continued fraction of I_x(a, b) (A&S 26.5.8) by the modified Lentz method
    (Numerical Recipes, 2nd ed., 6.4); it converges quickly for x < (a + 1) / (a + b + 2),
    which holds wherever the t tail underflows."""
    tiny = 1e-300

    def nonzero(v: float) -> float:
        return v if abs(v) > tiny else tiny

    c, d = 1.0, 1.0 / nonzero(1.0 - (a + b) * x / (a + 1.0))
    h = d
    for m in range(1, 10_000):
        for coef in (
            m * (b - m) * x / ((a + 2 * m - 1.0) * (a + 2 * m)),
            -(a + m) * (a + b + m) * x / ((a + 2 * m) * (a + 2 * m + 1.0)),
        ):
            d = 1.0 / nonzero(1.0 + coef * d)
            c = nonzero(1.0 + coef / c)
            h *= d * c
        if abs(d * c - 1.0) < 1e-15:
            break
    return h


def _chi2_p(p: float, chi2: float, df: int) -> str:
    """A chi-square tail probability, past the smallest double from its logarithm."""
    if not (p == 0.0 and _finite(chi2)):
        return _fmt_p(p)
    from scipy import stats

    log_p = float(stats.chi2.logsf(chi2, df))
    if not math.isfinite(log_p):
        # far tail: Q(a, x) ~ x^(a-1) e^-x / Gamma(a) (1 + (a-1)/x + (a-1)(a-2)/x^2),
        # a = df/2, x = chi2/2 (Abramowitz & Stegun 6.5.32)
        a, x = df / 2.0, chi2 / 2.0
        series = 1.0 + (a - 1.0) / x + (a - 1.0) * (a - 2.0) / x**2
        log_p = (a - 1.0) * math.log(x) - x - math.lgamma(a) + math.log(series)
    return _from_log(log_p)


def _from_log(log_p: float) -> str:
    """``m.me-k`` from the natural logarithm of a probability."""
    if not math.isfinite(log_p):
        return "0"
    log10_p = log_p / math.log(10.0)
    power = math.floor(log10_p)
    return f"{10 ** (log10_p - power):.1f}e{power:d}"


def _interval_column(coefs: Sequence[Coefficient]) -> list[str]:
    """``low .. high`` cells, each end aligned on its decimal point."""
    lows = _fmt_column([c.lower_bound for c in coefs])
    highs = _fmt_column([c.upper_bound for c in coefs])
    low_w = max((len(v) for v in lows), default=0)
    high_w = max((len(v) for v in highs), default=0)
    return [f"{lo.rjust(low_w)} .. {hi.ljust(high_w)}" for lo, hi in zip(lows, highs, strict=True)]


def _safe_exp(value: Any) -> float:
    if not _finite(value):
        return math.nan
    v = float(value)
    return math.exp(v) if v < 709.0 else math.inf


def _test_label(result: FitResult) -> str:
    return "t" if str(result.test).strip().lower().startswith("t") else "z"


def _level_label(confidence: float) -> str:
    return f"{float(confidence) * 100:g}%"


def _exp_column_name(link: str) -> str | None:
    name = str(link).strip().lower()
    if name == "log":
        return "relativity"
    if name == "logit":
        return "odds factor"
    return None


def _null_note(result: FitResult) -> str:
    if not _finite(result.residual_df):
        return "intercept-only model"
    null_df = float(result.residual_df) + float(result.model_df)
    return f"intercept-only model, {_fmt_df(null_df)} residual df"


def _exclusion_note(result: FitResult) -> str:
    counts = {k: v for k, v in result.excluded_by_column.items() if v}
    if not counts:
        return ""
    parts = ", ".join(f"{col}: {_fmt_count(n)}" for col, n in counts.items())
    return f"NULL counts by column: {parts}"


def _one_line(text: str) -> str:
    return " ".join(text.split())


def _wrap(text: str, width: int, indent: str = "", subsequent: str | None = None) -> list[str]:
    return textwrap.wrap(
        text,
        width=width,
        initial_indent=indent,
        subsequent_indent=indent if subsequent is None else subsequent,
        break_long_words=False,
        break_on_hyphens=False,
    ) or [indent.rstrip()]


def _json_default(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, set | frozenset):
        return sorted(obj, key=str)
    raise TypeError(f"cannot write a {type(obj).__name__} to JSON: {obj!r}")


#: a two-sided p-value as this report prints it (past the smallest double, from the Wald
#: statistic), and a chi-square tail probability: for other renderings (the HTML report)
format_p = _fmt_p
format_chi2_p = _chi2_p

TEXT_RENDERER["report"] = render_report
