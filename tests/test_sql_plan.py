"""The generated SQL plan: one aggregate query per IRLS scan, file scans, golden text, and
the per-row link and family formulas evaluated by DuckDB against scipy/statsmodels.

Oracles: statsmodels (GLM fits and family deviances), scipy.special / numpy closed forms
for the links. Data: datasets shipped inside statsmodels (``statsmodels.datasets``); the
link and deviance checks use grids and seeded random points, not datasets.
"""

from __future__ import annotations

import dataclasses
import os
import re
import warnings
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlglot
import statsmodels.api as sm
import statsmodels.datasets as smd
from numpy.testing import assert_allclose
from scipy import special, stats
from sqlglot import exp

import indb
from indb import sqlexpr as S
from indb.design import Factor, build_design, plan_values, resolve_inputs
from indb.engines.duckdb import DuckDBDialect
from indb.families import make_family
from indb.links import make_link
from indb.plan.context import PlanContext
from indb.plan.irls_scan import gram_query
from indb.spec import ModelSpec

GOLDEN = Path(__file__).parent / "golden"
UPDATE_GOLDEN = os.environ.get("INDB_UPDATE_GOLDEN") == "1"

# statsmodels IRLS stopped on the coefficients at a tight tolerance (same as reference_cases).
SM_FIT = {"tol_criterion": "params", "atol": 1e-14, "rtol": 1e-13, "maxiter": 2000}


