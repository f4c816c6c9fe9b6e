"""``indb report`` and ``indb.report_html`` (issue 17): the numbers in the HTML page's tables
against the JSON of ``indb show`` / ``indb versions`` / ``indb assess``, and against outside
oracles; the page is self-contained; bad input gives one line and leaves no file.

Data and models: ``tests/report_cases.py`` (statsmodels' fair survey; rating levels with
quotes, markup and non-ASCII letters). Each outside check names its oracle:

* relativities and odds factors with their intervals: statsmodels GLM (test-only) on the
  training rows with indb's design, ``exp(params)`` and ``exp(conf_int())`` (normal
  quantile; t on the residual df with ``use_t=True`` for the gaussian model, whose
  dispersion is estimated). The oracle is checked first: its coefficients against indb's;
* a spline's curve and band: the same statsmodels fit with the age spline written in an
  independent basis of the same function space (scipy's natural cubic splines on the
  knots, continued linearly: ``report_cases.natural_spline_basis``); the curve relative to
  the training mean is invariant to the basis, its band is sqrt(d' V d) with statsmodels'
  covariance;
* training rows per level: pandas ``value_counts``; the training mean: pandas ``mean``;
* the Lorenz table: numpy cumulative sums of the bands in ``indb assess --json``.
"""

from __future__ import annotations

import dataclasses
import json
import math
import re
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from assess_cases import SM_FIT
from click.testing import CliRunner, Result
from numpy.testing import assert_allclose
from report_cases import (
    FIT_TOL,
    LABELS,
    SOURCE,
    build,
    exact,
    frames,
    natural_spline_basis,
    read_tables,
    same_number,
)
from scipy import stats

import indb
from indb.cli import main
from indb.errors import RegistryError, SpecError
from indb.splines import spline_basis, spline_basis_sql
from indb.term_effects import term_effects

#: indb at tol 1e-12 and statsmodels at 1e-13 agree to about 1e-8 in the coefficients
ORACLE_RTOL = 1e-6


def _run(*args: str) -> Result:
    return CliRunner().invoke(main, [str(a) for a in args])


def _json(result: Result) -> Any:
    assert result.exit_code == 0, (result.stdout, result.stderr)
    return json.loads(result.stdout)


def _one_error_line(result: Result, code: int, *needles: str) -> str:
    assert result.exit_code == code, (result.exit_code, result.stdout, result.stderr)
    lines = [ln for ln in result.stderr.splitlines() if ln.startswith("indb: error:")]
    assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    return lines[0]


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    folder = tmp_path_factory.mktemp("report")
    out = build(folder)
    db = str(out["db"])
    pages = {}
    for name, on in (("children", "fair_hold"), ("had", "fair_hold"), ("educ_g", None)):
        path = folder / f"{name}.html"
        args = ["report", name, "--db", db, "--out", path]
        if on:
            args += ["--on", on]
        result = _run(*args)
        assert result.exit_code == 0, result.stderr
        assert str(path) in result.stdout and "Open it in a browser" in result.stdout
        pages[name] = path.read_text(encoding="utf-8")
    return {**out, "db": db, "folder": folder, "pages": pages}


def _tables(built: dict[str, Any], name: str) -> dict[str, dict[str, dict[str, Any]]]:
    return read_tables(built["pages"][name]).tables


# -- the numbers against indb's own JSON -------------------------------------------------------


def test_coefficients_and_fit_quality_equal_show_json(built: dict[str, Any]) -> None:
    for name in ("children", "had", "educ_g"):
        shown = _json(_run("show", name, "--db", built["db"], "--json"))
        t = _tables(built, name)
        coefs = t["coefficients"]
        assert list(coefs) == [c["term"] for c in shown["coefficients"]]
        for c in shown["coefficients"]:
            row = coefs[c["term"]]
            for field in ("estimate", "std_error", "wald", "lower_bound", "upper_bound"):
                same_number(c[field], row[field])
            assert exact(row["p_two_sided"]) == c["p_two_sided"]
        quality = t["quality"]
        for field in (
            "deviance",
            "null_deviance",
            "pearson_chi2",
            "dispersion",
            "log_likelihood",
            "aic",
            "bic",
            "residual_df",
            "condition_number",
        ):
            same_number(shown[field], quality[field]["value"])
        for field in ("model_df", "iterations"):
            assert exact(quality[field]["value"]) == shown[field]
        assert quality["converged"]["value"][1] == str(shown["converged"]).lower()
        model = t["model"]
        for field in ("n_used", "n_excluded"):
            assert exact(model[field]["value"]) == shown[field]
        assert model["response"]["value"][1] == shown["response"]
        # the iteration trace's table: the stored iteration log, scan by scan
        log = t["iterations"]
        assert len(log) == len(shown["iteration_log"])
        for i, rec in enumerate(shown["iteration_log"], start=1):
            row = log[str(i)]
            for field in ("deviance", "relative_change", "seconds"):
                same_number(rec[field], row[field])
            assert exact(row["step_halvings"]) == rec["step_halvings"]
            assert row["phase"][1] == rec["phase"]
        tests = t["term_tests"]
        gvif = {g["term"]: g for g in shown["collinearity"]}
        for tt in shown["term_tests"]:
            row = tests[tt["term"]]
            same_number(tt["wald_chi2"], row["wald_chi2"])
            assert exact(row["p_value"]) == tt["p_value"] and exact(row["df"]) == tt["df"]
            same_number(gvif[tt["term"]]["gvif"], row["gvif"])


