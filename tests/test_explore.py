"""``indb explore`` / ``indb.explore``: one-way figures of a response before a model.

Oracles (test-only, outside the project): pandas ``groupby`` sums and ``numpy.quantile`` (its
default 'linear' method) through ``tests/explore_oracle.py``, whose grouped sums are checked
against plain numpy totals; statsmodels' Poisson GLM for the meaning of the rate. Data: the
invented demo book (``indb.demo_data``) with NULLs put in, and ``statsmodels.datasets.fair``
(shipped inside the statsmodels wheel).
"""

from __future__ import annotations

import inspect
import json
import math
from collections.abc import Iterator
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from click.testing import CliRunner, Result
from explore_oracle import assert_matches, band_cuts, one_way
from numpy.testing import assert_allclose

import indb
from indb import options as O
from indb.cli import main
from indb.demo_data import policies_table
from indb.engines.duckdb import DuckDBEngine
from indb.errors import EngineError, SpecError

ROWS = 6_000


@pytest.fixture
def con() -> Iterator[duckdb.DuckDBPyConnection]:
    c = duckdb.connect()  # fresh in-memory database per test
    try:
        yield c
    finally:
        c.close()


def policies_with_nulls() -> pd.DataFrame:
    """The invented demo book with NULLs put into explored columns (a level of their own),
    the response and the exposure (rows set aside)."""
    df = policies_table(ROWS, seed=7).to_pandas()
    i = df["policy_id"].to_numpy()
    df["region"] = df["region"].astype(object).where(i % 37 != 0, None)
    df["driver_age"] = df["driver_age"].astype(float).where(i % 41 != 0)
    df["exposure"] = df["exposure"].where(i % 53 != 0)
    df["claim_count"] = df["claim_count"].astype(float).where(i % 59 != 0)
    return df


def load(con: duckdb.DuckDBPyConnection, frame: pd.DataFrame, name: str = "policies") -> str:
    con.register("frame", frame)  # pandas NaN and None load as NULL
    con.execute(f'CREATE TABLE "{name}" AS FROM frame')
    con.unregister("frame")
    return name


# -- figures against pandas --------------------------------------------------------------------


def test_levels_and_bands_match_pandas_groupby(con: duckdb.DuckDBPyConnection) -> None:
    df = policies_with_nulls()
    load(con, df)
    by = ["region", "vehicle_group", "driver_age", "density", "vehicle_power"]
    found = indb.explore(
        "policies", "claim_count", offset="ln(exposure)", by=by, db=con, max_shown=50
    )
    # oracle: pandas groupby / numpy.quantile (explore_oracle.py) on the same rows
    want = one_way(
        df,
        "claim_count",
        categorical=["region", "vehicle_group"],
        numeric=["driver_age", "density", "vehicle_power"],
        offset=np.log(df["exposure"].to_numpy()),
    )
    assert_matches(found, want)
    assert [c.name for c in found.columns] == by  # in the order asked for
    region = found.column("region")
    assert region.levels[-1].missing and region.levels[-1].rows == want.columns["region"][None][0]
    # vehicle_power has ties at the deciles: fewer, distinct cuts
    assert len(found.column("vehicle_power").cuts) < 9
    assert found.excluded == {"response": 101, "offset": 113}  # rows i % 59 == 0, i % 53 == 0


def test_band_edges_are_numpy_linear_quantiles(con: duckdb.DuckDBPyConnection) -> None:
    # skewed values with a heavy tail and repeated values; cuts at k/bands
    rng = np.random.default_rng(11)
    x = np.round(rng.lognormal(0.0, 1.5, 2_001), 2)
    df = pd.DataFrame({"y": rng.poisson(2.0, x.size).astype(float), "x": x})
    load(con, df, "t")
    for bands in (2, 4, 7, 10, 40):
        found = indb.explore("t", "y", bands=bands, db=con)
        # numpy.quantile, method='linear' (numpy's default, Hyndman & Fan type 7) = DuckDB's
        # quantile_cont; distinct values only
        want = np.unique(np.quantile(x, [k / bands for k in range(1, bands)], method="linear"))
        assert_allclose(found.column("x").cuts, want, rtol=1e-15, atol=0)
        assert found.column("x").low == x.min() and found.column("x").high == x.max()
        assert_matches(found, one_way(df, "y", numeric=["x"], bands=bands))


