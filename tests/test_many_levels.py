"""Categorical columns with many levels: the block solver (``indb.normal_eq``), the sparse
X'WX, the stored covariance and the limits.

Data: invented books of policies (a factor ``big`` of hundreds to thousands of levels, a
factor ``region``, two numeric columns, an exposure and a Poisson claim count), made here
with a fixed seed; every level has enough claims that no estimate drifts to the boundary.
Oracles: statsmodels GLM (test-only) on a dense design of up to a few hundred columns, its
answer checked by its own score equations; scipy (dense ``linalg.solve`` / ``inv``,
``sparse.linalg.splu``) for the solver on larger matrices; for thousands of levels, where
no dense oracle fits, the score equations X'(y - mu) = 0 summed by DuckDB itself from the
fitted coefficients (the KKT conditions of the maximum likelihood estimate).
"""

from __future__ import annotations

import json
import math

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from click.testing import CliRunner
from numpy.testing import assert_allclose, assert_array_equal
from reference_cases import design_matrix, duckdb_table
from scipy import linalg, sparse
from scipy.sparse import linalg as splinalg

import indb
from indb import inference, normal_eq, solver
from indb.api import scoring_sql
from indb.cli import main
from indb.engines.duckdb import DuckDBEngine
from indb.errors import AliasingWarning, SpecError
from indb.registry import Registry
from indb.results import STORED_COVARIANCE_MAX_TERMS
from indb.spec import MAX_LEVELS_LIMIT

# statsmodels and indb solve the same likelihood equations; both run to 1e-10 and beyond,
# so 1e-6 leaves orders of magnitude for the different summation orders (as in
# test_reference_statsmodels.py)
RTOL = 1e-8  # issue 18: estimates 1e-8 relative
SE_RTOL = 1e-7
TOL = 1e-10


def _book(levels: int, rows: int, seed: int = 7, regions: int = 8) -> pd.DataFrame:
    """Invented policies: ``big`` has ``levels`` levels of about rows / levels rows each
    (a few with quotes and non-ASCII letters in their names), claims about 2 per row."""
    rng = np.random.default_rng(seed)
    big = np.concatenate([np.arange(levels), rng.integers(0, levels, rows - levels)])
    rng.shuffle(big)
    names = np.array([f"B{i:05d}" for i in range(levels)], dtype=object)
    names[1], names[2] = 'O\'Brien & "Sons"', "Zürich é"
    region = rng.integers(0, regions, rows)
    x1 = rng.normal(size=rows)
    x2 = rng.uniform(0.0, 10.0, rows)
    exposure = rng.uniform(0.5, 1.0, rows)
    eta = 1.0 + rng.normal(0, 0.3, levels)[big] + rng.normal(0, 0.2, regions)[region]
    eta += 0.2 * x1 - 0.03 * x2
    return pd.DataFrame(
        {
            "big": names[big],
            "region": np.array([f"R{i}" for i in range(regions)], dtype=object)[region],
            "x1": x1,
            "x2": x2,
            "exposure": exposure,
            "claims": rng.poisson(exposure * np.exp(eta)).astype(float),
        }
    )


def _sm_poisson(frame: pd.DataFrame, predictors: list[str], **kw) -> tuple:
    """statsmodels' fit on the dense design with indb's term names, checked by its own
    score equations X'W(y - mu) = 0 (relative 1e-9 of X'Wy)."""
    x = design_matrix(frame, predictors)
    drop = kw.pop("drop", ())
    x = x.drop(columns=list(drop))
    weights = kw.pop("var_weights", None)
    res = sm.GLM(
        frame["claims"],
        x,
        family=sm.families.Poisson(),
        offset=np.log(frame["exposure"]),
        var_weights=weights,
    ).fit(tol_criterion="params", atol=1e-14, rtol=1e-13, maxiter=500)
    w = np.ones(len(frame)) if weights is None else np.asarray(weights)
    score = x.to_numpy().T @ (w * (frame["claims"] - res.fittedvalues))
    scale = x.to_numpy().T @ (w * frame["claims"])
    assert np.max(np.abs(score) / np.maximum(np.abs(scale), 1.0)) < 1e-9
    return x, res


def _fit(con, **kw) -> indb.FitResult:
    kw.setdefault("predictors", ["big", "region", "x1", "x2"])
    return indb.fit("book", "claims", "poisson", db=con, offset="ln(exposure)", tol=TOL, **kw)