def test_version_history_and_events(built: dict[str, Any]) -> None:
    listed = _json(_run("versions", "children", "--db", built["db"], "--json"))["versions"]
    t = _tables(built, "children")
    rows = t["versions"]
    assert list(rows) == [str(v["version"]) for v in listed] == ["1", "2"]
    for v in listed:
        row = rows[str(v["version"])]
        assert row["status"][1] == v["status"]
        assert exact(row["n_used"]) == v["n_used"]
        same_number(v["deviance"], row["deviance"])
    assert rows["1"]["status"][1] == "retired" and rows["2"]["status"][1] == "live"
    assert exact(rows["2"]["parent_version"]) == 1 and rows["1"]["parent_version"][1] is None
    # the retrain's gates, recorded as version 2's note (indb/retrain.py gate_note)
    assert list(t["version_notes"]) == ["2"]  # version 1 (indb.fit) has no note
    note = t["version_notes"]["2"]["note"][1]
    assert note == listed[1]["note"]
    assert "min_rows 3183 (limit 100) passed" in note and "max_change_in_se" in note
    assert "replacing version 1" in rows["2"]["went_live"][0]
    reg = indb.api.registry(built["db"], read_only=True)
    try:
        events = reg.events("children")
    finally:
        reg.engine.close()
    shown = t["events"]
    assert [shown[str(i)]["action"][1] for i in range(len(events))] == [e["action"] for e in events]
    assert [exact(shown[str(i)]["version"]) for i in range(len(events))] == [1, 1, 2, 2]


def test_assessment_tables_equal_assess_json(built: dict[str, Any]) -> None:
    for name in ("children", "had"):
        # the report judges the model with its numeric columns as --by columns
        by = ["--by", "age", "--by", "educ"] if name == "children" else ["--by", "age"]
        judged = _json(
            _run("assess", name, "--db", built["db"], "--on", "fair_hold", *by, "--json")
        )
        t = _tables(built, name)
        totals = t["assessment"]
        for field in (
            "rows",
            "rows_read",
            "rows_excluded",
            "rows_unseen",
            "weight",
            "exposure",
            "actual",
            "expected",
            "actual_over_expected",
            "deviance",
            "mean_deviance",
            "null_deviance",
            "deviance_explained",
            "gini",
            "gini_normalized",
            "scans",
        ):
            same_number(judged[field], totals[field]["value"], digits=3)
        assert exact(totals["excluded.NULL in age"]["value"]) == judged["excluded"]["NULL in age"]
        bands = t["bands"]
        assert len(bands) == len(judged["bands"]) == 10
        for i, b in enumerate(judged["bands"]):
            for field in ("rows", "weight", "exposure", "actual", "expected", "score_low"):
                same_number(b[field], bands[str(i)][field])
        # the Lorenz curve's points: cumulative shares of the bands (numpy)
        ex = np.cumsum([0.0] + [b["exposure"] for b in judged["bands"]]) / judged["exposure"]
        ac = np.cumsum([0.0] + [b["actual"] for b in judged["bands"]]) / judged["actual"]
        lorenz = t["lorenz"]
        got = np.array([[exact(lorenz[str(i)][f]) for f in ("exposure_share", "actual_share")]
                        for i in range(11)])  # fmt: skip
        assert_allclose(got, np.column_stack([ex, ac]), rtol=1e-14, atol=1e-15)
        assert set(judged["levels"]) == {
            k.removeprefix("levels:") for k in t if k.startswith("levels:")
        }
        for column, levels in judged["levels"].items():
            rows = t[f"levels:{column}"]
            assert len(rows) == len(levels)
            for i, lv in enumerate(levels):
                row = rows[str(i)]
                assert row["level"][1] == lv["level"]
                for field in ("rows", "weight", "exposure", "actual", "expected"):
                    same_number(lv[field], row[field])
                assert row["unseen"][1] == str(lv["unseen"]).lower()
        if name == "had":
            cal = t["calibration"]
            assert len(cal) == len(judged["calibration"])
            for i, b in enumerate(judged["calibration"]):
                for field in ("weight", "actual", "expected", "predicted", "observed"):
                    same_number(b[field], cal[str(i)][field])
            hl = judged["hosmer_lemeshow"]
            assert f"on {hl['df']} df" in built["pages"]["had"]
        else:
            assert "calibration" not in t
    # the unseen rating of the holdout is named as such, its label escaped
    unseen = [
        r for r in _tables(built, "children")["levels:rating"].values() if r["unseen"][1] == "true"
    ]
    assert [r["level"][1] for r in unseen] == [LABELS["9"]]