def test_weight_and_offset(con: duckdb.DuckDBPyConnection) -> None:
    df = policies_with_nulls()
    df["w"] = 1.0 + (df["policy_id"] % 3)
    df.loc[df["policy_id"] % 67 == 0, "w"] = np.nan
    load(con, df)
    off = np.log(df["exposure"].to_numpy())
    w = df["w"].to_numpy()
    common = {"categorical": ["region"], "numeric": ["bonus_malus"]}
    # weight and offset: exposure = w exp(offset), actual = w y
    found = indb.explore(
        "policies", "claim_count", offset="ln(exposure)", weight="w", by=["region", "bonus_malus"],
        db=con,
    )  # fmt: skip
    want = one_way(df, "claim_count", offset=off, weight=w, **common)
    assert_matches(found, want)
    assert found.exposure_basis == "weight x exp(offset)"
    # weight alone: the exposure is the weight
    found = indb.explore("policies", "claim_cost", weight="w", by=["region", "bonus_malus"], db=con)
    assert_matches(found, one_way(df, "claim_cost", weight=w, **common))
    assert found.exposure_basis == "weight"
    # neither: the rate is the mean response
    found = indb.explore("policies", "claim_cost", by=["region"], db=con)
    want = one_way(df, "claim_cost", categorical=["region"])
    assert_matches(found, want)
    assert_allclose(found.total.rate, df["claim_cost"].mean(), rtol=1e-12)  # pandas mean


def test_rate_is_the_one_way_poisson_fit(con: duckdb.DuckDBPyConnection) -> None:
    # The observed rate of a level is the rate a log-link Poisson model with one parameter per
    # level (and the offset) fits: statsmodels GLM (test-only oracle), its IRLS answer checked
    # by a second solver (Newton) to 1e-10 first.
    df = policies_table(ROWS, seed=3).to_pandas()
    load(con, df)
    found = indb.explore("policies", "claim_count", offset="ln(exposure)", by=["region"], db=con)
    dummies = pd.get_dummies(df["region"], dtype=float)
    glm = sm.GLM(
        df["claim_count"].astype(float),
        dummies,
        family=sm.families.Poisson(),
        offset=np.log(df["exposure"]),
    )
    irls = glm.fit(tol=1e-13)
    newton = glm.fit(method="newton", tol=1e-13, maxiter=200, disp=0)
    assert_allclose(irls.params, newton.params, rtol=1e-10)
    rates = np.exp(irls.params)
    for lv in found.column("region").levels:
        assert_allclose(lv.rate, rates[lv.level], rtol=1e-9)


def test_statsmodels_fair_dataset(con: duckdb.DuckDBPyConnection) -> None:
    # statsmodels.datasets.fair: 1974 Redbook survey on extramarital affairs (6366 rows);
    # affairs by occupation code (categorical) and years married (numeric bands)
    d = sm.datasets.fair.load_pandas().data
    df = pd.DataFrame(
        {
            "affairs": d["affairs"],
            "occupation": d["occupation"].astype("int64"),
            "yrs_married": d["yrs_married"],
            "age": d["age"],
        }
    )
    load(con, df, "fair")
    found = indb.explore("fair", "affairs", categorical=["occupation"], bands=5, db=con)
    want = one_way(
        df,
        "affairs",
        categorical=["occupation"],
        numeric=["yrs_married", "age"],
        bands=5,
        level_text=lambda v: str(int(v)),
    )
    assert_matches(found, want)
    assert [c.name for c in found.columns] == ["occupation", "yrs_married", "age"]