# -- against statsmodels ---------------------------------------------------------------------


def test_three_hundred_levels_match_statsmodels():
    frame = _book(300, 6_000)
    con = duckdb_table(frame, "book")
    res = _fit(con)
    x, ref = _sm_poisson(frame, ["big", "region", "x1", "x2"])
    assert res.terms == list(x.columns)
    # source: statsmodels GLM Poisson with offset (test-only oracle)
    assert_allclose(res.estimates, ref.params.to_numpy(), rtol=RTOL, atol=1e-9)
    assert_allclose(res.std_errors, ref.bse.to_numpy(), rtol=SE_RTOL)
    assert_allclose(res.deviance, ref.deviance, rtol=1e-9)
    # p = 309 <= COVARIANCE_MAX_TERMS: the whole covariance is there and matches
    assert_allclose(res.covariance, ref.cov_params().to_numpy(), rtol=1e-5, atol=1e-12)


def test_factor_after_the_long_one_and_factor_x_numeric_terms_match_statsmodels():
    # the run of 200 levels sits between a factor before it and terms after it (a factor x
    # numeric interaction whose block is diagonal too, and a numeric column)
    frame = _book(200, 5_000, seed=11)[["region", "big", "x1", "x2", "exposure", "claims"]]
    con = duckdb_table(frame, "book")
    res = _fit(con, predictors=["region", "big", "x2"], interactions=[("region", "x1")])
    x = design_matrix(frame, ["region", "big", "x2"], interactions=[("region", "x1")])
    ref = sm.GLM(
        frame["claims"], x, family=sm.families.Poisson(), offset=np.log(frame["exposure"])
    ).fit(tol_criterion="params", atol=1e-14, rtol=1e-13, maxiter=500)
    assert res.terms == list(x.columns)
    # source: statsmodels GLM (test-only oracle)
    assert_allclose(res.estimates, ref.params.to_numpy(), rtol=RTOL, atol=1e-9)
    assert_allclose(res.std_errors, ref.bse.to_numpy(), rtol=SE_RTOL)


def test_no_intercept_run_first_matches_statsmodels():
    # without an intercept big keeps all its levels and opens the design: nothing before
    # the run
    frame = _book(150, 3_000, seed=15)
    con = duckdb_table(frame, "book")
    res = _fit(con, intercept=False)
    x = design_matrix(frame, ["big", "region", "x1", "x2"], intercept=False)
    # design_matrix drops every factor's reference; without an intercept indb keeps the
    # first factor's (the contract in the README): add it back
    ref_level = [lv for lv in sorted(frame["big"].unique()) if f"big={lv}" not in x.columns]
    x.insert(0, f"big={ref_level[0]}", (frame["big"] == ref_level[0]).astype(float))
    x = x[res.terms]
    ref = sm.GLM(
        frame["claims"], x, family=sm.families.Poisson(), offset=np.log(frame["exposure"])
    ).fit(tol_criterion="params", atol=1e-14, rtol=1e-13, maxiter=500)
    assert res.terms[0].startswith("big=") and len(res.terms) == 150 + 7 + 2
    # source: statsmodels GLM (test-only oracle)
    assert_allclose(res.estimates, ref.params.to_numpy(), rtol=RTOL, atol=1e-9)
    assert_allclose(res.std_errors, ref.bse.to_numpy(), rtol=SE_RTOL)


# -- aliasing keeps its meaning --------------------------------------------------------------


def test_level_with_zero_weight_is_set_aside_and_the_rest_matches_statsmodels():
    frame = _book(150, 4_000, seed=3)
    frame["w"] = np.where(frame["big"] == "B00017", 0.0, 1.0)
    con = duckdb_table(frame, "book")
    with pytest.warns(AliasingWarning, match="big=B00017"):
        res = _fit(con, weight="w", predictors=["big", "region", "x1", "x2"])
    assert res.aliased_terms == ("big=B00017",)
    assert math.isnan(res.coef("big=B00017").estimate)
    kept = frame["w"] > 0
    # the reference levels are those of all rows (zero weights included)
    x = design_matrix(frame, ["big", "region", "x1", "x2"])[kept].drop(columns=["big=B00017"])
    ref = sm.GLM(
        frame["claims"][kept],
        x,
        family=sm.families.Poisson(),
        offset=np.log(frame["exposure"][kept]),
    ).fit(tol_criterion="params", atol=1e-14, rtol=1e-13, maxiter=500)
    got = pd.Series(res.estimates, index=res.terms).drop("big=B00017")
    se = pd.Series(res.std_errors, index=res.terms).drop("big=B00017")
    # source: statsmodels GLM on the rows with weight > 0 (a zero prior weight drops a row
    # from the estimating equations)
    assert_allclose(got[x.columns].to_numpy(), ref.params.to_numpy(), rtol=RTOL, atol=1e-9)
    assert_allclose(se[x.columns].to_numpy(), ref.bse.to_numpy(), rtol=RTOL)


