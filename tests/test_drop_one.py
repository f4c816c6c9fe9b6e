"""Drop-one likelihood-ratio tests of whole terms (``drop_one=True``, indb.batchfit).

Oracle (test-only, outside the project): statsmodels GLM refits of each reduced model
(formula API) on datasets shipped in statsmodels (``statsmodels.datasets``: fair,
scotland, grunfeld; nothing is downloaded). The drop deviance is the reduced refit's
deviance less the full refit's; the chi-square / F tail probabilities are scipy's of the
statistic computed from statsmodels' numbers (F: the full model's Pearson dispersion,
statsmodels' default ``scale="X2"``, on (df, residual df); common practice). Each oracle
is checked itself: every statsmodels refit converged tightly (its score at the estimate
is ~0 relative to the score's scale), and for the fixed-dispersion families the deviance
change equals statsmodels' own likelihood-ratio statistic 2 (llf_full - llf_reduced).
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from click.testing import CliRunner
from numpy.testing import assert_allclose
from reference_cases import duckdb_table, fair_rated, grunfeld, scotland
from scipy import stats
from test_covariance import Counting

import indb
from indb.cli import main
from indb.errors import SpecError

SM_FIT = {"tol": 1e-14, "maxiter": 500}
#: drop deviances: both sides converge to ~1e-12 relative deviance, a difference of two
#: deviances of ~1e3 keeps ~1e-9 absolute
ATOL_DEV = 1e-7


def _sm(formula: str, data: pd.DataFrame, family: Any, **kw: Any) -> Any:
    res = smf.glm(formula, data=data, family=family, **kw).fit(**SM_FIT)
    # the oracle itself: converged tightly (the Newton step its score at the estimate
    # still asks for is below 1e-6 standard errors)
    score = res.model.score(res.params.to_numpy(), scale=res.scale)
    step = res.cov_params().to_numpy() @ score / res.bse.to_numpy()
    assert np.abs(step).max() < 1e-6, (formula, np.abs(step).max())
    return res


def _check(
    res: indb.FitResult,
    data: pd.DataFrame,
    family: Any,
    full: str,
    reduced: Mapping[str, str],
    *,
    fixed: bool,
    **kw: Any,
) -> None:
    """Each tested term of ``res`` against statsmodels' refit of ``reduced[term]``."""
    oracle_full = _sm(full, data, family, **kw)
    got = {t.term: t for t in res.term_tests}
    assert_allclose(res.deviance, oracle_full.deviance, rtol=1e-9)
    for term, formula in reduced.items():
        small = _sm(formula, data, family, **kw)
        change = small.deviance - oracle_full.deviance
        df = int(oracle_full.df_model - small.df_model)
        t = got[term]
        assert t.drop_df == df, term
        assert_allclose(t.drop_deviance, change, rtol=1e-7, atol=ATOL_DEV)
        if fixed:
            # the oracle itself: its deviance change is its likelihood-ratio statistic
            assert_allclose(2 * (oracle_full.llf - small.llf), change, rtol=1e-9, atol=1e-8)
            assert t.lr_test == "chi2"
            assert_allclose(t.lr_p_value, stats.chi2.sf(change, df), rtol=1e-6, atol=1e-300)
        else:
            f = change / df / oracle_full.scale
            assert t.lr_test == "F"
            assert_allclose(t.lr_statistic, f, rtol=1e-7, atol=1e-9)
            assert_allclose(
                t.lr_p_value, stats.f.sf(f, df, oracle_full.df_resid), rtol=1e-6, atol=1e-300
            )


def test_poisson_with_offset_and_weights_on_fair() -> None:
    data = fair_rated()
    con = duckdb_table(data, "fair")
    res = indb.fit(
        "fair",
        "children",
        "poisson",
        db=con,
        predictors=["rating", "religious", "age", "educ"],
        offset="ln(years)",
        weight="wt",
        drop_one=True,
        tol=1e-13,
    )
    kw = {"offset": np.log(data["years"]), "var_weights": data["wt"]}
    _check(
        res,
        data,
        sm.families.Poisson(),
        "children ~ C(rating) + C(religious) + age + educ",  # statsmodels.datasets.fair
        {
            "rating": "children ~ C(religious) + age + educ",
            "religious": "children ~ C(rating) + age + educ",
            "age": "children ~ C(rating) + C(religious) + educ",
            "educ": "children ~ C(rating) + C(religious) + age",
        },
        fixed=True,
        **kw,
    )
    # JSON round trip keeps the new fields; the text report shows them
    again = indb.FitResult.from_dict(json.loads(json.dumps(res.to_dict())))
    for a, b in zip(again.term_tests, res.term_tests, strict=True):
        assert a.drop_df == b.drop_df and a.lr_test == b.lr_test
        assert_allclose(a.drop_deviance, b.drop_deviance, rtol=0)
        assert_allclose(a.lr_p_value, b.lr_p_value, rtol=0)
    assert "LEAVING EACH TERM OUT" in str(res)
    assert "drop_one" in [r.phase for r in res.iteration_log]