# -- NULL, NaN, caps, types ---------------------------------------------------------------------


def test_nulls_nan_and_infinities(con: duckdb.DuckDBPyConnection) -> None:
    # NULL in an explored column is a level; NaN and +/-inf in a numeric one a band of their
    # own; NULL response or weight sets the row aside, counted per input
    con.execute(
        """CREATE TABLE t AS SELECT * FROM (VALUES
        (1.0, 1.0, 'a', 1.0), (2.0, 1.0, 'a', 2.0), (3.0, 2.0, NULL, 3.0),
        (4.0, 1.0, 'b', 'NaN'::DOUBLE), (5.0, 1.0, 'b', 'inf'::DOUBLE), (6.0, 1.0, 'b', NULL),
        (NULL, 1.0, 'b', 4.0), (7.0, NULL, 'a', 5.0), (NULL, NULL, NULL, NULL),
        (8.0, 0.0, 'c', '-inf'::DOUBLE)) AS v(y, w, k, x)"""
    )
    found = indb.explore("t", "y", weight="w", bands=2, db=con)
    assert (found.rows_read, found.rows_used) == (10, 7)
    assert found.excluded == {"response": 2, "weight": 2}
    # by hand: used rows y*w: a: 1, 2 | NULL: 6 | b: 4, 5, 6 | c: 0 (weight 0)
    k = {lv.level: (lv.rows, lv.exposure, lv.actual) for lv in found.column("k").levels}
    assert k == {"a": (2, 2.0, 3.0), None: (1, 2.0, 6.0), "b": (3, 3.0, 15.0), "c": (1, 0.0, 0.0)}
    assert math.isnan(found.column("k").levels[2].rate)  # level c: no exposure, no rate
    x = found.column("x")
    # finite x of used rows: 1, 2, 3 -> median 2 (numpy.quantile, 'linear')
    assert x.cuts == tuple(band_cuts(np.array([1.0, 2.0, 3.0]), 2)) == (2.0,)
    bands = {lv.band: (lv.level, lv.rows, lv.actual) for lv in x.levels}
    assert bands == {
        1: ("[1, 2]", 2, 3.0),
        2: ("(2, 3]", 1, 6.0),
        0: ("NaN or infinite", 3, 9.0),
        None: (None, 1, 6.0),
    }
    assert [lv.band for lv in x.levels] == [1, 2, 0, None]  # bands, then NaN/inf, then NULL


def test_levels_beyond_the_cap_are_summed(con: duckdb.DuckDBPyConnection) -> None:
    df = policies_with_nulls()
    df["postcode"] = ("P" + (df["policy_id"] % 230).astype(str)).astype(object)
    df.loc[df["policy_id"] % 31 == 0, "postcode"] = None
    load(con, df)
    found = indb.explore(
        "policies", "claim_count", offset="ln(exposure)", by=["postcode"], max_shown=7, db=con
    )
    col = found.column("postcode")
    assert len([lv for lv in col.levels if not lv.missing]) == 7 and col.levels[-1].missing
    assert col.other_levels == 230 - 7 and col.level_count == 231
    exposures = [lv.exposure for lv in col.levels[:-1]]
    assert exposures == sorted(exposures, reverse=True)
    want = one_way(
        df, "claim_count", categorical=["postcode"], offset=np.log(df["exposure"].to_numpy())
    )
    assert_matches(found, want)  # the 7 with the most exposure; the other row sums the rest


def test_default_columns_are_the_fits(con: duckdb.DuckDBPyConnection) -> None:
    # every column but the response and those the offset and weight read, less exclude;
    # categorical= turns a numeric column into levels
    df = policies_with_nulls()
    load(con, df)
    found = indb.explore(
        "policies",
        "claim_count",
        offset="ln(exposure)",
        exclude=["policy_id", "claim_cost"],
        categorical=["vehicle_power"],
        db=con,
    )
    names = [
        c for c in df.columns if c not in ("claim_count", "exposure", "policy_id", "claim_cost")
    ]
    assert [c.name for c in found.columns] == names
    kinds = {c.name: c.kind for c in found.columns}
    assert kinds["vehicle_power"] == "categorical" and kinds["density"] == "numeric"
    assert kinds["region"] == "categorical"