@pytest.mark.parametrize("big_first", [True, False])
def test_collinear_levels_across_two_factors_set_aside_the_later_one(big_first: bool):
    # the rows of level B00042 of big form a region of their own (R9): the two indicator
    # columns are equal and the one later in design order is set aside, whether it is in
    # the long run of big's levels or after it
    frame = _book(120, 4_000, seed=5)
    frame.loc[frame["big"] == "B00042", "region"] = "R9"
    order = ["big", "region"] if big_first else ["region", "big"]
    frame = frame[[*order, "x1", "x2", "exposure", "claims"]]
    con = duckdb_table(frame, "book")
    later = "region=R9" if big_first else "big=B00042"
    with pytest.warns(AliasingWarning, match=later):
        res = _fit(con)
    assert res.aliased_terms == (later,)
    x, ref = _sm_poisson(frame, [*order, "x1", "x2"], drop=[later])
    got = pd.Series(res.estimates, index=res.terms).drop(later)
    # source: statsmodels GLM on the design without the duplicated column
    assert_allclose(got[x.columns].to_numpy(), ref.params.to_numpy(), rtol=RTOL, atol=1e-9)


def test_reference_level_with_zero_weight_sets_aside_the_last_level():
    # The reference (most frequent rows) gets prior weight 0: its rows add nothing, so the
    # intercept equals the sum of big's other indicators and, in design order, big's last
    # level is set aside (the intercept comes first).
    frame = _book(60, 3_000, seed=9)
    top = frame["big"].value_counts()
    ref_level = min(lv for lv, n in top.items() if n == top.max())
    frame["w"] = np.where(frame["big"] == ref_level, 0.0, 1.0)
    con = duckdb_table(frame, "book")
    last = f"big={max(lv for lv in frame['big'].unique() if lv != ref_level)}"
    with pytest.warns(AliasingWarning):
        res = _fit(con, weight="w")
    assert res.aliased_terms == (last,)
    kept = frame[frame["w"] > 0]
    x = design_matrix(frame, ["big", "region", "x1", "x2"]).loc[kept.index].drop(columns=[last])
    ref = sm.GLM(
        kept["claims"], x, family=sm.families.Poisson(), offset=np.log(kept["exposure"])
    ).fit(tol_criterion="params", atol=1e-14, rtol=1e-13, maxiter=500)
    got = pd.Series(res.estimates, index=res.terms).drop(last)
    # source: statsmodels GLM on the rows with weight > 0, last level's column left out
    assert_allclose(got[x.columns].to_numpy(), ref.params.to_numpy(), rtol=RTOL, atol=1e-9)


# -- the solver against dense and sparse scipy -----------------------------------------------


def _normal_matrix(n: int, levels: int, seed: int, collinear: bool = False):
    """X'WX and X'Wz of an intercept, two numeric columns, a 6-level factor, a
    ``levels``-level factor and two columns after it (as numpy arrays, and the design)."""
    rng = np.random.default_rng(seed)
    a, b = rng.integers(0, levels, n), rng.integers(0, 6, n)
    cols = [np.ones(n), rng.normal(size=n), rng.normal(size=n)]
    cols += [(b == k).astype(float) for k in range(1, 6)]
    cols += [(a == k).astype(float) for k in range(1, levels)]
    cols += [rng.normal(size=n) * (b == 1), rng.normal(size=n)]
    if collinear:
        cols[-1] = 2.0 * cols[10] - cols[1]  # after the run: a level and a numeric column
    x = np.column_stack(cols)
    w = rng.uniform(0.5, 2.0, n)
    z = rng.normal(size=n)
    return x.T @ (w[:, None] * x), x.T @ (w * z), x, w