# -- against outside oracles --------------------------------------------------------------------


def _design(frame: pd.DataFrame, res: indb.FitResult, skip: str | None = None) -> pd.DataFrame:
    """indb's design on ``frame``: per coefficient the product of its columns' values (a
    level: its indicator; a numeric column: its value); a column ``skip`` left out."""
    cols = {}
    for c in res.coefficients:
        if skip is not None and c.columns == (skip,):
            continue
        v = np.ones(len(frame))
        for column, level in zip(c.columns, c.levels, strict=True):
            if level is None:
                v = v * frame[column].to_numpy(dtype=float)
            else:
                v = v * (frame[column].astype(str) == level).to_numpy(dtype=float)
        cols[c.term] = v
    return pd.DataFrame(cols, index=frame.index)


def _load(built: dict[str, Any], name: str) -> indb.FitResult:
    reg = indb.api.registry(built["db"], read_only=True)
    try:
        return reg.load(name)
    finally:
        reg.engine.close()


def _factor_checks(t: dict, res: indb.FitResult, fit: Any, train: pd.DataFrame, column: str,
                   exponentiate: bool) -> None:  # fmt: skip
    """The level table of ``column`` against statsmodels' estimates and intervals, the
    reference at 1 (or 0), rows per level against pandas."""
    rows = t[f"term:{column}"]
    counts = train[column].astype(str).value_counts()
    factor = next(f for f in res.design["factors"] if f["column"] == column)
    ci = fit.conf_int()
    f = np.exp if exponentiate else (lambda v: v)
    assert list(rows) == factor["levels"]
    for level, row in rows.items():
        assert exact(row["rows"]) == counts[level]  # pandas value_counts
        term = f"{column}={level}"
        if level == factor["reference"]:
            assert exact(row["value"] if exponentiate else row["estimate"]) == (
                1.0 if exponentiate else 0.0
            )
            assert row["reference"][1] == "reference"
            continue
        value = exact(row["value"]) if exponentiate else exact(row["estimate"])
        low = exact(row["lower"]) if exponentiate else exact(row["lower_bound"])
        high = exact(row["upper"]) if exponentiate else exact(row["upper_bound"])
        # statsmodels: exp(params), exp(conf_int())
        assert_allclose(value, f(fit.params[term]), rtol=ORACLE_RTOL)
        assert_allclose([low, high], f(ci.loc[term].to_numpy()), rtol=ORACLE_RTOL)