def test_boolean_response_reads_as_0_1(con: duckdb.DuckDBPyConnection) -> None:
    df = policies_with_nulls()
    df["lapsed_flag"] = df["lapsed"].astype(bool)
    load(con, df)
    found = indb.explore("policies", "lapsed_flag", by=["fuel"], db=con)
    want = one_way(df.assign(lapsed_flag=df["lapsed"].astype(float)), "lapsed_flag",
                   categorical=["fuel"])  # fmt: skip
    assert_matches(found, want)


def test_quotes_and_unicode_in_names_and_levels(con: duckdb.DuckDBPyConnection) -> None:
    df = pd.DataFrame(
        {
            "nombre d'été": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
            'ville "x"': ["Zürich", "it's", "Zürich", 'a "b"', "back\\slash", "it's"],
            "größe": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
        }
    )
    load(con, df, "t")
    found = indb.explore("t", "nombre d'été", bands=3, db=con)
    assert_matches(
        found, one_way(df, "nombre d'été", categorical=['ville "x"'], numeric=["größe"], bands=3)
    )


def test_three_scans_and_nothing_written(con: duckdb.DuckDBPyConnection) -> None:
    # the documented cost: a profile scan, the order statistics of the numeric columns and one
    # GROUPING SETS scan (describing runs nothing); without a numeric column, two scans
    load(con, policies_with_nulls())
    engine = DuckDBEngine(con)
    sent: list[str] = []
    fetch = engine.fetch_columns

    def counted(sql: str) -> dict[str, np.ndarray]:
        sent.append(sql)
        return fetch(sql)

    engine.fetch_columns = counted  # type: ignore[method-assign]
    tables = con.execute("SELECT count(*) FROM duckdb_tables()").fetchone()
    found = indb.explore("policies", "claim_count", offset="ln(exposure)", db=engine)
    assert len(sent) == found.scans == 3
    assert "GROUPING SETS" in sent[2] and "GROUPING SETS" not in sent[0]
    assert "OVER" in sent[1] and "QUANTILE" not in " ".join(sent).upper()
    sent.clear()
    found = indb.explore("policies", "claim_count", by=["region"], db=engine)
    assert len(sent) == found.scans == 2
    assert con.execute("SELECT count(*) FROM duckdb_tables()").fetchone() == tables


def test_signature_is_the_declaration() -> None:
    # indb.explore's parameters are EXPLORE_OPTIONS: names, order, defaults
    params = inspect.signature(indb.explore).parameters
    assert list(params) == [o.name for o in O.EXPLORE_OPTIONS]
    for o in O.EXPLORE_OPTIONS:
        default = inspect.Parameter.empty if o.required else o.default
        assert params[o.name].default == default, o.name


# -- bad input ---------------------------------------------------------------------------------