def _sequential_aliasing(xtwx: np.ndarray, tol: float) -> np.ndarray:
    """The documented rule, written out plainly: column j is aliased when its squared
    residual, on the correlation-scaled matrix, against the kept earlier columns is <= tol
    (residual from a least-squares projection, not a Cholesky factor)."""
    d = np.sqrt(np.diag(xtwx))
    c = xtwx / np.outer(d, d)
    kept: list[int] = []
    aliased = np.zeros(len(c), dtype=bool)
    for j in range(len(c)):
        if kept:
            coef = linalg.solve(c[np.ix_(kept, kept)], c[kept, j], assume_a="pos")
            r = c[j, j] - c[kept, j] @ coef
        else:
            r = c[j, j]
        if r <= tol:
            aliased[j] = True
        else:
            kept.append(j)
    return aliased


def test_block_solve_agrees_with_dense_scipy_at_a_thousand_levels():
    xtwx, xtwz, _, _ = _normal_matrix(30_000, 1_000, seed=1)
    sol = normal_eq.solve(sparse.csr_array(xtwx), xtwz)
    assert normal_eq.diagonal_run(sparse.csr_array(xtwx)) == (8, 1007)
    assert not sol.aliased.any()
    # source: scipy.linalg dense solve and inverse of the same matrix
    beta = linalg.solve(xtwx, xtwz, assume_a="pos")
    inv = linalg.inv(xtwx)
    assert_allclose(sol.beta, beta, rtol=1e-10, atol=1e-12 * np.abs(beta).max())
    assert_allclose(sol.inv_info.diagonal(), np.diag(inv), rtol=1e-10)
    idx = np.array([0, 1, 5, 8, 500, 1006, 1008])
    assert_allclose(sol.inv_info.block(idx), inv[np.ix_(idx, idx)], rtol=1e-9, atol=1e-14)


def test_block_solve_sets_aside_what_the_sequential_rule_does():
    xtwx, xtwz, _, _ = _normal_matrix(8_000, 300, seed=2, collinear=True)
    # the last column is a combination of a level of the long factor and a numeric column
    sol = normal_eq.solve(sparse.csr_array(xtwx), xtwz)
    expected = _sequential_aliasing(xtwx, normal_eq.ALIAS_TOL)
    assert expected.sum() == 1
    assert_array_equal(sol.aliased, expected)
    keep = ~expected
    # source: scipy dense solve on the columns the rule keeps
    beta = linalg.solve(xtwx[np.ix_(keep, keep)], xtwz[keep], assume_a="pos")
    assert_allclose(sol.beta[keep], beta, rtol=1e-9, atol=1e-11 * np.abs(beta).max())
    assert (sol.beta[~keep] == 0).all()
    assert_allclose(
        sol.inv_info.diagonal()[keep],
        np.diag(linalg.inv(xtwx[np.ix_(keep, keep)])),
        rtol=1e-9,
    )
    assert (sol.inv_info.diagonal()[~keep] == 0).all()


def test_pivoted_cholesky_panels_decide_like_the_sequential_rule():
    # more columns than one panel, with aliased columns inside and across panels
    rng = np.random.default_rng(4)
    x = rng.normal(size=(600, 250))
    x[:, 40] = x[:, 3] - x[:, 7]
    x[:, 97] = 0.5 * x[:, 96] + x[:, 10]  # at a panel boundary (PANEL = 96)
    x[:, 200] = x[:, 150] + x[:, 199]
    a = x.T @ x
    d = np.sqrt(np.diag(a))
    keep, lower = normal_eq.pivoted_cholesky(a / np.outer(d, d), normal_eq.ALIAS_TOL)
    assert_array_equal(~keep, _sequential_aliasing(a, normal_eq.ALIAS_TOL))
    assert_array_equal(np.flatnonzero(~keep), [40, 97, 200])
    c = (a / np.outer(d, d))[np.ix_(keep, keep)]
    # source: scipy.linalg.cholesky of the kept columns
    assert_allclose(lower, linalg.cholesky(c, lower=True), atol=1e-10)


