"""Covariance kinds: robust (HC0) and cluster-robust standard errors against statsmodels.

Oracles (test-only): statsmodels 0.15 GLM with ``cov_type="HC0"`` and ``cov_type="cluster"``
(``groups=``), itself checked against the sandwich written out with numpy
(``covariance_cases.numpy_sandwich``); statsmodels' sandwich functions at indb's estimates.
Datasets ship inside statsmodels (``statsmodels.datasets``), named in
``covariance_cases.CASES``. Also here: the scans each kind costs, the compressed route,
bad input, results in JSON and the registry, the report, the scoring view's intervals.
"""

from __future__ import annotations

import json
import warnings
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
from covariance_cases import (
    CASES,
    CASES_BY_ID,
    CovCase,
    F,
    covariance_gap,
    design,
    numpy_sandwich,
    statsmodels_at,
    statsmodels_fit,
)
from numpy.testing import assert_allclose
from reference_cases import duckdb_table, fair_rated, grunfeld

import indb
from indb.errors import SpecError
from indb.results import FitResult

RTOL = 1e-8  # indb against statsmodels' fit (the issue's tolerance)
# indb against statsmodels' sandwich at indb's own estimates. The bread and the robust meat
# come from the last IRLS scan, whose coefficients are one Newton step (under step_tol
# standard errors) before the estimates IRLS reports after taking that step; the sandwich
# moves by about that step's relative size (2.8e-10 measured on the probit cluster case).
RTOL_AT = 1e-9
RTOL_ORACLE = 1e-11  # statsmodels against the numpy sandwich at its estimates


def fit(case: CovCase, frame: pd.DataFrame | None = None, **extra: Any) -> indb.FitResult:
    frame = case.load() if frame is None else frame
    con = duckdb_table(frame, "data")
    try:
        return indb.fit("data", db=con, **{"tol": case.tol, **case.fit, **extra})
    finally:
        con.close()


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_statsmodels_oracle_is_the_sandwich_written_out(case: CovCase) -> None:
    """statsmodels' HC0 / cluster covariance is the numpy sandwich at its estimates: bread
    the inverse observed information, frequency weights once per row (HC0), N the rows."""
    frame = case.load()
    ref = statsmodels_fit(case, frame)
    mine = numpy_sandwich(case, frame, ref["params"])
    assert covariance_gap(mine, ref["cov"]) < RTOL_ORACLE


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_covariance_matches_statsmodels(case: CovCase) -> None:
    frame = case.load()
    res = fit(case, frame)
    ref = statsmodels_fit(case, frame)
    assert res.converged and res.covariance_kind == case.kind
    assert res.terms == list(design(case, frame).columns)
    # statsmodels GLM fit with cov_type="HC0" / "cluster" (test-only oracle)
    assert_allclose(res.std_errors, ref["bse"], rtol=RTOL)
    assert covariance_gap(res.covariance, ref["cov"]) < 2 * RTOL
    assert_allclose(res.estimates, ref["params"], rtol=RTOL, atol=RTOL * ref["bse"].max())
    # Wald statistics, p-values and limits follow the covariance; statsmodels refers them to
    # t (use_t) on its df where the dispersion is estimated: N - K (HC0), G - 1 (cluster)
    wald = np.array([c.wald for c in res.coefficients])
    assert_allclose(wald, ref["wald"], rtol=RTOL, atol=1e-9)
    assert_allclose([c.p_two_sided for c in res.coefficients], ref["p"], rtol=1e-7, atol=1e-12)
    bounds = np.array([[c.lower_bound, c.upper_bound] for c in res.coefficients])
    assert_allclose(bounds, ref["ci"], rtol=RTOL, atol=RTOL * ref["bse"].max())
    if case.estimated_dispersion:
        assert res.test == "t" and res.wald_df == ref["df"]
    else:
        assert res.test == "z"
    if case.kind == "cluster":
        assert res.clusters == len(np.unique(case.groups(frame)))
    else:
        assert res.clusters is None


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_covariance_is_statsmodels_sandwich_at_the_same_estimates(case: CovCase) -> None:
    """The covariance computation alone, without the fits' convergence: statsmodels'
    cov_white_simple / cov_cluster on its score_obs and observed Hessian at indb's estimates
    (the fits differ by up to ~1e-8 where IRLS converges linearly: gamma with a log link)."""
    frame = case.load()
    res = fit(case, frame)
    want = statsmodels_at(case, frame, res.estimates)
    assert covariance_gap(res.covariance, want) < RTOL_AT