def test_binomial_on_fair() -> None:
    data = fair_rated()
    con = duckdb_table(data, "fair")
    res = indb.fit(
        "fair",
        "had",
        "binomial",
        db=con,
        predictors=["rating", "age", "educ"],
        drop_one=True,
        tol=1e-13,
    )
    _check(
        res,
        data,
        sm.families.Binomial(),
        "had ~ C(rating) + age + educ",
        {
            "rating": "had ~ age + educ",
            "age": "had ~ C(rating) + educ",
            "educ": "had ~ C(rating) + age",
        },
        fixed=True,
    )


def test_gamma_takes_the_f_test_on_scotland() -> None:
    data = scotland()
    con = duckdb_table(data, "scot")
    res = indb.fit("scot", "YES", "gamma", db=con, drop_one=True, tol=1e-13)
    cols = ["COUTAX", "UNEMPF", "MOR", "ACT", "GDP", "AGE"]
    full = "YES ~ " + " + ".join(cols)
    reduced = {c: "YES ~ " + " + ".join(x for x in cols if x != c) for c in cols}
    _check(res, data, sm.families.Gamma(), full, reduced, fixed=False)
    assert "F = added deviance" in str(res)


def test_gamma_log_link_with_weights_on_fair() -> None:
    """A log link with V(mu) = mu^2: the batch scans are log-link scans (no join; the full
    fit's constant sums reused), with an F test."""
    data = fair_rated().assign(spent=lambda d: d["affairs"] + 0.5)
    con = duckdb_table(data, "fair")
    res = indb.fit(
        "fair",
        "spent",
        "gamma",
        "log",
        db=con,
        predictors=["rating", "religious", "age", "educ"],
        weight="wt",
        drop_one=True,
        tol=1e-13,
    )
    family = sm.families.Gamma(sm.families.links.Log())
    _check(
        res,
        data,
        family,
        "spent ~ C(rating) + C(religious) + age + educ",
        {
            "rating": "spent ~ C(religious) + age + educ",
            "educ": "spent ~ C(rating) + C(religious) + age",
        },
        fixed=False,
        var_weights=data["wt"],
    )


def test_gaussian_interaction_keeps_marginality_on_grunfeld() -> None:
    """Main effects inside an interaction are not tested (marginality, common practice); the
    interaction and the other terms are."""
    data = grunfeld()
    con = duckdb_table(data, "grunfeld")
    res = indb.fit(
        "grunfeld",
        "invest",
        "gaussian",
        db=con,
        interactions=[["value", "firm"]],
        drop_one=True,
        tol=1e-13,
    )
    got = {t.term: t for t in res.term_tests}
    for inside in ("value", "firm"):
        assert got[inside].drop_df is None and "contained in 'value & firm'" in str(
            got[inside].drop_note
        )
    _check(
        res,
        data,
        sm.families.Gaussian(),
        "invest ~ value * C(firm) + capital",
        {
            "capital": "invest ~ value * C(firm)",
            "value & firm": "invest ~ value + C(firm) + capital",
        },
        fixed=False,
    )
    # a term not tested is listed with its reason in the report
    assert "not tested: contained in" in str(res)


def test_aliased_term_has_no_df_to_test() -> None:
    """A term whose columns are combinations of the others' (here ``both`` = age + educ) is
    set aside in the full fit; leaving out any one of the three loses no rank (the other
    two span the same columns): drop df 0, the deviance unchanged, no p-value and a note."""
    data = fair_rated()[["children", "age", "educ", "years"]].assign(
        both=lambda d: d["age"] + d["educ"]
    )
    con = duckdb_table(data, "fair")
    with pytest.warns(indb.AliasingWarning):
        res = indb.fit(
            "fair", "children", "poisson", db=con, offset="ln(years)", drop_one=True, tol=1e-13
        )
    # statsmodels' fit of the span (age, educ) gives the same deviance
    full = _sm("children ~ age + educ", data, sm.families.Poisson(), offset=np.log(data["years"]))
    assert_allclose(res.deviance, full.deviance, rtol=1e-9)
    for t in res.term_tests:
        assert t.drop_df == 0, t
        assert abs(t.drop_deviance) < 1e-6 * res.deviance
        assert np.isnan(t.lr_p_value) and "no df" in str(t.drop_note)


# -- shared scans ---------------------------------------------------------------------------


def _reads(frame: pd.DataFrame, **fit: Any) -> tuple[int, indb.FitResult]:
    engine = Counting(duckdb_table(frame, "data"))
    try:
        res = indb.fit("data", db=engine, **fit)
    finally:
        engine.close()
    return engine.reads, res