def test_condition_number_above_the_dense_limit_matches_eigvalsh():
    xtwx, xtwz, _, _ = _normal_matrix(20_000, 700, seed=6)
    sol = normal_eq.solve(sparse.csr_array(xtwx), xtwz)
    d = np.sqrt(np.diag(xtwx))
    ev = np.linalg.eigvalsh(xtwx / np.outer(d, d))
    assert len(xtwx) > normal_eq.DENSE_EIG_MAX
    # source: numpy.linalg.eigvalsh of the dense correlation-scaled matrix
    assert_allclose(
        normal_eq.condition_number(sparse.csr_array(xtwx), sol), ev[-1] / ev[0], rtol=1e-6
    )


# -- what is stored, and the limits ----------------------------------------------------------


def test_registry_stores_no_covariance_above_the_limit_and_intervals_name_it(tmp_path):
    frame = _book(300, 6_000, seed=8)
    db = str(tmp_path / "reg.duckdb")
    con = duckdb.connect(db)
    con.register("f", frame)
    con.execute("CREATE TABLE book AS SELECT * FROM f")
    con.close()
    res = indb.fit(
        "book",
        "claims",
        "poisson",
        db=db,
        offset="ln(exposure)",
        tol=TOL,
        name="many",
    )
    assert len(res.terms) > STORED_COVARIANCE_MAX_TERMS
    con = duckdb.connect(db)
    stored = con.execute(
        "SELECT result_json FROM indb_registry.model_version WHERE model_name = 'many'"
    ).fetchone()[0]
    data = json.loads(stored)
    assert data["covariance"] is None
    # p^2 covariance numbers would be ~2 MB of JSON here; the coefficient table is far less
    assert len(stored) < 400_000
    loaded = Registry(DuckDBEngine(con)).load("many")
    assert loaded.covariance is None
    assert_array_equal(loaded.std_errors, res.std_errors)
    # the scoring view still scores: exp(eta) with the offset, eta from the coefficients
    got = con.execute(
        "SELECT big, region, x1, x2, exposure, score_mean FROM many ORDER BY ALL LIMIT 50"
    ).df()
    coef = dict(zip(res.terms, res.estimates, strict=True))
    eta = (
        coef["intercept"]
        + got["big"].map(lambda v: coef.get(f"big={v}", 0.0))
        + got["region"].map(lambda v: coef.get(f"region={v}", 0.0))
        + coef["x1"] * got["x1"]
        + coef["x2"] * got["x2"]
        + np.log(got["exposure"])
    )
    assert_allclose(got["score_mean"], np.exp(eta), rtol=1e-12)
    with pytest.raises(SpecError, match=r"at most 150 coefficients; this model has 309"):
        scoring_sql("many", db=con, intervals=True)
    con.close()
    out = CliRunner().invoke(main, ["show", "many", "--db", db])
    assert out.exit_code == 0, out.output
    assert "big=B00299" in out.output


def test_intervals_above_the_limit_are_refused_before_anything_is_written(tmp_path):
    frame = _book(200, 4_000, seed=10)
    db = str(tmp_path / "reg.duckdb")
    con = duckdb.connect(db)
    con.register("f", frame)
    con.execute("CREATE TABLE book AS SELECT * FROM f")
    con.close()
    with pytest.raises(SpecError, match=r"intervals .* at most 150 coefficients"):
        indb.fit(
            "book", "claims", "poisson", db=db, offset="ln(exposure)", name="m", intervals=True
        )
    con = duckdb.connect(db)
    assert Registry(DuckDBEngine(con)).models() == []
    con.close()


def test_covariance_matrix_only_up_to_its_limit(monkeypatch):
    frame = _book(40, 2_000, seed=12)
    con = duckdb_table(frame, "book")
    full = _fit(con)
    monkeypatch.setattr(inference, "COVARIANCE_MAX_TERMS", 20)
    small = _fit(con)
    assert full.covariance is not None and small.covariance is None
    # the standard errors come from the same diagonal either way
    assert_allclose(small.std_errors, full.std_errors, rtol=1e-13)
    assert_allclose(np.sqrt(np.diag(full.covariance)), full.std_errors, rtol=1e-13)
    assert small.to_dict()["covariance"] is None


def test_too_many_columns_outside_the_largest_factor_are_refused(monkeypatch):
    frame = _book(50, 2_000, seed=13, regions=30)
    con = duckdb_table(frame, "book")
    monkeypatch.setattr(solver, "MAX_REST_COLUMNS", 20)
    with pytest.raises(
        SpecError,
        match=r"81 coefficients, 32 of them outside its largest categorical term.*at most 20"
        r".*'big' \(49\), 'region' \(29\)",
    ):
        _fit(con)


