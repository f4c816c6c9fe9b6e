"""The plain-text report and the JSON rendering, built from real fits.

Every ``FitResult`` here comes from ``indb.fit`` on a fresh in-memory DuckDB loaded with an
open dataset shipped inside the statsmodels package (``statsmodels.datasets``). Where a
test reads numbers back out of the report it compares them with statsmodels GLM (the
oracle) at the precision the report prints them.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Iterator

import duckdb
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

import indb
from indb.report import CAUTION, _fmt_p, render_json, render_report

# Printed numbers carry at least five significant digits (indb/report.py); 1e-4 leaves room
# for the rounding of the last printed digit.
PRINT_RTOL = 1e-4


@pytest.fixture
def con() -> Iterator[duckdb.DuckDBPyConnection]:
    connection = duckdb.connect()
    yield connection
    connection.close()


def _load(con: duckdb.DuckDBPyConnection, name: str, frame: pd.DataFrame) -> None:
    con.register("frame_view", frame)
    con.execute(f'CREATE TABLE "{name}" AS SELECT * FROM frame_view')
    con.unregister("frame_view")


def _cpunish() -> pd.DataFrame:
    # statsmodels.datasets.cpunish: US executions by state in 1997 (17 rows).
    return sm.datasets.cpunish.load_pandas().data


def _spector() -> pd.DataFrame:
    # statsmodels.datasets.spector: Spector & Mazzeo (1980) grade outcomes (32 rows).
    return sm.datasets.spector.load_pandas().data


def _grunfeld() -> pd.DataFrame:
    # statsmodels.datasets.grunfeld: Grunfeld investment data, 11 firms x 20 years.
    return sm.datasets.grunfeld.load_pandas().data


def _row(report: str, term: str) -> list[str]:
    lines = report.splitlines()
    start = next(i for i, line in enumerate(lines) if line.lstrip().startswith("term "))
    rows = lines[start + 1 :]
    for i, line in enumerate(rows):
        if not line.strip():
            break
        if line == f"  {term}":  # a long term sits on its own line above its numbers
            return rows[i + 1].split()
        if line.startswith(f"  {term} "):
            return line[2 + len(term) :].split()
    raise AssertionError(f"no table row for term {term!r} in:\n{report}")


def _flat(text: str) -> str:
    """Whitespace collapsed, so wrapped prose can be searched."""
    return " ".join(text.split())


def _header(report: str) -> str:
    return next(line for line in report.splitlines() if line.lstrip().startswith("term "))


def _kv(report: str, label: str) -> str:
    for line in report.splitlines():
        if line.startswith(f"  {label}  "):
            return line[2 + len(label) :].strip()
    raise AssertionError(f"no line labelled {label!r} in:\n{report}")


def test_poisson_log_report_has_z_ratios_relativities_and_caution(con):
    data = _cpunish()
    _load(con, "cpunish", data)
    res = indb.fit("cpunish", "EXECUTIONS", "poisson", db=con)
    report = render_report(res)

    # Oracle: statsmodels GLM Poisson on the same data, the intercept added first.
    exog = sm.add_constant(data.drop(columns="EXECUTIONS")).rename(columns={"const": "intercept"})
    oracle = sm.GLM(data["EXECUTIONS"], exog, family=sm.families.Poisson()).fit()

    header = _header(report)
    assert "Wald z" in header and "Wald t" not in header
    assert "relativity" in header and "odds factor" not in header
    assert "95% interval" in header and "two-sided p" in header
    assert "referred to the normal distribution" in _flat(report)
    for term in exog.columns:
        cells = _row(report, term)
        estimate, std_error, relativity = float(cells[0]), float(cells[1]), float(cells[-1])
        assert estimate == pytest.approx(oracle.params[term], rel=PRINT_RTOL), term
        assert std_error == pytest.approx(oracle.bse[term], rel=PRINT_RTOL), term
        assert relativity == pytest.approx(math.exp(oracle.params[term]), rel=PRINT_RTOL), term
        # the interval cell is "low .. high", oracle statsmodels' conf_int (normal quantiles)
        low, dots, high = cells[4:7]
        assert dots == ".."
        assert float(low) == pytest.approx(oracle.conf_int().loc[term, 0], rel=PRINT_RTOL), term
        assert float(high) == pytest.approx(oracle.conf_int().loc[term, 1], rel=PRINT_RTOL), term
    assert "fixed by the family" in _kv(report, "dispersion")
    assert float(_kv(report, "deviance").split()[0]) == pytest.approx(
        oracle.deviance, rel=PRINT_RTOL
    )
    assert "poisson family, log link" in report
    assert "EXECUTIONS" in _kv(report, "response")
    assert "converged" in _kv(report, "IRLS iterations")
    # The caution is wrapped to the width; compare with whitespace collapsed.
    assert _flat(CAUTION) in _flat(report)
    assert "fairness review" in CAUTION and "regulatory review" in CAUTION


def test_gaussian_report_has_t_ratios_estimated_dispersion_and_tiny_p_values(con):
    data = _grunfeld().drop(columns="year")
    _load(con, "grunfeld", data)
    res = indb.fit("grunfeld", "invest", "gaussian", db=con)
    report = render_report(res)

    header = _header(report)
    assert "Wald t" in header and "Wald z" not in header
    assert "relativity" not in header and "odds factor" not in header
    assert f"referred to t on {int(res.residual_df)} residual df" in _flat(report)
    assert "estimated" in _kv(report, "dispersion")

    # Oracle: statsmodels GLM Gaussian; firm in treatment coding against the reference
    # indb chose (all firms have 20 rows, so the tie rule picks the smallest name).
    levels = sorted(data["firm"].unique())
    exog = pd.DataFrame({"intercept": 1.0, "value": data["value"], "capital": data["capital"]})
    for level in levels[1:]:
        exog[f"firm={level}"] = (data["firm"] == level).astype(float)
    # use_t=True: statsmodels GLM reports normal p-values unless asked for t (residual_df).
    oracle = sm.GLM(data["invest"], exog, family=sm.families.Gaussian()).fit(use_t=True)
    for term in exog.columns:
        cells = _row(report, term)
        assert float(cells[0]) == pytest.approx(oracle.params[term], rel=PRINT_RTOL), term
        p_cell = cells[3]
        if oracle.pvalues[term] < 1e-4:  # two significant digits: 1.2e-34
            assert float(p_cell) == pytest.approx(oracle.pvalues[term], rel=0.05), term
        else:
            assert float(p_cell) == pytest.approx(oracle.pvalues[term], rel=0.05, abs=1e-4)
    assert min(oracle.pvalues) < 1e-16  # the case has tiny p-values, printed in full


def test_p_values_below_the_smallest_double_keep_their_power_of_ten():
    # Oracle: scipy.stats.norm.logsf (log tail area, no underflow); a Wald z of 50 has
    # two-sided p = 2.2e-545, far below the smallest double, so the stored p is 0.

    log10_p = (math.log(2) + stats.norm.logsf(50.0)) / math.log(10)
    power = math.floor(log10_p)
    assert _fmt_p(0.0, 50.0, "z") == f"{10 ** (log10_p - power):.1f}e{power}"
    assert _fmt_p(0.0, -50.0, "z").endswith("e-545")
    assert _fmt_p(0.0, 60.0, "t", 30.0) == _fmt_p(0.0, -60.0, "t", 30.0)
    assert _fmt_p(3.2e-7) == "3.2e-07" and _fmt_p(0.04567) == "0.0457"


def test_t_p_values_where_scipys_log_tail_underflows():
    # A gamma model on 60,000 rows with a Wald t of 100 (an intercept, say): scipy's
    # t.logsf is log(sf), -inf once sf underflows, and the report raised OverflowError.
    # Oracle: mpmath's regularized incomplete beta at 60 digits, P(|T| > t) = I_x(df/2, 1/2)
    # with x = df / (df + t^2) (Abramowitz & Stegun 26.7.1); checked against scipy where
    # scipy's logarithm is finite (t 40 on 6,000 df, t 30 on 250 df).
    import mpmath

    from indb.report import _t_log_sf

    mpmath.mp.dps = 60
    for t, df in [(40.0, 6000.0), (30.0, 250.0), (100.0, 6000.0), (500.0, 60000.0),
                  (1e4, 3.5), (1e200, 50.0)]:  # fmt: skip
        x = mpmath.mpf(df) / (df + mpmath.mpf(t) ** 2)
        p = mpmath.betainc(mpmath.mpf(df) / 2, mpmath.mpf(1) / 2, 0, x, regularized=True)
        log10_p = float(mpmath.log10(p))
        assert math.log(2) + _t_log_sf(t, df) == pytest.approx(log10_p * math.log(10), rel=1e-12)
        power = math.floor(log10_p)
        assert _fmt_p(0.0, t, "t", df) == f"{10 ** (log10_p - power):.1f}e{power}", (t, df)
        scipy_log = float(stats.t(df).logsf(t))
        if math.isfinite(scipy_log):
            assert _t_log_sf(t, df) == pytest.approx(scipy_log, rel=1e-12)


def test_logit_report_shows_odds_factor(con):
    data = _spector()
    _load(con, "spector", data)
    res = indb.fit("spector", "GRADE", "binomial", db=con)
    report = render_report(res)
    header = _header(report)
    assert "odds factor" in header and "relativity" not in header
    assert "Wald z" in header
    exog = sm.add_constant(data[["GPA", "TUCE", "PSI"]]).rename(columns={"const": "intercept"})
    # Oracle: statsmodels GLM Binomial (logit) on the same data.
    oracle = sm.GLM(data["GRADE"], exog, family=sm.families.Binomial()).fit()
    for term in exog.columns:
        odds = float(_row(report, term)[-1])
        assert odds == pytest.approx(math.exp(oracle.params[term]), rel=PRINT_RTOL), term


def test_aliased_term_is_marked_in_words(con):
    data = _spector()
    _load(con, "spector", data)
    # GPA_twice is an exact multiple of GPA, so it is a linear combination of earlier terms.
    with pytest.warns(indb.AliasingWarning, match="GPA_twice"):
        res = indb.fit("SELECT *, 2 * GPA AS GPA_twice FROM spector", "GRADE", "binomial", db=con)
    report = render_report(res)
    assert res.coef("GPA_twice").aliased
    row = next(line for line in report.splitlines() if line.startswith("  GPA_twice "))
    assert "aliased" in row and "not estimated" in row
    # said once on the row and once in the notes, not a third time under the table
    notes = report.split("NOTES FROM THE FIT")[1]
    assert "GPA_twice" in notes and "linear combinations" in notes
    assert report.count("linear combination") == 2
    # The other rows still carry numbers, matching statsmodels without the duplicate column.
    exog = sm.add_constant(data[["GPA", "TUCE", "PSI"]]).rename(columns={"const": "intercept"})
    oracle = sm.GLM(data["GRADE"], exog, family=sm.families.Binomial()).fit()
    assert float(_row(report, "GPA")[0]) == pytest.approx(oracle.params["GPA"], rel=PRINT_RTOL)


def test_rows_set_aside_are_counted_by_column(con):
    data = _cpunish()
    _load(con, "cpunish", data)
    query = (
        "SELECT EXECUTIONS, CASE WHEN INCOME > 40000 THEN NULL ELSE INCOME END AS INCOME, "
        "PERPOVERTY FROM cpunish"
    )
    res = indb.fit(query, "EXECUTIONS", "poisson", db=con)
    report = render_report(res)
    # Expected count read from the data with pandas, not from indb.
    expected = int((data["INCOME"] > 40000).sum())
    assert expected > 0
    line = _kv(report, "rows set aside")
    assert line.split()[0] == str(expected)
    assert f"INCOME: {expected}" in line
    assert _kv(report, "rows used").split()[0] == str(len(data) - expected)


def test_missing_numbers_print_as_na_and_json_stays_strict(con):
    data = _cpunish()
    _load(con, "cpunish", data)
    # Tweedie reports no log-likelihood (API contract), so llf/AIC/BIC are NaN.
    res = indb.fit(
        "cpunish", "EXECUTIONS", "tweedie", "log", db=con, power=1.5, predictors=["INCOME"]
    )
    assert math.isnan(res.log_likelihood)
    report = render_report(res)
    assert _kv(report, "log-likelihood") == "n/a"
    assert _kv(report, "AIC") == "n/a"
    assert re.search(r"\bnan\b", report, flags=re.IGNORECASE) is None

    text = render_json(res)
    parsed = json.loads(text)  # json.loads accepts NaN; the check below is what matters
    assert "NaN" not in text and "Infinity" not in text
    assert parsed["log_likelihood"] is None and parsed["aic"] is None
    assert parsed["family"] == "tweedie"
    assert [c["term"] for c in parsed["coefficients"]] == res.terms
    assert parsed["coefficients"][1]["estimate"] == pytest.approx(res.estimates[1], rel=1e-15)


def test_width_sets_the_rules_and_wrapping(con):
    data = _spector()
    _load(con, "spector", data)
    res = indb.fit("spector", "GRADE", "binomial", db=con)
    wide = render_report(res, width=140)
    assert "=" * 140 in wide
    narrow = render_report(res, width=72)
    caution = narrow.split("CAUTION")[1]
    assert all(len(line) <= 72 for line in caution.splitlines())


def test_t_p_values_in_the_far_tail_do_not_overflow():
    # A Wald t of 100 on 60,000 df (the demo's gamma model at 10^5 rows): scipy's t.logsf
    # underflows to -inf there. Oracle: mpmath (30 digits), the t density integrated from
    # |t| to infinity with mpmath.quad, doubled.
    import mpmath

    for wald, df in ((100.0, 60000.0), (300.0, 5000.0)):
        with mpmath.workdps(30):
            nu = mpmath.mpf(df)
            c = mpmath.gamma((nu + 1) / 2) / (mpmath.sqrt(nu * mpmath.pi) * mpmath.gamma(nu / 2))
            density = lambda t, c=c, nu=nu: c * (1 + t**2 / nu) ** (-(nu + 1) / 2)  # noqa: E731
            exact = 2 * mpmath.quad(density, [wald, wald + 1, wald + 10, mpmath.inf])
        mantissa, power = _fmt_p(0.0, wald, "t", df).split("e")
        assert int(power) == int(mpmath.floor(mpmath.log10(exact)))
        assert abs(float(mantissa) - float(exact / mpmath.mpf(10) ** int(power))) <= 0.06