def test_relativities_and_spline_curve_against_statsmodels(built: dict[str, Any]) -> None:
    res = _load(built, "children")
    train = built["train"]
    t = _tables(built, "children")
    # oracle: statsmodels Poisson GLM with the age spline in scipy's natural-spline basis
    knots = res.design["knots"]["age"]
    x = _design(train, res, skip="age")
    basis = natural_spline_basis(train["age"].to_numpy(float), knots)
    for j in range(basis.shape[1]):
        x[f"ns{j}"] = basis[:, j]
    fit = sm.GLM(train["children"].to_numpy(float), x, family=sm.families.Poisson(),
                 offset=np.log(train["years"].to_numpy(float))).fit(**SM_FIT)  # fmt: skip
    # the oracle itself: every coefficient outside the spline as indb's (the intercept
    # takes the constant of the other basis)
    for c in res.coefficients:
        if c.columns not in (("age",), ()):
            assert_allclose(fit.params[c.term], c.estimate, rtol=1e-7, atol=1e-10)
    for column in ("rating", "religious"):
        _factor_checks(t, res, fit, train, column, exponentiate=True)
    z = stats.norm.ppf(0.975)
    # educ: a straight line relative to the training mean (pandas), band b -/+ z se
    curve = t["curve:educ"]
    xs = np.array([exact(r["x"]) for r in curve.values()])
    d = xs - train["educ"].mean()
    b, se = fit.params["educ"], fit.bse["educ"]
    assert_allclose([exact(r["value"]) for r in curve.values()], np.exp(b * d), rtol=ORACLE_RTOL)
    assert_allclose([exact(r["lower"]) for r in curve.values()],
                    np.exp(b * d - z * se * np.abs(d)), rtol=ORACLE_RTOL)  # fmt: skip
    # age: the spline's curve and band in the independent basis, relative to the mean age
    curve = t["curve:age"]
    xs = np.array([exact(r["x"]) for r in curve.values()])
    names = [f"ns{j}" for j in range(basis.shape[1])]
    g = natural_spline_basis(xs, knots) - natural_spline_basis(
        np.array([train["age"].mean()]), knots
    )
    eta = g @ fit.params[names].to_numpy()
    sd = np.sqrt(np.einsum("ij,jk,ik->i", g, fit.cov_params().loc[names, names].to_numpy(), g))
    assert_allclose([exact(r["value"]) for r in curve.values()], np.exp(eta), rtol=ORACLE_RTOL)
    assert_allclose([exact(r["lower"]) for r in curve.values()], np.exp(eta - z * sd), rtol=1e-5)
    assert_allclose([exact(r["upper"]) for r in curve.values()], np.exp(eta + z * sd), rtol=1e-5)
    # drawn over the holdout's ages (its bands in the assessment)
    hold = built["hold"]["age"].dropna()
    assert xs.min() == hold.min() and xs.max() == hold.max()
    # the interaction, coefficient by coefficient
    ci = fit.conf_int()
    for term, row in t["term:religious & educ"].items():
        assert_allclose(exact(row["value"]), math.exp(fit.params[term]), rtol=ORACLE_RTOL)
        assert_allclose(exact(row["upper"]), math.exp(ci.loc[term, 1]), rtol=ORACLE_RTOL)


def test_odds_factors_and_gaussian_effects_against_statsmodels(built: dict[str, Any]) -> None:
    train = built["train"]
    res = _load(built, "had")
    x = _design(train, res)
    fit = sm.GLM(train["had"].to_numpy(float), x, family=sm.families.Binomial()).fit(**SM_FIT)
    assert_allclose(fit.params.to_numpy(), [c.estimate for c in res.coefficients], rtol=1e-7)
    t = _tables(built, "had")
    _factor_checks(t, res, fit, train, "rating", exponentiate=True)
    assert "odds factor" in built["pages"]["had"]
    # gaussian, identity link: effects on the linear predictor, reference 0, t intervals
    # (statsmodels with use_t=True: t on the residual df, as the estimated dispersion asks)
    res = _load(built, "educ_g")
    x = _design(train, res)
    fit = sm.GLM(train["educ"].to_numpy(float), x, family=sm.families.Gaussian()).fit(
        use_t=True, **SM_FIT
    )
    assert_allclose(fit.params.to_numpy(), [c.estimate for c in res.coefficients], rtol=1e-7)
    t = _tables(built, "educ_g")
    _factor_checks(t, res, fit, train, "rating", exponentiate=False)
    assert "exp_estimate" not in t["coefficients"]["intercept"]
    curve = t["curve:age"]
    d = np.array([exact(r["x"]) for r in curve.values()]) - train["age"].mean()
    q = stats.t.ppf(0.975, fit.df_resid)
    b, se = fit.params["age"], fit.bse["age"]
    assert_allclose(
        [exact(r["value"]) for r in curve.values()], b * d, rtol=ORACLE_RTOL, atol=1e-12
    )
    assert_allclose([exact(r["upper"]) for r in curve.values()], b * d + q * se * np.abs(d),
                    rtol=ORACLE_RTOL, atol=1e-12)  # fmt: skip


def test_spline_basis_numpy_form_equals_the_sql_one() -> None:
    # the report draws splines with the numpy form; the fit and scoring use the SQL form
    from sqlglot import exp

    from indb import sqlexpr as S
    from indb.engines.duckdb import DuckDBDialect

    knots = [21.0, 40.0, 52.0, 71.0]
    xs = np.array([-5.0, 0.0, 21.0, 30.5, 40.0, 51.9, 52.0, 70.0, 71.0, 88.25, 1e4])
    d = DuckDBDialect()
    with duckdb.connect() as con:
        for j in (1, 2):
            tree = S.select([S.alias(spline_basis_sql(S.col("x"), knots, j), "b")], exp.table_("t"))
            sql = d.render(tree)
            con.execute("CREATE OR REPLACE TABLE t AS SELECT unnest($1::DOUBLE[]) AS x", [list(xs)])
            got = np.array([r[0] for r in con.execute(sql).fetchall()])
            assert_allclose(spline_basis(xs, knots, j), got, rtol=1e-14, atol=1e-12)