BAD = [
    (
        {"response": "claim_cout"},
        "response column 'claim_cout' is not in the source (did you mean 'claim_count'?); "
        "columns are 'policy_id',",
    ),
    (
        {"response": "region"},
        "response column 'region' has type VARCHAR; it must be numeric (or BOOLEAN for "
        "binomial): cast it in the source query",
    ),
    (
        {"by": ["regoin"]},
        "explored column 'regoin' is not in the source (did you mean 'region'?); columns are",
    ),
    ({"by": ["exposure"], "offset": "ln(exposure)"}, "column 'exposure' is used by the response"),
    ({"offset": "ln(expo)"}, "offset expression 'ln(expo)' uses column 'expo' is not in the"),
    ({"bands": 1}, "bands must be a whole number from 2 to 1,000; got 1"),
    ({"max_shown": 0}, "max_shown must be a whole number of at least 1; got 0"),
    ({"bands": "ten"}, "bands must be a whole number, got 'ten'"),
    ({"weight": "-exposure"}, "weight expression '-exposure' is negative in {used} of {used} rows"),
    ({"offset": "1000 + exposure"}, "offset expression '1000 + exposure' reaches 1001"),
    ({"weight": "exposure * 0"}, "the {used} rows used have no exposure in all"),
    ({"response": "claim_cost", "weight": "exposure / 0"}, "weight expression"),
    ({"exclude": [c for c in policies_table(1).column_names if c != "claim_count"]},
     "nothing to explore"),
]  # fmt: skip


@pytest.mark.parametrize(("kwargs", "message"), BAD)
def test_bad_input_is_one_specific_error(
    con: duckdb.DuckDBPyConnection, kwargs: dict[str, Any], message: str
) -> None:
    df = policies_with_nulls()
    load(con, df)
    call = {"response": "claim_count", **kwargs}
    with pytest.raises(SpecError) as err:
        indb.explore("policies", call.pop("response"), db=con, **call)
    used = int((df["claim_count"].notna() & df["exposure"].notna()).sum())  # pandas count
    assert message.replace("{used}", f"{used:,}") in str(err.value), str(err.value)


def test_no_rows_and_all_null_rows(con: duckdb.DuckDBPyConnection) -> None:
    con.execute("CREATE TABLE empty (y DOUBLE, k VARCHAR)")
    with pytest.raises(SpecError, match="the source 'main.empty' has no rows"):
        indb.explore("empty", "y", db=con)
    con.execute("CREATE TABLE nulls AS SELECT NULL::DOUBLE AS y, 'a' AS k FROM range(3)")
    with pytest.raises(SpecError, match=r"no rows left: every one of the 3 rows has a NULL"):
        indb.explore("nulls", "y", db=con)
    con.execute("CREATE TABLE nan AS SELECT 'NaN'::DOUBLE AS y, 'a' AS k FROM range(3)")
    with pytest.raises(SpecError, match=r"response column 'y' is NaN or infinite in 3 of 3 rows"):
        indb.explore("nan", "y", db=con)


# -- the command line ---------------------------------------------------------------------------


def _run(*args: str) -> Result:
    return CliRunner().invoke(main, list(args))


@pytest.fixture
def db_file(tmp_path) -> str:
    path = tmp_path / "book.duckdb"
    c = duckdb.connect(str(path))
    try:
        load(c, policies_with_nulls())
    finally:
        c.close()
    return str(path)


def test_cli_json_is_the_api_result(db_file: str) -> None:
    args = ["--response", "claim_count", "--offset", "ln(exposure)", "--by", "region"]
    args += ["--by", "driver_age", "--bands", "5", "--max-shown", "3"]
    out = _run("explore", "policies", "--db", db_file, *args, "--json")
    assert out.exit_code == 0, out.stderr
    got = json.loads(out.stdout)
    want = indb.explore(
        "policies", "claim_count", offset="ln(exposure)", by=["region", "driver_age"], bands=5,
        max_shown=3, db=db_file,
    ).to_dict()  # fmt: skip
    got.pop("seconds"), want.pop("seconds")
    # the same document; sums may differ in the last bits (the engine adds in parallel)
    assert _rounded(got) == _rounded(json.loads(json.dumps(want)))
    region = got["columns"][0]
    assert region["other"]["levels"] == 3 and region["levels"][-1]["level"] is None
    assert got["scans"] == 3 and got["exposure_basis"] == "exp(offset)"


