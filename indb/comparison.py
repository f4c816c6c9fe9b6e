"""Comparisons of stored results: coefficient changes between two versions of a model, and
the test of a model against a larger one that contains it, fitted on the same rows.

No scan: everything comes from the two results (deviances, ranks, dispersion). The nested
test refers the deviance change to chi-squared on the difference in estimated coefficients
where the family fixes the dispersion, and otherwise to F with the larger model's
dispersion (Pearson's chi-squared over its residual degrees of freedom) in the denominator,
the usual analysis of deviance (common practice).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

from indb.errors import SpecError
from indb.results import FitResult


def version_changes(name: str, a: int, b: int, ra: FitResult, rb: FitResult) -> dict[str, Any]:
    """Coefficient changes between versions ``a`` and ``b``, in standard errors of ``a``."""
    terms = []
    tb = {c.term: c for c in rb.coefficients}
    for c in ra.coefficients:
        other = tb.get(c.term)
        change = other.estimate - c.estimate if other else math.nan
        terms.append(
            {
                "term": c.term,
                "estimate_a": c.estimate,
                "estimate_b": other.estimate if other else math.nan,
                "change": change,
                "change_in_se": change / c.std_error
                if c.std_error and c.std_error > 0
                else math.nan,
                "relative_change": change / abs(c.estimate) if c.estimate else math.nan,
            }
        )
    only_b = [c.term for c in rb.coefficients if c.term not in {x.term for x in ra.coefficients}]
    return {
        "model": name,
        "a": a,
        "b": b,
        "terms": terms,
        "terms_only_in_b": only_b,
        "deviance": [ra.deviance, rb.deviance],
        "deviance_per_row": [ra.deviance / max(ra.n_used, 1), rb.deviance / max(rb.n_used, 1)],
        "rows": [ra.n_used, rb.n_used],
        "aic": [ra.aic, rb.aic],
        "converged": [ra.converged, rb.converged],
    }


def parse_reference(text: str) -> tuple[str, int | None]:
    """``NAME`` (the live version) or ``NAME:VERSION`` as (name, version)."""
    name, sep, version = str(text).partition(":")
    if not sep:
        return name, None
    if not version.strip().isdigit():
        raise SpecError(
            f"model reference {text!r}: the part after ':' must be a version number, as in "
            f"{name}:2 (or give the name alone for the live version)"
        )
    return name, int(version)


@dataclass(frozen=True)
class NestedTest:
    """A model ``small`` against ``big``, which contains its terms, on the same rows."""

    small: str
    big: str
    family: str
    rows: int
    deviance_small: float
    deviance_big: float
    #: deviance of ``small`` less that of ``big``
    deviance_change: float
    #: estimated coefficients ``big`` adds
    df: int
    #: "chi2" (fixed dispersion) or "F" (estimated: ``big``'s dispersion)
    test: str
    statistic: float
    p_value: float
    #: F only: the denominator's degrees of freedom (``big``'s residual df) and dispersion
    residual_df: float | None = None
    dispersion: float | None = None
    terms_added: tuple[str, ...] = ()
    converged: tuple[bool, bool] = (True, True)

    def to_dict(self) -> dict[str, Any]:
        out = asdict(self)
        out["terms_added"] = list(self.terms_added)
        out["converged"] = list(self.converged)
        return out


def nested_test(small_label: str, small: FitResult, big_label: str, big: FitResult) -> NestedTest:
    """The deviance test of ``small`` within ``big`` (labels name them in messages).

    Raises
    ------
    SpecError
        When the two were not fitted on the same data with the same family, link, weights
        and offset, or ``small``'s coefficients are not among ``big``'s, naming the difference.
    """
    differences = _differences(small, big)
    if differences:
        raise SpecError(
            f"{small_label} is not nested in {big_label}: {'; '.join(differences)}; "
            "compare two models fitted on the same rows, the smaller one's terms among the "
            "larger one's"
        )
    rank_small = sum(1 for c in small.coefficients if not c.aliased)
    rank_big = sum(1 for c in big.coefficients if not c.aliased)
    df = rank_big - rank_small
    if df <= 0:
        raise SpecError(
            f"{big_label} estimates {rank_big} coefficients and {small_label} {rank_small}: the "
            "larger model adds none, so there is nothing to test; name the smaller model first"
        )
    change = small.deviance - big.deviance
    added = tuple(c.term for c in big.coefficients if c.term not in set(small.terms))
    common = {
        "small": small_label,
        "big": big_label,
        "family": small.family,
        "rows": small.n_used,
        "deviance_small": small.deviance,
        "deviance_big": big.deviance,
        "deviance_change": change,
        "df": df,
        "terms_added": added,
        "converged": (small.converged, big.converged),
    }
    test, statistic, p = deviance_test(
        change, df, big.dispersion_estimated, big.dispersion, big.residual_df
    )
    if test == "chi2":
        return NestedTest(**common, test=test, statistic=statistic, p_value=p)
    return NestedTest(
        **common,
        test=test,
        statistic=statistic,
        p_value=p,
        residual_df=big.residual_df,
        dispersion=big.dispersion,
    )


def deviance_test(
    change: float, df: int, dispersion_estimated: bool, dispersion: float, residual_df: float
) -> tuple[str, float, float]:
    """The test of a deviance ``change`` between nested models on the same rows, ``df`` the
    difference in estimated coefficients: ("chi2", change, its chi-square tail) where the
    family fixes the dispersion; otherwise ("F", change / df / dispersion, its F(df,
    residual_df) tail), with the larger model's ``dispersion`` and ``residual_df`` (the usual
    analysis of deviance, common practice). NaN where there are no df to test."""
    from scipy import stats  # imported here: only these tests need it

    if not dispersion_estimated:
        p = float(stats.chi2.sf(change, df)) if df > 0 and math.isfinite(change) else math.nan
        return "chi2", change, p
    ok = df > 0 and dispersion > 0 and math.isfinite(change)
    f = change / df / dispersion if ok else math.nan
    p = float(stats.f.sf(f, df, residual_df)) if residual_df > 0 and math.isfinite(f) else math.nan
    return "F", f, p


#: fingerprint entries that identify the rows a fit used
_DATA_KEYS = ("rows", "rows_used", "sum_weights", "sum_weighted_response")


def _differences(small: FitResult, big: FitResult) -> list[str]:
    """What keeps ``small`` from being nested in ``big``, in words (empty: nothing)."""
    out: list[str] = []

    def differ(what: str, a: Any, b: Any) -> None:
        if a != b:
            out.append(f"{what} differ ({_show(a)} and {_show(b)})")

    differ(
        "sources", small.spec.get("source", {}).get("text"), big.spec.get("source", {}).get("text")
    )
    differ("responses", small.response, big.response)
    differ("families", small.family, big.family)
    differ("family parameters", small.family_params, big.family_params)
    differ("links", small.link, big.link)
    for key in ("weight", "frequency_weight", "trials", "offset"):
        differ(f"{key.replace('_', ' ')} expressions", small.spec.get(key), big.spec.get(key))
    differ("rows used", small.n_used, big.n_used)
    if not out:
        for key in _DATA_KEYS:
            differ(
                f"data ({key.replace('_', ' ')})",
                small.fingerprint.get(key),
                big.fingerprint.get(key),
            )
    missing = [t for t in small.terms if t not in set(big.terms)]
    if missing:
        shown = ", ".join(repr(t) for t in missing[:5]) + (" ..." if len(missing) > 5 else "")
        out.append(f"terms {shown} of the smaller model are not in the larger one")
    knots_small, knots_big = small.design.get("knots", {}), big.design.get("knots", {})
    for column in knots_small:
        differ(f"spline knots of {column!r}", knots_small[column], knots_big.get(column))
    return out


def _show(value: Any) -> str:
    if value is None:
        return "none"
    if isinstance(value, int | float) and not isinstance(value, bool):
        return f"{value:,}" if isinstance(value, int) else f"{value:.10g}"
    return repr(value)