def test_max_levels_above_the_practical_limit_is_refused():
    con = duckdb_table(_book(10, 100), "book")
    with pytest.raises(
        SpecError,
        match=f"max_levels must be an integer from 2 to 50,000; got {MAX_LEVELS_LIMIT + 1}",
    ):
        _fit(con, max_levels=MAX_LEVELS_LIMIT + 1)
    out = CliRunner().invoke(
        main, ["fit", "--family", "poisson", "--response", "y", "--max-levels", "1000000", "t"]
    )
    assert out.exit_code == 2
    assert "max_levels must be an integer from 2 to 50,000; got 1000000" in out.output


# -- thousands of levels ---------------------------------------------------------------------


def test_three_thousand_levels_satisfy_the_score_equations():
    # (about a second: the many-levels path costs what the other 9 columns cost)
    frame = _book(3_000, 100_000, seed=14)
    con = duckdb_table(frame, "book")
    res = _fit(con, max_levels=3_000)
    assert res.converged and len(res.terms) == 3_000 + 7 + 2
    coef = pd.DataFrame({"term": res.terms, "b": res.estimates})
    con.register("coef", coef)
    # KKT of the Poisson likelihood (log link, canonical): sum over the rows of every
    # design column of y - mu is 0. mu from the coefficients by DuckDB, not by indb.
    score = con.execute(
        """
        WITH m AS (
            SELECT k.big, k.region, k.claims,
                   k.exposure * exp(
                       (SELECT b FROM coef WHERE term = 'intercept')
                       + coalesce(cb.b, 0) + coalesce(cr.b, 0)
                       + (SELECT b FROM coef WHERE term = 'x1') * k.x1
                       + (SELECT b FROM coef WHERE term = 'x2') * k.x2) AS mu,
                   k.x1, k.x2
            FROM book k
            LEFT JOIN coef cb ON cb.term = 'big=' || k.big
            LEFT JOIN coef cr ON cr.term = 'region=' || k.region
        )
        SELECT max(abs(s) / greatest(t, 1)) FROM (
            SELECT sum(claims - mu) AS s, sum(claims) AS t FROM m GROUP BY big
            UNION ALL SELECT sum(claims - mu), sum(claims) FROM m GROUP BY region
            UNION ALL SELECT sum(claims - mu), sum(claims) FROM m
            UNION ALL SELECT sum((claims - mu) * x1), sum(claims * abs(x1)) FROM m
            UNION ALL SELECT sum((claims - mu) * x2), sum(claims * x2) FROM m
        )
        """
    ).fetchone()[0]
    # source: the maximum likelihood estimate's first-order conditions
    assert score < 1e-8
    # standard errors at two levels against scipy's sparse LU of the same information
    # matrix X' diag(mu) X, built here from the data and the fitted means
    x = sparse.csc_array(_sparse_design(frame, res.terms))
    eta = x @ np.nan_to_num(res.estimates) + np.log(frame["exposure"].to_numpy())
    info = (x.T @ sparse.diags_array(np.exp(eta)) @ x).tocsc()
    lu = splinalg.splu(info)
    for term in ("big=B00003", "big=B02999", "x1", "intercept"):
        j = res.terms.index(term)
        e = np.zeros(len(res.terms))
        e[j] = 1.0
        assert_allclose(res.coef(term).std_error, math.sqrt(lu.solve(e)[j]), rtol=1e-6)


def _sparse_design(frame: pd.DataFrame, terms: list[str]) -> sparse.csr_array:
    """The design of ``terms`` (intercept, big=..., region=..., x1, x2) as a sparse matrix."""
    n = len(frame)
    pos = {t: j for j, t in enumerate(terms)}
    rows, cols, vals = [np.arange(n)], [np.full(n, pos["intercept"])], [np.ones(n)]
    for name in ("big", "region"):
        j = frame[name].map(lambda v, name=name: pos.get(f"{name}={v}", -1)).to_numpy()
        hit = j >= 0
        rows.append(np.flatnonzero(hit))
        cols.append(j[hit])
        vals.append(np.ones(hit.sum()))
    for name in ("x1", "x2"):
        rows.append(np.arange(n))
        cols.append(np.full(n, pos[name]))
        vals.append(frame[name].to_numpy())
    return sparse.coo_array(
        (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
        shape=(n, len(terms)),
    ).tocsr()