def _rounded(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _rounded(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_rounded(v) for v in value]
    return float(f"{value:.12g}") if isinstance(value, float) else value


def test_cli_text(db_file: str) -> None:
    out = _run(
        "explore", "policies", "--db", db_file, "--response", "claim_count",
        "--offset", "ln(exposure)", "--by", "region", "--by", "driver_age", "--max-shown", "3",
    )  # fmt: skip
    assert out.exit_code == 0, out.stderr
    text = out.stdout
    df = policies_with_nulls()
    null_y, null_off = int(df["claim_count"].isna().sum()), int(df["exposure"].isna().sum())
    used = int((df["claim_count"].notna() & df["exposure"].notna()).sum())  # pandas counts
    assert f"{len(df):,} rows read, {used:,} used; {len(df) - used:,} set aside" in text
    assert f"({null_y:,} with NULL response, {null_off:,} with NULL offset)" in text
    assert "region  categorical, 7 levels, the 3 with the most exposure shown" in text
    assert "(missing)" in text and "3 other levels" in text
    assert "driver_age  numeric 18 to 90, 10 bands (quantile cuts at k/10)" in text
    lines = text.splitlines()
    head = lines.index("  level      rows  exposure  actual    rate    rel")
    assert lines[head + 1].startswith("  [18, ")


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (["--response", "claim_cout"], "(did you mean 'claim_count'?)"),
        (["--response", "region"], "response column 'region' has type VARCHAR"),
        (["--response", "claim_count", "--by", "regoin"], "explored column 'regoin'"),
        (["--response", "claim_count", "--bands", "1"], "--bands"),
        (["--by", "region"], "Missing option '--response'"),
    ],
)
def test_cli_bad_input_exit_2_one_line(db_file: str, args: list[str], needle: str) -> None:
    for json_flag in ([], ["--json"]):
        out = _run("explore", "policies", "--db", db_file, *args, *json_flag)
        assert out.exit_code == 2, (out.exit_code, out.stderr)
        errors = [x for x in out.stderr.splitlines() if x.startswith("indb: error:")]
        assert len(errors) == 1 and needle in errors[0], out.stderr
        assert "Traceback" not in out.stderr
        if json_flag:
            assert json.loads(out.stdout) == {
                "error": errors[0].removeprefix("indb: error: "),
                "exit_code": 2,
            }


def test_cli_missing_database_file(tmp_path) -> None:
    out = _run("explore", "t", "--db", str(tmp_path / "nope.duckdb"), "--response", "y")
    assert out.exit_code == 2 and "no such database file" in out.stderr


# -- hostile names and expressions ---------------------------------------------------------------

PAYLOADS = [
    "'; DROP TABLE t; --",
    '" OR 1=1 --',
    "x\n; DROP TABLE t",
    "1); DROP TABLE t; --",
    "$$; DROP TABLE t; $$",
]


def test_payloads_stay_names_levels_or_refused_expressions(con: duckdb.DuckDBPyConnection) -> None:
    # a payload as a level is data (shown as written), as a --by name a missing column, as an
    # offset or weight expression a parse error or a refused statement: never run
    levels = [*PAYLOADS, "plain"]
    df = pd.DataFrame(
        {"y": np.arange(12, dtype=float), "k": [levels[i % len(levels)] for i in range(12)]}
    )
    load(con, df, "t")
    found = indb.explore("t", "y", db=con)
    assert_matches(found, one_way(df, "y", categorical=["k"]))
    assert {lv.level for lv in found.column("k").levels} == set(levels)
    for payload in PAYLOADS:
        with pytest.raises(SpecError):
            indb.explore("t", "y", by=[payload], db=con)
        for option in ("offset", "weight"):
            # '$$...$$' parses as a text literal, which the engine then fails to cast to a
            # number (EngineError, as in a fit): refused either way, nothing else runs
            with pytest.raises((SpecError, EngineError)):
                indb.explore("t", "y", db=con, **{option: payload})
    assert con.execute("SELECT count(*) FROM t").fetchone() == (12,)
    assert con.execute("SELECT count(*) FROM duckdb_tables()").fetchone() == (1,)