# ---------------------------------------------------------------------------------------------
# A real DuckDB engine that records every statement it is sent
# ---------------------------------------------------------------------------------------------
class RecordingEngine(indb.DuckDBEngine):
    """The real DuckDB adapter, keeping (kind, SQL text, rows returned) for each call."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.calls: list[tuple[str, str, int | None]] = []
        super().__init__(*args, **kwargs)

    def execute(self, sql: str) -> list[tuple[Any, ...]]:
        rows = super().execute(sql)
        self.calls.append(("execute", sql, len(rows)))
        return rows

    def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
        cols = super().fetch_columns(sql)
        n = len(next(iter(cols.values()))) if cols else 0
        self.calls.append(("fetch", sql, n))
        return cols

    def describe(self, sql: str) -> list[tuple[str, str]]:
        out = super().describe(sql)
        self.calls.append(("describe", sql, None))  # describes, returns no rows
        return out

    def gram_calls(self) -> list[tuple[str, str, int | None]]:
        return [c for c in self.calls if '"s_0_0"' in c[1]]


def _sm_frame(name: str) -> pd.DataFrame:
    return getattr(smd, name).load_pandas().data.reset_index(drop=True)


def _fair() -> pd.DataFrame:
    # statsmodels.datasets.fair: 1974 Redbook survey on extramarital affairs (6366 rows).
    df = _sm_frame("fair")
    return pd.DataFrame(
        {
            "had_affair": (df["affairs"] > 0).astype("int64"),
            "rate_marriage": df["rate_marriage"].astype("int64"),
            "religious": df["religious"].astype("int64"),
            "age": df["age"],
        }
    )


@pytest.fixture
def con() -> Iterator[duckdb.DuckDBPyConnection]:
    c = duckdb.connect()
    yield c
    c.close()


def _load(con: duckdb.DuckDBPyConnection, name: str, frame: pd.DataFrame) -> None:
    con.register(f"{name}_frame", frame)
    con.execute(f'CREATE TABLE "{name}" AS SELECT * FROM "{name}_frame"')
    con.unregister(f"{name}_frame")


# ---------------------------------------------------------------------------------------------
# One aggregate query per IRLS scan
# ---------------------------------------------------------------------------------------------
PLAN_CASES = {
    # grouped scan: two factors and their interaction (20 observed cells), logit
    "fair-grouped": (
        "fair",
        _fair,
        {
            "response": "had_affair",
            "family": "binomial",
            "categorical": ["rate_marriage", "religious"],
            "interactions": [("rate_marriage", "religious")],
        },
        ["rate_marriage", "religious"],
    ),
    # offset: the null deviance needs the intercept-only model refitted with the offset;
    # statsmodels.datasets.cancer (301 rows), population also as a predictor (thousands)
    "cancer-offset": (
        "cancer",
        lambda: _sm_frame("cancer").assign(pop_k=lambda d: d["population"] / 1000.0),
        {"response": "cancer", "family": "poisson", "offset": "ln(population)"},
        [],
    ),
    # identity-link binomial on statsmodels.datasets.spector: fitted means leave (0, 1) during
    # IRLS, so steps are halved; every halving is one more scan
    "spector-halving": (
        "spector",
        lambda: _sm_frame("spector"),
        {"response": "GRADE", "family": "binomial", "link": "identity", "predictors": ["TUCE"]},
        [],
    ),
}


@pytest.mark.parametrize("case_id", list(PLAN_CASES))
def test_one_aggregate_query_per_irls_scan(con: duckdb.DuckDBPyConnection, case_id: str) -> None:
    table, load, options, factors = PLAN_CASES[case_id]
    frame = load()
    _load(con, table, frame)
    engine = RecordingEngine(con)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", indb.AliasingWarning)
        res = indb.fit(table, db=engine, **options)

    grams = engine.gram_calls()
    scans = sum(1 + r.step_halvings for r in res.iteration_log)
    assert len(grams) == scans
    if case_id == "spector-halving":
        assert sum(r.step_halvings for r in res.iteration_log) > 0  # the case exists for this

    # observed factor cells, counted with pandas on the same rows
    cells = len(frame.groupby(factors).size()) if factors else 1
    n_levels = sum(frame[f].nunique() for f in factors)
    for kind, sql, rows in grams:
        statements = sqlglot.parse(sql, read="duckdb")
        assert len(statements) == 1
        tree = statements[0]
        assert isinstance(tree, exp.Select)  # not a UNION, not DDL/DML
        assert tree.find(exp.Union) is None and tree.find(exp.Window) is None
        group = tree.args.get("group")
        keys = [e.name for e in group.expressions] if group else []
        assert len(keys) == len(factors)
        for proj in tree.expressions:
            if isinstance(proj, exp.Column):
                assert proj.name in keys  # a group key
            else:
                assert isinstance(proj, exp.Alias) and isinstance(proj.this, exp.AggFunc)
        assert kind == "fetch" and rows == cells
    # no statement brings per-row data back: a result has at most one row per factor cell
    # plus one per factor level (the pre-fit level scan) plus a total row
    limit = cells + n_levels + 1
    for kind, sql, rows in engine.calls:
        if rows is not None:
            assert rows <= limit, (kind, rows, sql[:200])
    assert limit < len(frame) // 10


# ---------------------------------------------------------------------------------------------
# A Parquet file scanned in place under a small memory limit
# ---------------------------------------------------------------------------------------------
RANDHIE = ["mdvis", "lncoins", "idp", "lpi", "fmde", "physlm", "disea", "hlthg", "hlthf", "hlthp"]


def test_parquet_file_is_scanned_in_place(tmp_path: Path) -> None:
    # statsmodels.datasets.randhie (RAND Health Insurance Experiment, 20190 rows) stacked 15
    # times: 302850 rows, ~24 MB as float64 columns.
    frame = pd.concat([_sm_frame("randhie")[RANDHIE]] * 15, ignore_index=True)
    table = pa.Table.from_pandas(frame, preserve_index=False)
    path = tmp_path / "randhie.parquet"
    pq.write_table(table, path)
    memory_limit_bytes = 5 * 2**20
    assert table.nbytes > 4 * memory_limit_bytes  # far more than the engine may hold

    engine = RecordingEngine(memory_limit="5MB", threads=1)
    try:
        # compress="never": the stacked copies would otherwise be folded into a temporary
        # table of distinct rows (a separate feature); here the file itself is scanned
        res = indb.fit(str(path), "mdvis", "poisson", db=engine, tol=1e-13, compress="never")
        tables = engine.con.execute("SELECT count(*) FROM information_schema.tables").fetchone()
    finally:
        engine.close()
    assert tables == (0,)  # nothing was copied into the database
    data_sql = [sql for kind, sql, _ in engine.calls if kind != "execute"]
    scan = re.compile(r"read_parquet\('" + re.escape(str(path)) + r"'\)", re.IGNORECASE)
    assert data_sql and all(scan.search(sql) for sql in data_sql)
    assert not any(
        word in sql.upper() for sql in data_sql for word in ("CREATE ", "INSERT ", "COPY ")
    )
    assert res.n_used == len(frame)

    # oracle: statsmodels GLM Poisson on the same rows
    X = sm.add_constant(frame[RANDHIE[1:]].to_numpy())
    ref = sm.GLM(frame["mdvis"].to_numpy(), X, family=sm.families.Poisson()).fit(**SM_FIT)
    assert res.terms == ["intercept", *RANDHIE[1:]]
    assert_allclose(res.estimates, ref.params, rtol=1e-6)
    assert_allclose(res.std_errors, ref.bse, rtol=1e-6)
    assert_allclose(res.deviance, ref.deviance, rtol=1e-8)


# ---------------------------------------------------------------------------------------------
# Golden SQL: the iteration query of a small fixed spec
# ---------------------------------------------------------------------------------------------
GOLDEN_HEADER = """\
-- Golden snapshot of indb.plan.irls_scan.gram_query rendered for DuckDB ({what}).
-- Spec: poisson, log link, response claims, offset ln(exposure); numeric age (centre 40,
-- scale 10) and power (centre 6, scale 2); categorical region with levels East, North, West
-- and reference North. Stored pretty-printed by sqlglot; the test checks that this text
-- parses back to exactly the SQL indb sends. Regenerate with INDB_UPDATE_GOLDEN=1 and
-- review the diff.
"""


def _golden_context() -> tuple[PlanContext, Any]:
    spec = ModelSpec.build("claims_table", "claims", "poisson", offset="ln(exposure)")
    columns = [
        ("claims", "BIGINT"),
        ("age", "DOUBLE"),
        ("power", "INTEGER"),
        ("region", "VARCHAR"),
        ("exposure", "DOUBLE"),
    ]
    dialect = DuckDBDialect()
    inputs = resolve_inputs(spec, columns, dialect.type_kind, dialect.sqlglot_name)
    v = plan_values(inputs, True)
    values = (
        v[0],
        dataclasses.replace(v[1], center=40.0, scale=10.0),
        dataclasses.replace(v[2], center=6.0, scale=2.0),
    )
    region = Factor(
        column="region",
        alias="f0",
        levels=("East", "North", "West"),
        reference="North",
        counts=(30, 50, 20),
    )
    design = build_design(inputs, True, values, (region,), {})
    assert design.terms == ["intercept", "age", "power", "region=East", "region=West"]
    return PlanContext(spec, inputs, dialect), design


def _check_golden(name: str, what: str, sql: str) -> None:
    pretty = sqlglot.parse_one(sql, read="duckdb").sql("duckdb", pretty=True)
    path = GOLDEN / name
    if UPDATE_GOLDEN:
        path.parent.mkdir(exist_ok=True)
        path.write_text(GOLDEN_HEADER.format(what=what) + pretty + "\n", encoding="utf-8")
    text = path.read_text(encoding="utf-8")
    body = "\n".join(line for line in text.splitlines() if not line.startswith("-- ")).strip()
    assert pretty == body, f"{name} differs; rerun with INDB_UPDATE_GOLDEN=1 and review"
    # the reviewed file is exactly the SQL sent, not just something similar
    assert sqlglot.parse_one(body, read="duckdb").sql("duckdb") == sql


def test_golden_iteration_query() -> None:
    ctx, design = _golden_context()
    beta = np.array([-2.5, 0.125, -0.25, 0.5, 0.75])  # standardized, exactly representable
    sql = ctx.dialect.render(gram_query(ctx, design, beta, ybar=0.125))
    _check_golden("duckdb_gram_query.sql", "iteration query, fixed coefficients", sql)


def test_golden_start_query() -> None:
    ctx, design = _golden_context()
    sql = ctx.dialect.render(gram_query(ctx, design, None, ybar=0.125))
    _check_golden("duckdb_gram_start_query.sql", "first scan, beta=None, ybar 0.125", sql)


def test_golden_query_runs_on_duckdb(con: duckdb.DuckDBPyConnection) -> None:
    # The snapshot is real DuckDB SQL: it runs on an (empty) table of the declared types.
    con.execute(
        "CREATE TABLE claims_table (claims BIGINT, age DOUBLE, power INTEGER, region VARCHAR, "
        "exposure DOUBLE)"
    )
    ctx, design = _golden_context()
    beta = np.array([-2.5, 0.125, -0.25, 0.5, 0.75])
    for b in (beta, None):
        sql = ctx.dialect.render(gram_query(ctx, design, b, ybar=0.125))
        assert con.execute(sql).fetchall() == []  # grouped by region: no rows, no groups


# ---------------------------------------------------------------------------------------------
# Links: DuckDB evaluation of the SQL forms against closed forms
# ---------------------------------------------------------------------------------------------
def _eval_sql(con: duckdb.DuckDBPyConnection, grid: dict[str, np.ndarray], exprs: dict) -> dict:
    """Evaluate expressions over a grid table in DuckDB; returns numpy columns in grid order."""
    frame = pd.DataFrame({"i": np.arange(len(next(iter(grid.values())))), **grid})
    con.register("grid", frame)
    tree = S.select(
        [S.col("i"), *(S.alias(e, name) for name, e in exprs.items())],
        exp.Table(this=S.ident("grid")),
    )
    sql = DuckDBDialect().render(tree)
    out = con.execute(sql + ' ORDER BY "i"').fetchnumpy()
    con.unregister("grid")
    return {k: np.asarray(out[k], dtype=float) for k in exprs}


def _power(q: float):
    return {
        "inverse": lambda e: e ** (1.0 / q),
        "mu_eta": lambda e: (1.0 / q) * e ** (1.0 / q - 1.0),
        "link": lambda m: m**q,
    }


LINE = np.linspace(-8.0, 8.0, 161)
POS = np.concatenate([np.linspace(0.01, 1.0, 50), np.linspace(1.0, 40.0, 79)])
UNIT = np.concatenate(
    [np.logspace(-12, -1, 23), np.linspace(0.1, 0.9, 33), 1 - np.logspace(-1, -12, 23)]
)
# (link, eta grid, mu grid for link_sql, inverse, dmu/deta, link) - closed forms from numpy/scipy
LINKS: dict[str, tuple[Any, np.ndarray, np.ndarray, Any, Any, Any]] = {
    "identity": (make_link("identity"), LINE, LINE, lambda e: e, np.ones_like, lambda m: m),
    "log": (
        make_link("log"),
        np.linspace(-30.0, 30.0, 121),
        np.logspace(-12, 12, 49),
        np.exp,
        np.exp,
        np.log,
    ),
    "logit": (
        make_link("logit"),
        # relative accuracy of mu (1 - mu) needs 1 - mu >> eps: eta <= 5 (tails: see below)
        np.linspace(-30.0, 5.0, 141),
        UNIT,
        special.expit,
        lambda e: special.expit(e) * special.expit(-e),
        special.logit,
    ),
    "cloglog": (
        make_link("cloglog"),
        # 1 - exp(-exp(eta)) has relative error ~eps/mu: eta >= -5 (tails: see below)
        np.linspace(-5.0, 3.5, 86),
        # ln(-ln(1 - mu)) (start values only) loses relative precision for mu << 1: mu >= 1e-3
        UNIT[(UNIT > 1e-3) & (UNIT < 1 - 1e-9)],
        lambda e: -np.expm1(-np.exp(e)),
        lambda e: np.exp(e - np.exp(e)),
        lambda m: np.log(-np.log1p(-m)),
    ),
    "cauchit": (
        make_link("cauchit"),
        np.linspace(-10.0, 10.0, 81),
        UNIT[(UNIT > 1e-6) & (UNIT < 1 - 1e-6)],
        lambda e: 0.5 + np.arctan(e) / np.pi,
        lambda e: 1.0 / (np.pi * (1.0 + e * e)),
        lambda m: np.tan(np.pi * (m - 0.5)),
    ),
    "inverse": (
        make_link("inverse"),
        np.concatenate([-POS[::-1], POS]),
        POS,
        lambda e: 1.0 / e,
        lambda e: -1.0 / (e * e),
        lambda m: 1.0 / m,
    ),
    "inverse_squared": (
        make_link("inverse_squared"),
        POS,
        POS,
        lambda e: e**-0.5,
        lambda e: -0.5 * e**-1.5,
        lambda m: m**-2.0,
    ),
    "sqrt": (
        make_link("sqrt"),
        POS,
        POS,
        lambda e: e * e,
        lambda e: 2.0 * e,
        np.sqrt,
    ),
    "power(0.3)": (
        make_link("power", 0.3),
        POS,
        POS,
        _power(0.3)["inverse"],
        _power(0.3)["mu_eta"],
        _power(0.3)["link"],
    ),
}


@pytest.mark.parametrize("name", list(LINKS))
def test_link_sql_matches_closed_forms(con: duckdb.DuckDBPyConnection, name: str) -> None:
    link, eta, mu, inv, dmu, g = LINKS[name]
    e = S.col("eta")
    got = _eval_sql(
        con,
        {"eta": eta},
        {"mu": link.inverse_sql(e), "dmu": link.mu_eta_sql(e, link.inverse_sql(e))},
    )
    # numpy/scipy closed forms; DuckDB and numpy call the same libm functions, so agreement is
    # a few ulps (rtol 1e-13 leaves room for a different operation order)
    assert_allclose(got["mu"], inv(eta), rtol=1e-13, atol=1e-300)
    assert_allclose(got["dmu"], dmu(eta), rtol=1e-13, atol=1e-300)
    back = _eval_sql(con, {"mu": mu}, {"eta": link.link_sql(S.col("mu"))})
    assert_allclose(back["eta"], g(mu), rtol=1e-13, atol=1e-15)
    # the numpy forms used by the solver agree with the same closed forms
    assert_allclose(link.inverse(eta), inv(eta), rtol=1e-13, atol=1e-300)


def test_probit_sql(con: duckdb.DuckDBPyConnection) -> None:
    link = make_link("probit")
    eta = np.concatenate([np.linspace(-40.0, 40.0, 801), [-7.071, -7.0711, 7.0711, 0.0]])
    e = S.col("eta")
    got = _eval_sql(con, {"eta": eta}, {"mu": link.inverse_sql(e), "dmu": link.mu_eta_sql(e, e)})
    # The normal CDF is a rational approximation (Hart 1968, as published by West 2005):
    # absolute error below 1e-15 against scipy.special.ndtr over the whole line.
    assert np.max(np.abs(got["mu"] - special.ndtr(eta))) < 1e-15
    # near the centre it is accurate to a few ulps relative too (in the far lower tail the
    # relative error grows to ~1e-8, which the absolute bound above allows)
    centre = eta >= -3.0
    assert_allclose(got["mu"][centre], special.ndtr(eta[centre]), rtol=1e-13)
    # density: scipy.stats.norm.pdf; eta is clamped at +-26 (density ~6e-148) so that its
    # square in the working weight stays a normal double (PostgreSQL raises on underflow)
    inside = np.abs(eta) <= 26.0
    assert_allclose(got["dmu"][inside], stats.norm.pdf(eta[inside]), rtol=1e-13)
    assert np.all(got["dmu"][~inside] <= stats.norm.pdf(26.0) * (1 + 1e-12))
    # link_sql is only a start-value approximation: increasing, 0 at 1/2, and close to the
    # probit quantile scipy.special.ndtri in the middle of the range
    mu = np.linspace(0.1, 0.9, 81)
    approx = _eval_sql(con, {"mu": mu}, {"eta": link.link_sql(S.col("mu"))})["eta"]
    assert np.all(np.diff(approx) > 0) and abs(approx[40]) < 1e-15
    assert np.max(np.abs(approx - special.ndtri(mu))) < 0.1


def test_probit_start_approximation_on_wide_range(con: duckdb.DuckDBPyConnection) -> None:
    link = make_link("probit")
    mu = np.linspace(0.01, 0.99, 99)
    approx = _eval_sql(con, {"mu": mu}, {"eta": link.link_sql(S.col("mu"))})["eta"]
    assert np.max(np.abs(approx - special.ndtri(mu))) < 0.1


TAILS = {
    # link: (wide eta grid, mu closed form, dmu/deta closed form)
    "logit": (
        np.linspace(-40.0, 40.0, 401),
        special.expit,
        lambda e: special.expit(e) * special.expit(-e),
    ),
    "cloglog": (
        np.linspace(-40.0, 3.6, 437),
        lambda e: -np.expm1(-np.exp(e)),
        lambda e: np.exp(e - np.exp(e)),
    ),
    "cauchit": (
        np.linspace(-1e6, 1e6, 401),
        stats.cauchy.cdf,
        stats.cauchy.pdf,
    ),
}


@pytest.mark.parametrize("name", list(TAILS))
def test_unit_links_absolute_accuracy_in_tails(con: duckdb.DuckDBPyConnection, name: str) -> None:
    # Fitted probabilities: the binomial deviance and weights need absolute accuracy near 0
    # and 1 (closed forms from scipy.special / scipy.stats; 1e-15 as for the probit CDF).
    link = make_link(name)
    eta, inv, dmu = TAILS[name]
    e = S.col("eta")
    got = _eval_sql(
        con,
        {"eta": eta},
        {"mu": link.inverse_sql(e), "dmu": link.mu_eta_sql(e, link.inverse_sql(e))},
    )
    assert np.max(np.abs(got["mu"] - inv(eta))) < 1e-15
    assert np.max(np.abs(got["dmu"] - dmu(eta))) < 1e-15


def test_cloglog_inverse_relative_accuracy_lower_tail(con: duckdb.DuckDBPyConnection) -> None:
    # R's binomial(link = "cloglog") computes -expm1(-exp(eta)) (recalled from memory), which
    # keeps full relative precision of small fitted probabilities.
    eta = np.linspace(-30.0, -5.0, 51)
    got = _eval_sql(con, {"eta": eta}, {"mu": make_link("cloglog").inverse_sql(S.col("eta"))})["mu"]
    assert_allclose(got, -np.expm1(-np.exp(eta)), rtol=1e-12)


# ---------------------------------------------------------------------------------------------
# Families: unit deviance SQL against statsmodels
# ---------------------------------------------------------------------------------------------
def _family_points(rng: np.random.Generator, kind: str, n: int = 400) -> tuple[np.ndarray, ...]:
    mu = rng.uniform(0.05, 20.0, n)
    if kind == "real":
        y = rng.normal(0.0, 10.0, n)
        mu = rng.normal(0.0, 10.0, n)
    elif kind == "unit":
        mu = rng.uniform(0.001, 0.999, n)
        y = np.concatenate([[0.0, 1.0, 0.0, 1.0], rng.uniform(0.0, 1.0, n - 4)])
    elif kind == "count":
        y = rng.poisson(mu).astype(float)
    elif kind == "nonneg":  # Tweedie 1 < p < 2: exact zeros and positive values
        y = np.where(rng.uniform(size=n) < 0.3, 0.0, rng.gamma(2.0, mu / 2.0))
    else:  # positive
        y = rng.gamma(2.0, mu / 2.0)
    return y, mu


FAMILIES = {
    # name: (indb family, statsmodels family, kind of response)
    "gaussian": (make_family("gaussian"), sm.families.Gaussian(), "real"),
    "binomial": (make_family("binomial"), sm.families.Binomial(), "unit"),
    "poisson": (make_family("poisson"), sm.families.Poisson(), "count"),
    "gamma": (make_family("gamma"), sm.families.Gamma(), "positive"),
    "inverse_gaussian": (
        make_family("inverse_gaussian"),
        sm.families.InverseGaussian(),
        "positive",
    ),
    "tweedie-1.5": (
        make_family("tweedie", power=1.5),
        sm.families.Tweedie(var_power=1.5, eql=False),
        "nonneg",
    ),
    "tweedie-3": (
        make_family("tweedie", power=3.0),
        sm.families.Tweedie(var_power=3.0, eql=False),
        "positive",
    ),
    "negative_binomial-2.5": (
        make_family("negative_binomial", theta=2.5),
        sm.families.NegativeBinomial(alpha=1.0 / 2.5),
        "count",
    ),
}


@pytest.mark.parametrize("name", list(FAMILIES))
def test_unit_deviance_sql_matches_statsmodels(con: duckdb.DuckDBPyConnection, name: str) -> None:
    fam, sm_fam, kind = FAMILIES[name]
    rng = np.random.default_rng(20240601 + len(name))
    y, mu = _family_points(rng, kind)
    got = _eval_sql(con, {"y": y, "mu": mu}, {"d": fam.unit_deviance_sql(S.col("y"), S.col("mu"))})[
        "d"
    ]
    # statsmodels: resid_dev is sign(y - mu) * sqrt(unit deviance) (unit weights, scale 1);
    # deviance is their sum
    want = np.asarray(sm_fam.resid_dev(y, mu)) ** 2
    assert_allclose(got, want, rtol=1e-12, atol=1e-13)
    assert_allclose(got.sum(), sm_fam.deviance(y, mu), rtol=1e-12)
    # the variance function too (statsmodels family.variance)
    var = _eval_sql(con, {"mu": mu}, {"v": fam.variance_sql(S.col("mu"))})["v"]
    assert_allclose(var, sm_fam.variance(mu), rtol=1e-13)


def test_deviance_is_zero_at_the_response(con: duckdb.DuckDBPyConnection) -> None:
    # d(y, y) = 0 for every family (definition of the unit deviance; McCullagh & Nelder 2.3).
    rng = np.random.default_rng(7)
    for fam, _, kind in FAMILIES.values():
        y, _mu = _family_points(rng, kind, 50)
        y = np.clip(y, 1e-3, 1 - 1e-3) if kind == "unit" else y
        y = np.where(y == 0, 1.0, y) if kind not in ("real",) else y
        d = _eval_sql(con, {"y": y}, {"d": fam.unit_deviance_sql(S.col("y"), S.col("y"))})["d"]
        assert np.max(np.abs(d)) <= 1e-12 * max(1.0, float(np.max(np.abs(y)))), fam.name


def test_plan_has_stable_text() -> None:
    # Generated SQL uses stable aliases (no counters): two renders are identical.
    ctx, design = _golden_context()
    beta = np.array([-2.5, 0.125, -0.25, 0.5, 0.75])
    a = ctx.dialect.render(gram_query(ctx, design, beta, ybar=0.125))
    b = ctx.dialect.render(gram_query(ctx, design, beta.copy(), ybar=0.125))
    assert a == b