def test_no_covariance_leaves_a_spline_without_a_band(built: dict[str, Any]) -> None:
    # a version of more than 150 coefficients is stored without its covariance
    res = dataclasses.replace(_load(built, "children"), covariance=None)
    effects = {e.term: e for e in term_effects(res)}
    assert np.isnan(effects["age"].lower).all() and np.isfinite(effects["age"].value).all()
    assert np.isfinite(effects["educ"].lower).all()  # one coefficient: its standard error
    # without a holdout: a spline between its outer knots
    assert effects["age"].x[0] == res.design["knots"]["age"][0]


# -- the page -----------------------------------------------------------------------------------


def test_page_is_self_contained_escaped_and_has_a_table_behind_every_chart(
    built: dict[str, Any],
) -> None:
    for name, html in built["pages"].items():
        low = html.lower()
        # nothing fetched: no script, stylesheet link, image, frame or import; references
        # only to fragments of the page itself
        for tag in ("<script", "<link", "<img", "<iframe", "<object", "<embed", "@import"):
            assert tag not in low, (name, tag)
        assert not re.search(r"""(?:src|href)\s*=\s*["'](?!#)""", html), name
        assert not re.search(r"url\((?!#)", html), name
        figures = re.findall(
            r'<figure class="chart-box" data-chart="[^"]*">.*?</figure>', html, re.S
        )
        assert figures, name
        for fig in figures:
            assert fig.count("<svg") == 1 and 'role="img"' in fig and "<title>" in fig
            assert "<details><summary>" in fig and "<table" in fig.split("<details>")[1]
        ids = re.findall(r'\bid="([^"]+)"', html)
        assert len(ids) == len(set(ids)), name
    html = built["pages"]["children"]
    for label in LABELS.values():  # markup, quotes and ampersands only ever escaped
        if any(ch in label for ch in "<>&\"'"):
            assert label not in html, label
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    charts = re.findall(r'data-chart="([^"]+)"', html)
    assert charts == [
        "iterations",
        "term:rating",
        "term:religious",
        "term:educ",
        "term:religious &amp; educ",
        "term:age",
        "lift",
        "lorenz",
        "ae:rating",
        "ae:religious",
        "ae:educ",
        "ae:age",
    ]
    assert "calibration" in re.findall(r'data-chart="([^"]+)"', built["pages"]["had"])
    assert "On the holdout" not in built["pages"]["educ_g"]


def test_python_api_and_json_output(built: dict[str, Any], tmp_path: Path) -> None:
    import indb.report as text_report  # the text renderer keeps its module name

    assert callable(text_report.render_report) and callable(indb.report_html)
    written = indb.report_html("children", tmp_path / "v1.html", db=built["db"], version=1)
    assert written.version == 1 and written.scans == 0 and written.assessed_on is None
    assert Path(written.path).stat().st_size == written.bytes
    result = _run("report", "had", "--db", built["db"], "--on", "fair_hold", "--bands", "4",
                  "--out", tmp_path / "h.html", "--json")  # fmt: skip
    out = _json(result)
    assert out["model"] == "had" and out["assessed_on"] == "fair_hold" and out["scans"] == 3
    t = read_tables((tmp_path / "h.html").read_text()).tables
    assert len(t["bands"]) == 4


# -- bad input ----------------------------------------------------------------------------------


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.endswith(".tmp"))


def test_bad_input_is_one_line_and_leaves_no_file(built: dict[str, Any], tmp_path: Path) -> None:
    db, out = built["db"], tmp_path / "r.html"
    base = ("--db", db, "--out", out)
    _one_error_line(_run("report", "nope", *base), 7, "no model named 'nope'")
    _one_error_line(_run("report", "children", "--version", "9", *base), 7, "no version 9")
    _one_error_line(
        _run("report", "children", "--on", "fair_hold_no_response", *base),
        2,
        "no column 'children'",
    )
    _one_error_line(_run("report", "children", "--on", "no_such_table", *base), 2, "no_such_table")
    _one_error_line(_run("report", "children", "--by", "age", *base), 2, "by applies")
    _one_error_line(
        _run("report", "children", "--db", tmp_path / "missing.duckdb", "--out", out),
        2,
        "no such database file",
    )
    missing_dir = tmp_path / "no" / "r.html"
    _one_error_line(
        _run("report", "children", "--db", db, "--out", missing_dir), 2, "does not exist"
    )
    _one_error_line(_run("report", "children", "--db", db, "--out", tmp_path), 2, "is a directory")
    # a directory nothing can be written in, even by root: /proc
    _one_error_line(
        _run("report", "children", "--db", db, "--out", "/proc/indb-report.html"),
        2,
        "cannot write in '/proc'",
    )
    assert not out.exists() and _leftovers(tmp_path) == []
    # a report that fails keeps the file it would have replaced as it was
    out.write_text("the previous report")
    _one_error_line(_run("report", "children", "--on", "fair_hold_no_response", *base), 2)
    assert out.read_text() == "the previous report" and _leftovers(tmp_path) == []
    with pytest.raises(RegistryError, match="no model named"):
        indb.report_html("nope", out, db=db)
    with pytest.raises(SpecError, match="give db= the database"):
        indb.report_html("children", out, db=None)