# -- the scans each kind costs -------------------------------------------------------------


class Counting(indb.DuckDBEngine):
    """The real DuckDB adapter, counting the statements that read the source table."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.reads = 0
        super().__init__(*args, **kwargs)

    def _count(self, sql: str) -> None:
        self.reads += '"data"' in sql

    def execute(self, sql: str):
        self._count(sql)
        return super().execute(sql)

    def fetch_columns(self, sql: str):
        self._count(sql)
        return super().fetch_columns(sql)


def _reads(case: CovCase, **extra: Any) -> tuple[int, indb.FitResult]:
    engine = Counting(duckdb_table(case.load(), "data"))
    try:
        res = indb.fit("data", db=engine, **{**case.fit, **extra})
    finally:
        engine.close()
    return engine.reads, res


@pytest.mark.parametrize(
    "case_id",
    [
        "gaussian-grunfeld-robust",
        "poisson-fair-offset-robust",
        "binomial-fair-logit-prior-weight-robust",
        "gaussian-grunfeld-firm-effects-cluster-year",
        "poisson-fair-offset-cluster-expression",
        "binomial-fair-probit-cluster",
    ],
)
def test_robust_adds_no_scan_and_cluster_one(case_id: str) -> None:
    """Counted twice: statements that read the source (a counting engine) and the iteration
    log. The meat (and, for probit, the observed information) rides in the last IRLS scan;
    the cluster scan is one read of the source."""
    case = CASES_BY_ID[case_id]
    model_reads, model = _reads(case, covariance="model", cluster=None)
    reads, res = _reads(case)
    extra = 1 if case.kind == "cluster" else 0
    assert reads == model_reads + extra
    phases = [r.phase for r in res.iteration_log]
    assert phases.count("covariance") == extra
    assert [p for p in phases if p != "covariance"] == [r.phase for r in model.iteration_log]
    assert res.iterations == model.iterations
    assert_allclose(res.estimates, model.estimates, rtol=1e-12, atol=1e-14)


def test_a_last_scan_without_the_meat_gets_it_from_one_scan_more() -> None:
    # a loose tolerance ends IRLS at a scan that a step of more than irls.CARRY_STEP standard
    # errors led to, so that scan did not carry the meat: one IRLS scan at the final
    # coefficients adds it. The covariance is statsmodels' at those coefficients.
    case = CASES_BY_ID["poisson-fair-offset-robust"]
    frame = case.load()
    res = fit(case, frame, tol=1e-3)
    phases = [r.phase for r in res.iteration_log]
    assert phases[-1] == "covariance" and phases.count("covariance") == 1
    assert covariance_gap(res.covariance, statsmodels_at(case, frame, res.estimates)) < RTOL_AT


# -- routes ------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "case_id", ["poisson-fair-offset-folded-robust", "poisson-fair-offset-folded-cluster"]
)
def test_compressed_route_gives_the_row_routes_covariance(case_id: str) -> None:
    case = CASES_BY_ID[case_id]
    folded = fit(case)
    rows = fit(case, compress="never")
    assert folded.path.startswith("compressed") and not rows.path.startswith("compressed")
    assert_allclose(folded.std_errors, rows.std_errors, rtol=1e-10)
    assert covariance_gap(folded.covariance, rows.covariance) < 1e-10


def test_compressed_route_with_a_cluster_folds_within_clusters() -> None:
    # the cluster's column joins the fold's keys: 5 ratings x 6 occupations, not 5 groups
    case = CASES_BY_ID["poisson-fair-offset-folded-cluster"]
    res = fit(case, predictors=["rating"])
    frame = case.load()
    assert f"folded to {frame.groupby(['rating', 'occupation']).ngroups:,} distinct" in res.path


def test_too_many_coefficients_for_a_sandwich_are_refused_before_any_irls_scan() -> None:
    rng = np.random.default_rng(3)  # invented rows: the check reads only the design's size
    frame = pd.DataFrame(
        {"y": rng.poisson(2.0, 6000).astype(float), "level": [f"L{i}" for i in range(3000)] * 2}
    )
    engine = Counting(duckdb_table(frame, "data"))
    try:
        with pytest.raises(SpecError, match=r"covariance 'robust' needs the whole covariance"):
            indb.fit("data", "y", "poisson", db=engine, covariance="robust")
    finally:
        engine.close()


# -- NULL clusters, bad input ----------------------------------------------------------------


def _grunfeld_with_null_firms() -> pd.DataFrame:
    # statsmodels.datasets.grunfeld with the firm of 7 rows set to NULL
    df = grunfeld()
    df.loc[df.index[:7], "firm"] = None
    return df


def test_rows_with_a_null_cluster_are_set_aside_and_counted() -> None:
    frame = _grunfeld_with_null_firms()
    con = duckdb_table(frame, "data")
    res = indb.fit(
        "data", "invest", db=con, predictors=["value"], covariance="cluster", cluster="firm"
    )
    assert res.n_excluded == 7 and res.n_used == len(frame) - 7
    assert res.excluded_by_column == {"firm": 7, "cluster expression": 7}
    # the same as statsmodels on the rows left (HC0 of the kept rows, clustered by firm)
    kept = frame.dropna().reset_index(drop=True)
    case = CovCase(
        "g", "", lambda: kept, {"response": "invest", "predictors": ["value"],
                                "covariance": "cluster"},
        F.Gaussian, "gaussian", "identity",
        groups=lambda df: pd.factorize(df["firm"])[0],
    )  # fmt: skip
    assert_allclose(res.std_errors, statsmodels_fit(case, kept)["bse"], rtol=RTOL)
    assert "rows set aside" in str(res)
    with pytest.raises(SpecError, match=r"7 rows have NULLs .*'cluster expression': 7"):
        indb.fit(
            "data",
            "invest",
            db=con,
            predictors=["value"],
            covariance="cluster",
            cluster="firm",
            on_null="error",
        )


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"covariance": "cluster"}, r"covariance 'cluster' needs the cluster expression"),
        ({"cluster": "firm"}, r"cluster='firm' is read only with covariance='cluster'"),
        (
            {"covariance": "robust", "cluster": "firm"},
            r"got covariance='robust': add it, or leave the cluster out",
        ),
        ({"covariance": "sandwich"}, r"covariance must be 'model', 'robust' or 'cluster'"),
        ({"covariance": "cluster", "cluster": "  "}, r"cluster must be a non-empty SQL"),
        ({"covariance": "cluster", "cluster": "firm ||"}, r"cannot parse cluster expression"),
        ({"covariance": "cluster", "cluster": "no_such"}, r"no_such"),
        (
            {"covariance": "cluster", "cluster": "max(firm)"},
            r"cluster expression 'max\(firm\)' must be a plain per-row expression",
        ),
        ({"covariance": "cluster", "cluster": "'one'"}, r"takes 1 value\(s\) over the 220 rows"),
        ({"covariance": 3}, r"covariance must be text"),
    ],
)
def test_bad_covariance_options_are_refused(kwargs: dict[str, Any], message: str) -> None:
    con = duckdb_table(grunfeld(), "data")
    with pytest.raises(SpecError, match=message):
        indb.fit("data", "invest", db=con, predictors=["value"], **kwargs)


def test_a_single_cluster_writes_nothing(tmp_path: Any) -> None:
    db = str(tmp_path / "m.duckdb")
    con = duckdb.connect(db)
    con.register("f", grunfeld())
    con.execute("CREATE TABLE data AS SELECT * FROM f")
    con.close()
    with pytest.raises(SpecError, match=r"cluster expression 'firm' takes 1 value"):
        indb.fit(
            "SELECT * FROM data WHERE firm = 'IBM'",
            "invest",
            db=db,
            predictors=["value"],
            covariance="cluster",
            cluster="firm",
            name="one_firm",
        )
    con = duckdb.connect(db)
    try:
        tables = {
            r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()
        }
    finally:
        con.close()
    assert tables == {"data"}  # no registry, no view


def test_cli_cluster_errors_are_one_line_exit_2(tmp_path: Any) -> None:
    from click.testing import CliRunner

    from indb.cli import main

    path = tmp_path / "g.parquet"
    grunfeld().to_parquet(path)
    runner = CliRunner()
    ok = runner.invoke(
        main,
        [
            "fit", str(path), "--response", "invest", "--family", "gaussian",
            "--predictors", "value", "--covariance", "cluster", "--cluster", "firm", "--json",
        ],
    )  # fmt: skip
    assert ok.exit_code == 0, ok.output
    out = json.loads(ok.output)
    assert out["covariance_kind"] == "cluster" and out["clusters"] == 11
    bad = runner.invoke(
        main,
        [
            "fit",
            str(path),
            "--response",
            "invest",
            "--family",
            "gaussian",
            "--covariance",
            "cluster",
        ],
    )
    assert bad.exit_code == 2
    assert "covariance 'cluster' needs the cluster expression" in bad.output
    assert len(bad.output.strip().splitlines()) == 1


# -- results, registry, report, scoring view -----------------------------------------------


def test_result_round_trips_its_kind_and_old_results_read_as_model() -> None:
    res = fit(CASES_BY_ID["gaussian-grunfeld-firm-effects-cluster-firm"])
    d = json.loads(json.dumps(res.to_dict()))
    assert d["covariance_kind"] == "cluster" and d["clusters"] == 11
    back = FitResult.from_dict(d)
    assert back.covariance_kind == "cluster" and back.clusters == 11
    assert back.wald_df == 10.0
    assert_allclose(back.covariance, res.covariance, rtol=1e-15)
    old = {k: v for k, v in d.items() if k not in ("covariance_kind", "clusters")}
    assert FitResult.from_dict(old).covariance_kind == "model"
    assert FitResult.from_dict(old).clusters is None


def test_registry_stores_the_kind_and_the_view_uses_its_covariance(tmp_path: Any) -> None:
    case = CASES_BY_ID["poisson-fair-offset-robust"]
    frame = case.load()
    db = str(tmp_path / "m.duckdb")
    con = duckdb.connect(db)
    con.register("f", frame)
    con.execute("CREATE TABLE data AS SELECT * FROM f")
    con.close()
    res = indb.fit("data", db=db, tol=case.tol, name="kids", intervals=True, **case.fit)
    reg = indb.api.registry(db)
    try:
        stored = reg.load("kids")
        assert stored.covariance_kind == "robust"
        assert_allclose(stored.std_errors, res.std_errors, rtol=1e-15)
        rows = reg.engine.fetch_columns('SELECT * FROM "kids" LIMIT 50')
    finally:
        reg.engine.close()
    # the standard error of eta, sqrt(x' V x), with statsmodels' HC0 covariance V (test-only
    # oracle) and the rows the view returned
    ref = statsmodels_fit(case, frame)
    got = pd.DataFrame(rows)
    both = pd.concat([frame, got[frame.columns.tolist()]], ignore_index=True)
    x = design(case, both).iloc[len(frame) :]  # the full data's levels and reference levels
    want = np.sqrt(np.einsum("ij,jk,ik->i", x.to_numpy(), ref["cov"], x.to_numpy()))
    assert_allclose(got["score_se_eta"].to_numpy(dtype=float), want, rtol=1e-8)


def test_report_says_which_covariance_it_used() -> None:
    cluster = fit(CASES_BY_ID["gaussian-grunfeld-firm-effects-cluster-year"])
    text = " ".join(str(cluster).split())  # the legend wraps
    assert "cluster-robust" in text and "20 clusters of year" in text
    assert "referred to t on 19 df (clusters less one)" in text
    robust = str(fit(CASES_BY_ID["poisson-fair-offset-robust"]))
    assert "robust" in robust and "no small-sample factor" in robust
    model = str(fit(CASES_BY_ID["poisson-fair-offset-robust"], covariance="model"))
    assert "model-based" in model


def test_spec_file_takes_the_covariance_keys(tmp_path: Any) -> None:
    from indb.specfile import load_spec_file

    path = tmp_path / "m.toml"
    path.write_text(
        '[model]\nsource = "data"\nresponse = "invest"\nfamily = "gaussian"\n'
        'covariance = "cluster"\ncluster = "firm"\n',
        encoding="utf-8",
    )
    spec = load_spec_file(str(path))
    assert spec.model["covariance"] == "cluster" and spec.model["cluster"] == "firm"
    path.write_text(
        '[model]\nsource = "data"\nresponse = "invest"\ncovariance = 1\n', encoding="utf-8"
    )
    with pytest.raises(SpecError, match=r"\[model\] covariance must be text"):
        load_spec_file(str(path))


def test_cluster_column_is_no_default_predictor_but_may_be_named() -> None:
    frame = fair_rated().assign(household=np.arange(6366) // 3)
    con = duckdb_table(frame, "data")
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no DesignWarning about an identifier-like predictor
        res = indb.fit(
            "data",
            "children",
            "poisson",
            db=con,
            exclude=["affairs", "had", "wt", "years"],
            covariance="cluster",
            cluster="household",
        )
    assert "household" not in res.terms and res.clusters == 2122
    named = indb.fit(
        "data",
        "children",
        "poisson",
        db=con,
        predictors=["rating", "religious"],
        covariance="cluster",
        cluster="religious",
    )
    assert "religious=2" in named.terms and named.clusters == 4


def test_dry_run_shows_the_covariance_scans() -> None:
    con = duckdb_table(grunfeld(), "data")
    cluster = indb.api.dry_run(
        "data", "invest", db=con, predictors=["value", "firm"], covariance="cluster",
        cluster="firm",
    )  # fmt: skip
    labels = [label for label, _ in cluster]
    assert labels[-2:] == [
        "cluster scan (once, at the final coefficients): the clusters' scores per cell, stored",
        "cluster scan (once, at the final coefficients)",
    ]
    assert 'firm AS "clu"' in cluster[-2][1] and 'JOIN "indb_scores_' in cluster[-1][1]
    robust = indb.api.dry_run(
        "data", "invest", "gamma", "log", db=con, predictors=["value"], covariance="robust"
    )
    assert robust[-1][0] == (
        "the last IRLS scans, with the robust meat and the observed information (no scan added)"
    )
    assert '"r_0_0"' in robust[-1][1] and '"o_0_0"' in robust[-1][1]
    model = indb.api.dry_run("data", "invest", db=con, predictors=["value"])
    assert model[-1][0] == "IRLS scan (one per iteration; coefficients change)"


def test_an_aliased_column_is_left_out_of_bread_meat_and_k() -> None:
    # statsmodels.datasets.grunfeld with a copy of `value` in other units: aliased, set
    # aside; the other terms' covariance is the fit's without it (statsmodels, as above)
    case = CASES_BY_ID["gaussian-grunfeld-firm-effects-cluster-firm"]
    frame = case.load()
    with_copy = frame.assign(value_k=frame["value"] / 1000.0)
    with pytest.warns(indb.AliasingWarning):
        res = fit(case, with_copy, predictors=["value", "value_k", "capital", "firm"])
    assert res.coef("value_k").aliased
    ref = statsmodels_fit(case, frame)
    kept = [t != "value_k" for t in res.terms]
    assert_allclose(res.std_errors[kept], ref["bse"], rtol=RTOL)
    assert np.isnan(res.covariance[:, ~np.array(kept)]).all()


def test_a_refit_with_another_kind_is_a_new_live_version(tmp_path: Any) -> None:
    # the estimates are the same model's: a new version (the spec hash differs, so it is no
    # repeat of version 1) that goes live by default (the kind is no change of model)
    db = str(tmp_path / "m.duckdb")
    con = duckdb.connect(db)
    con.register("f", grunfeld())
    con.execute("CREATE TABLE data AS SELECT * FROM f")
    con.close()
    first = indb.fit("data", "invest", db=db, predictors=["value"], name="inv")
    second = indb.fit(
        "data", "invest", db=db, predictors=["value"], name="inv", covariance="cluster",
        cluster="firm",
    )  # fmt: skip
    assert first.deployment["version"] == 1 and second.deployment["version"] == 2
    assert second.deployment["promoted"]
    reg = indb.api.registry(db)
    try:
        live = reg.load("inv")
    finally:
        reg.engine.close()
    assert live.covariance_kind == "cluster" and live.clusters == 11
    assert live.spec["cluster"] == "firm"
    assert_allclose(live.estimates, first.estimates, rtol=1e-12)
    assert not np.allclose(live.std_errors, first.std_errors)