def test_one_read_per_batch_iteration_for_all_reduced_models() -> None:
    """The counting engine (real DuckDB) counts statements that read the source: drop_one
    adds exactly one per drop-one iteration, whatever the number of terms (here 4)."""
    fit = {
        "response": "children",
        "family": "poisson",
        "predictors": ["rating", "religious", "age", "educ"],
        "offset": "ln(years)",
        "tol": 1e-12,
        "compress": "never",
        "sample_start": "never",
    }
    plain_reads, plain = _reads(fair_rated(), **fit)
    reads, res = _reads(fair_rated(), **fit, drop_one=True)
    batch = [r for r in res.iteration_log if r.phase == "drop_one"]
    assert len(batch) >= 2
    assert reads - plain_reads == len(batch)
    # four models, far fewer scans than four fits one after another
    assert len(batch) < 4 * plain.iterations
    assert_allclose(res.deviance, plain.deviance, rtol=0)


# -- input errors ---------------------------------------------------------------------------


def test_drop_one_with_a_penalty_is_refused() -> None:
    con = duckdb_table(fair_rated(), "fair")
    with pytest.raises(SpecError, match=r"drop_one=True .* penalised fit .* leave out drop_one"):
        indb.fit("fair", "children", "poisson", db=con, penalty=0.1, drop_one=True)
    with pytest.raises(SpecError, match=r"drop_one=True .* or fit without penalty/path"):
        indb.fit("fair", "children", "poisson", db=con, path=3, drop_one=True)


def test_drop_one_with_only_an_intercept_is_refused() -> None:
    con = duckdb_table(fair_rated(), "fair")
    with pytest.raises(SpecError, match=r"only an intercept; add predictors or leave out drop_one"):
        indb.fit("fair", "children", "poisson", db=con, predictors=[], drop_one=True)


def test_cli_drop_one(tmp_path: Path) -> None:
    data = scotland()
    path = tmp_path / "scot.csv"
    data.to_csv(path, index=False)
    run = CliRunner().invoke(
        main,
        ["fit", "--family", "gamma", "--response", "YES", "--drop-one", "--json", str(path)],
    )
    assert run.exit_code == 0, run.stderr
    out = json.loads(run.stdout)
    oracle_full = _sm("YES ~ COUTAX + UNEMPF + MOR + ACT + GDP + AGE", data, sm.families.Gamma())
    small = _sm("YES ~ UNEMPF + MOR + ACT + GDP + AGE", data, sm.families.Gamma())
    got = {t["term"]: t for t in out["term_tests"]}
    assert_allclose(
        got["COUTAX"]["drop_deviance"], small.deviance - oracle_full.deviance, rtol=1e-6
    )
    assert got["COUTAX"]["lr_test"] == "F" and got["COUTAX"]["drop_df"] == 1
    plain = CliRunner().invoke(
        main, ["fit", "--family", "gamma", "--response", "YES", "--json", str(path)]
    )
    # without --drop-one the entries keep their former keys
    assert "drop_deviance" not in json.loads(plain.stdout)["term_tests"][0]


def test_a_batch_of_one_model_sums_as_the_irls_scan() -> None:
    """The batch scan of one model gives the IRLS scan's sums (``gram_query``) at the same
    coefficients, with and without the cells known: the same per-row stages, grouped by
    the model id first. (A check of the SQL against the project's own scan; the numbers
    against outside references are the tests above.)"""
    import dataclasses

    from indb import fitter, solver
    from indb.engines.backends import connect
    from indb.engines.base_engine import qualify_source
    from indb.fitrun import FitRun
    from indb.plan.batch_scan import batch_query
    from indb.plan.irls_scan import MODEL_ID, gram_query
    from indb.spec import ModelSpec

    con = duckdb_table(fair_rated(), "fair")
    engine = connect(con)
    spec = ModelSpec.build(
        "fair", "children", "poisson", offset="ln(years)", weight="wt", compress="never"
    )
    spec = dataclasses.replace(spec, source=qualify_source(engine, spec.source))
    run = FitRun(engine=engine, progress=None, log=[])
    ctx, design, summary, *_ = fitter._prepare(spec, engine, run)
    beta = np.linspace(-0.1, 0.1, design.p)
    plain = solver.assemble(design, run.query(gram_query(ctx, design, beta, ybar=summary.ybar)))
    for cells in (None, plain.cell_keys):
        got = run.query(batch_query(ctx, design, {7: beta, 8: beta * 0.5}, cells))
        rows = np.asarray(got[MODEL_ID]) == 7
        one = solver.assemble(design, {k: np.asarray(v)[rows] for k, v in got.items()})
        assert_allclose(one.deviance, plain.deviance, rtol=1e-12)
        assert_allclose(one.xtwz, plain.xtwz, rtol=1e-12, atol=1e-12)
        assert_allclose(one.xtwx.toarray(), plain.xtwx.toarray(), rtol=1e-12, atol=1e-12)
        assert one.n == plain.n