@pytest.mark.slow
def test_kill_during_a_report_never_leaves_a_half_written_page(
    built: dict[str, Any], tmp_path: Path
) -> None:
    """kill -9 at seeded times while ``indb report`` runs: the target holds the previous
    report or a whole new page, never a part. (A temporary file of a killed run may stay
    behind, named ``.r.html.*.tmp``: nothing can remove it after kill -9.)"""
    import os
    import random
    import signal
    import subprocess
    import sys
    import time

    out = tmp_path / "r.html"
    out.write_text("the previous report")
    env = {**os.environ, "PYTHONPATH": str(Path(indb.__file__).resolve().parent.parent)}
    args = [sys.executable, "-m", "indb.cli", "report", "children", "--db", built["db"],
            "--on", "fair_hold", "--out", str(out)]  # fmt: skip
    t0 = time.perf_counter()
    subprocess.run(args, env=env, check=True, capture_output=True, timeout=300)
    whole = time.perf_counter() - t0
    complete = out.read_text(encoding="utf-8")
    assert complete.endswith("</html>\n")
    rng = random.Random(17)
    outcomes = []
    for _ in range(6):
        out.write_text("the previous report")
        child = subprocess.Popen(
            args, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        )
        time.sleep(rng.uniform(0.3, 1.0) * whole)
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=60)
        text = out.read_text(encoding="utf-8")
        assert text == "the previous report" or (
            text.endswith("</html>\n") and len(text) > 0.9 * len(complete)
        ), text[-200:]
        outcomes.append(text == "the previous report")
    assert any(outcomes)  # at least one kill landed before the rename


# -- a second model, and what covariance kinds, penalties and families add ---------------------

#: a smaller Poisson model of the same response and offset (the second model of --against)
SMALL = {
    "response": "children",
    "family": "poisson",
    "offset": "ln(years)",
    "predictors": ["rating", "religious"],
}


@pytest.fixture(scope="module")
def more(built: dict[str, Any]) -> dict[str, Any]:
    """Further models in the same database: the second model of a comparison, a penalised
    fit with a lambda path, a negative binomial with cluster-robust errors and a recorded
    assessment; and the report of each (the first against the second)."""
    db, folder = built["db"], built["folder"]
    indb.fit(SOURCE, db=db, name="children_small", tol=FIT_TOL, **SMALL)
    indb.fit(SOURCE, db=db, name="children_pen", tol=FIT_TOL, path=6, l1_share=0.5, folds=3,
             fold_by="CAST(10 * years + educ AS BIGINT)",
             **{**SMALL, "predictors": ["rating", "religious", "age", "educ"]})  # fmt: skip
    # the survey's children show no overdispersion: theta runs off (a ConvergenceWarning);
    # the page shows the stored theta and its standard error all the same
    with pytest.warns(indb.ConvergenceWarning, match="theta runs off"):
        indb.fit(SOURCE, db=db, name="children_nb", tol=FIT_TOL, covariance="cluster",
                 cluster="educ", **{**SMALL, "family": "negative_binomial"})  # fmt: skip
    indb.fit(SOURCE, db=db, name="children_drop", tol=FIT_TOL, drop_one=True, **SMALL)
    recorded = _json(_run("assess", "children_nb", "--db", db, "--on", "fair_hold",
                          "--record", "--json"))  # fmt: skip
    pages = {}
    for name, extra in (
        ("children", ["--on", "fair_hold", "--against", "children_small:1"]),
        ("children_pen", []),
        ("children_nb", []),
        ("children_drop", []),
    ):
        path = folder / f"more-{name}.html"
        result = _run("report", name, "--db", db, "--out", path, *extra, "--json")
        written = _json(result)
        if extra:
            assert written["compared_with"] == "children_small:1" and written["scans"] == 5
        pages[name] = path.read_text(encoding="utf-8")
    return {"db": db, "pages": pages, "recorded": recorded}


def test_against_figures_and_double_lift_equal_assess_against_json(
    more: dict[str, Any],
) -> None:
    db = more["db"]
    judged = _json(_run("assess", "children", "--db", db, "--on", "fair_hold", "--by", "age",
                        "--by", "educ", "--against", "children_small:1", "--json"))  # fmt: skip
    t = read_tables(more["pages"]["children"]).tables
    side = t["against"]
    two = judged["against"]
    for field in (
        "expected",
        "actual_over_expected",
        "deviance",
        "mean_deviance",
        "deviance_explained",
        "gini",
        "gini_normalized",
        "rows_unseen",
    ):
        same_number(judged[field], side[field]["first"])
        same_number(two[field], side[field]["second"])
    ratio = t["ratio_bands"]
    assert len(ratio) == len(judged["ratio_bands"]) == 10
    for i, b in enumerate(judged["ratio_bands"]):
        row = ratio[str(i)]
        for field in ("rows", "weight", "exposure", "actual", "expected", "expected_against",
                      "ratio_low", "ratio_high"):  # fmt: skip
            same_number(b[field], row[field])
    # the bands split the same rows: their sums are the totals (numpy)
    assert sum(b["rows"] for b in judged["ratio_bands"]) == judged["rows"]
    assert_allclose(sum(b["expected_against"] for b in judged["ratio_bands"]),
                    two["expected"], rtol=1e-12)  # fmt: skip
    # the single model's views stay as they were: its totals equal the plain assessment's
    totals = t["assessment"]
    for field in ("rows", "actual", "expected", "deviance", "gini"):
        same_number(judged[field], totals[field]["value"], digits=3)
    charts = re.findall(r'data-chart="([^"]+)"', more["pages"]["children"])
    assert charts.index("double_lift") < charts.index("lift")


def test_against_second_model_against_statsmodels(more: dict[str, Any]) -> None:
    # outside oracle: statsmodels GLM (test-only) fitted on the training rows with the
    # second model's design; its expected on the holdout rows judged, summed, is the
    # second model's expected (pandas drops the rows with NULL inputs, as the assessment
    # sets them aside). The oracle's coefficients are checked against indb's first.
    train, hold = frames()
    small = _load(more, "children_small")
    cols = ["children", "years", "rating", "religious", "age", "educ"]
    tr = train.dropna(subset=["children", "years", "rating", "religious"])
    x = _design(tr, small)
    fit = sm.GLM(tr["children"], x, family=sm.families.Poisson(),
                 offset=np.log(tr["years"])).fit(tol=1e-13)  # fmt: skip
    assert_allclose(fit.params.to_numpy(), [c.estimate for c in small.coefficients],
                    rtol=ORACLE_RTOL)  # fmt: skip
    judged = hold.dropna(subset=cols)
    # a rating the fit never saw has no indicator: scored as the reference level
    xh = _design(judged, small)
    mu = fit.predict(xh, offset=np.log(judged["years"]))
    t = read_tables(more["pages"]["children"]).tables
    assert_allclose(exact(t["against"]["expected"]["second"]), float(mu.sum()), rtol=1e-7)


def test_covariance_kind_theta_and_recorded_assessments_equal_show_json(
    more: dict[str, Any],
) -> None:
    db, page = more["db"], more["pages"]["children_nb"]
    shown = _json(_run("show", "children_nb", "--db", db, "--json"))
    assert shown["covariance_kind"] == "cluster" and shown["clusters"] >= 2
    found = re.search(r'data-covariance="([^"]+)" data-clusters="(\d+)"', page)
    assert found and found.groups() == ("cluster", str(shown["clusters"]))
    assert "cluster-robust" in page
    t = read_tables(page).tables
    model = t["model"]
    same_number(shown["family_params"]["theta"], model["family_params.theta"]["value"])
    same_number(shown["family_param_errors"]["theta"], model["family_param_errors.theta"]["value"])
    coefs = t["coefficients"]
    for c in shown["coefficients"]:
        same_number(c["std_error"], coefs[c["term"]]["std_error"])
    # the assessment recorded with --record, as the registry lists it
    rec = t["recorded_assessments"]
    assert len(rec) == 1
    row, judged = rec["0"], more["recorded"]
    assert row["purpose"][1] == "assess" and row["source"][1] == "fair_hold"
    for field, key in (("n_used", "rows"), ("actual", "actual"), ("expected", "expected"),
                       ("deviance", "deviance"), ("gini", "gini")):  # fmt: skip
        same_number(judged[key], row[field])
    # a version never assessed says so
    assert "recorded no assessment" in more["pages"]["children_pen"]


def test_drop_one_columns_equal_show_json(more: dict[str, Any]) -> None:
    # the leaving-out table's rows are the stored drop-one tests (their
    # values are checked against statsmodels refits in tests/test_drop_one.py)
    shown = _json(_run("show", "children_drop", "--db", more["db"], "--json"))
    rows = read_tables(more["pages"]["children_drop"]).tables["drop_one"]
    tested = [tt for tt in shown["term_tests"] if tt.get("lr_p_value") is not None]
    assert tested
    dropped = [t for t in shown["term_tests"] if t.get("drop_df") is not None or t.get("drop_note")]
    assert list(rows) == [t["term"] for t in dropped]
    for tt in dropped:
        row = rows[tt["term"]]
        if tt.get("drop_deviance") is not None:
            same_number(tt["drop_deviance"], row["drop_deviance"])
        if tt.get("lr_p_value") is not None:
            assert exact(row["lr_p_value"]) == tt["lr_p_value"]
            assert exact(row["drop_df"]) == tt["drop_df"] and row["lr_test"][1] == tt["lr_test"]


def test_penalised_fit_shows_its_penalty_path_and_no_standard_errors(
    more: dict[str, Any],
) -> None:
    db, page = more["db"], more["pages"]["children_pen"]
    shown = _json(_run("show", "children_pen", "--db", db, "--json"))
    t = read_tables(page).tables
    pen = t["penalty"]
    for field in ("penalty", "l1_share", "lambda_max", "nonzero"):
        same_number(shown["penalty"][field], pen[field]["value"])
    path = t["penalty_path"]
    assert len(path) == len(shown["penalty_path"]) == 6
    for i, step in enumerate(shown["penalty_path"]):
        row = path[str(i)]
        same_number(step["penalty"], row["penalty"])
        assert_allclose(exact(row["log_lambda"]), math.log(step["penalty"]), rtol=1e-15)
        same_number(step["deviance"], row["deviance"])
        for term, value in step["coefficients"].items():
            same_number(value, row[f"coef:{term}"])
    assert 'data-chart="penalty_path"' in page and 'data-penalised="1"' in page
    assert "no standard errors" in page
    # no standard error anywhere: the coefficient table's are all n/a, no whole-term tests
    for row in t["coefficients"].values():
        assert row["std_error"][1] in (None, "nan") and row["lower_bound"][1] in (None, "nan")
    assert "term_tests" not in t and "data-covariance" not in page


def test_cross_validation_table_equals_show_json(more: dict[str, Any]) -> None:
    # the fold table behind the chart is the stored one (each fold's deviance is checked
    # against separate refits in tests/test_cv.py); the caption names the chosen lambda
    db, page = more["db"], more["pages"]["children_pen"]
    shown = _json(_run("show", "children_pen", "--db", db, "--json"))
    rows = read_tables(page).tables["cross_validation"]
    assert len(rows) == len(shown["cv"]) == 6
    for i, step in enumerate(shown["cv"]):
        row = rows[str(i)]
        same_number(step["penalty"], row["penalty"])
        same_number(step["mean_deviance"], row["mean_deviance"])
        same_number(step["se"], row["se"])
        assert len(step["per_fold"]) == 3
        for k, value in enumerate(step["per_fold"]):
            same_number(value, row[f"fold:{k}"])
    assert 'data-chart="cross_validation"' in page
    assert f"{shown['chosen_penalty']:.4g}" in page and shown["chosen_penalty"] in [
        s["penalty"] for s in shown["cv"]
    ]


def test_against_bad_input_is_one_line_and_leaves_no_file(
    more: dict[str, Any], tmp_path: Path
) -> None:
    db, out = more["db"], tmp_path / "r.html"
    base = ("--db", db, "--out", out)
    _one_error_line(
        _run("report", "children", "--against", "children_small", *base), 2, "against applies"
    )
    _one_error_line(
        _run("report", "children", "--on", "fair_hold", "--against", "nope", *base),
        7,
        "no model named 'nope'",
    )
    _one_error_line(
        _run("report", "children", "--on", "fair_hold", "--against", "children_small:9", *base),
        7,
        "no version 9",
    )
    _one_error_line(
        _run("report", "children", "--on", "fair_hold", "--against", "children_small:x", *base),
        2,
        "NAME:K",
    )
    # another family and response: the assessment's own refusal
    _one_error_line(
        _run("report", "children", "--on", "fair_hold", "--against", "had", *base), 2, "had"
    )
    assert not out.exists() and _leftovers(tmp_path) == []
    with pytest.raises(SpecError, match="against applies"):
        indb.report_html("children", out, db=db, against="children_small")
    assert not out.exists()
