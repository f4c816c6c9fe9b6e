"""Stored SQL expressions carried from the dialect they were written in (issue 11, item 2).

``indb scoring-sql --dialect postgres|spark`` used to parse a DuckDB offset in the target
dialect: DuckDB's ``log(x)`` (base 10) became Spark's natural log, ``2 ^ 3`` stayed ``^``
(XOR in Spark), ``ln(age / 40)`` kept PostgreSQL's integer division, and ``age // 10`` raised
an uncaught ValueError. These tests pin, on DuckDB and without an engine:

* the DuckDB semantics the translation relies on (``//``, ``/``, ``log``, and IEEE-754 NaN
  and infinities from ln, sqrt, exp, pow and division), against Python's and numpy's
  arithmetic (IEEE-754);
* the CASE forms that give those IEEE-754 results on engines that raise or return NULL,
  evaluated on DuckDB over the special values, against numpy;
* the refusals (``UnsupportedError`` naming the expression) for what cannot be carried;
* the registry's reading of versions stored before the dialect was recorded.

The same translations run for real on PostgreSQL and Spark in
``tests/engines/test_scoring_engines.py``.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import duckdb
import numpy as np
import pytest
from click.testing import CliRunner
from scoring_cases import INF, SPECIAL, c_pow, ieee_cases, numpy_ref, pol_frame, same
from sqlglot import exp

import indb
from indb import sqlexpr as S
from indb.cli import main
from indb.engines.duckdb import DuckDBDialect
from indb.engines.postgres import PostgresDialect
from indb.engines.spark import SparkDialect
from indb.errors import UnsupportedError
from indb.portable import portable_expression


def duck_values(con: duckdb.DuckDBPyConnection, exprs: list[exp.Expression]) -> list[object]:
    d = DuckDBDialect()
    sql = "SELECT " + ", ".join(d.render(e) for e in exprs)
    return list(con.execute(sql).fetchone())


# -- DuckDB's own semantics (what the translation reads DuckDB expressions as) ---------------


def test_duckdb_semantics_the_translation_assumes() -> None:
    con = duckdb.connect()
    got = con.execute(
        "SELECT -7 // 2, 7 // -2, 7 // 2, 7.5 // 2, 7.5::DOUBLE // 2, 7 / 2, typeof(7 / 2), "
        "log(1000)"
    ).fetchone()
    # `//` truncates integers toward zero (Python's math.trunc), divides other numbers exactly
    assert got[:3] == (math.trunc(-7 / 2), math.trunc(7 / -2), math.trunc(7 / 2))
    assert got[3:6] == (7.5 / 2, 7.5 / 2, 7 / 2) and got[6] == "DOUBLE"
    assert got[7] == pytest.approx(math.log10(1000), rel=1e-15)  # one-argument log: base 10
    # ln, sqrt, exp, pow and `/` follow IEEE-754 (numpy's results) instead of raising
    cases = [
        ("ln(x)", np.log),
        ("sqrt(x)", np.sqrt),
        ("exp(x * 300)", lambda x: np.exp(x * 300)),
        ("1 / x", lambda x: np.divide(1.0, x)),
        ("x / 0.0", lambda x: np.divide(x, 0.0)),
        ("pow(x, 0.5)", lambda x: c_pow(x, np.float64(0.5))),
        ("pow(x, -1)", lambda x: c_pow(x, np.float64(-1.0))),
    ]
    for sql, fn in cases:
        for x in SPECIAL:
            if x is None:
                continue
            got = con.execute(f"SELECT {sql} FROM (SELECT ?::DOUBLE AS x)", [x]).fetchone()[0]
            same([got], [numpy_ref(fn, x)])


# -- the IEEE-754 forms for engines that raise or return NULL -------------------------------


@pytest.mark.parametrize("name", ["ln", "log10", "sqrt", "exp", "pow", "div"])
def test_ieee_nodes_on_duckdb_and_their_guarded_forms_match_numpy(name: str) -> None:
    """DuckDB renders the Ieee* nodes natively; PostgreSQL and Spark use the CASE forms of
    ``indb.sqlexpr``. DuckDB can run both, so the guards' logic is checked here against
    numpy (IEEE-754) on every special value: NaN, +/-inf, +/-0, negatives, NULL."""
    _, exprs, want = next(c for c in ieee_cases() if c[0] == name)
    con = duckdb.connect()
    same(duck_values(con, exprs), want)
    a = [e.this for e in exprs]
    b = [e.args.get("expression") for e in exprs]
    guarded = {
        "ln": lambda i: S.ieee_log_guarded(a[i], exp.Ln(this=a[i].copy())),
        "log10": lambda i: S.ieee_log_guarded(
            a[i], exp.Anonymous(this="LOG10", expressions=[a[i].copy()])
        ),
        "sqrt": lambda i: S.ieee_sqrt_guarded(a[i]),
        "exp": lambda i: S.ieee_exp_guarded(a[i]),
        "pow": lambda i: S.ieee_pow_guarded(a[i], b[i]),
        "div": lambda i: S.ieee_div_guarded(a[i], b[i]),
    }[name]
    same(duck_values(con, [guarded(i) for i in range(len(exprs))]), want)


def test_exp_thresholds_are_the_last_finite_and_first_nonzero_doubles() -> None:
    # Python's math.exp (the C library's, as PostgreSQL's) at and just past the thresholds
    assert math.isfinite(math.exp(S.EXP_FINITE_MAX))
    with pytest.raises(OverflowError):
        math.exp(float(np.nextafter(S.EXP_FINITE_MAX, INF)))
    assert math.exp(S.EXP_NONZERO_MIN) > 0.0
    assert math.exp(float(np.nextafter(S.EXP_NONZERO_MIN, -INF))) == 0.0


# -- what cannot be carried is refused, naming the expression --------------------------------

TYPES = {"age": "INTEGER", "exposure": "DOUBLE", "weight4": "FLOAT", "region": "VARCHAR"}


@pytest.mark.parametrize(
    ("text", "types", "message"),
    [
        ("floor(age / 10)", TYPES, "'FLOOR(age / 10)' is not among the operators"),
        ("CAST(age / 10 AS INT)", TYPES, "casts to INT"),
        ("ln(weight4)", TYPES, "column 'weight4' is single precision (FLOAT)"),
        ("age // 10", None, "its operands' types are not known"),
        ("exposure % 2", TYPES, "takes a remainder of operands that are not both known"),
        ("ln(exposure) + length(region || 'x')", TYPES, "the text 'x' is used other than"),
    ],
)
def test_untranslatable_expressions_are_refused(
    text: str, types: dict[str, str] | None, message: str
) -> None:
    for target in (PostgresDialect(), SparkDialect()):
        with pytest.raises(UnsupportedError) as caught:
            portable_expression(text, "offset", DuckDBDialect(), target, types)
        msg = str(caught.value)
        assert message in msg
        assert msg.startswith(
            f"offset expression {text!r} was written for duckdb and cannot be carried to "
            f"{target.name} with its meaning: "
        )
        assert msg.endswith("Print the scoring SQL for duckdb, or refit on " + target.name)


def test_on_its_own_engine_an_expression_is_kept_as_written() -> None:
    """No refusal without a change of dialect, and the engine's own arithmetic: DuckDB reads
    its own FLOOR, casts and `//`, and divides a FLOAT in single precision as in the fit."""
    con = duckdb.connect()
    con.execute("CREATE TABLE t AS SELECT 47 AS age, 7.5::DOUBLE AS x, 0.1::FLOAT AS f")
    types = {"age": "INTEGER", "x": "DOUBLE", "f": "FLOAT"}
    d = DuckDBDialect()
    texts = ("floor(age / 10)", "CAST(age / 10 AS INT)", "age // 10", "x // 2", "ln(f)", "f / 3")
    for text in texts:
        for known in (types, None):
            rendered = d.render(portable_expression(text, "offset", d, d, known))
            got = con.execute(f"SELECT {rendered}, typeof({rendered}) FROM t").fetchone()
            assert got == con.execute(f"SELECT {text}, typeof({text}) FROM t").fetchone(), text


# -- the registry: versions stored before the dialect was recorded ---------------------------


@pytest.fixture
def reg_db(tmp_path: Path) -> str:
    db = str(tmp_path / "r.duckdb")
    with duckdb.connect(db) as con:
        con.register("frame", pol_frame().head(1500))
        con.execute("CREATE TABLE pol AS SELECT id, age, region, exposure, claims FROM frame")
    return db


def strip_recorded_dialect(db: str, name: str) -> None:
    """Make the stored version look like one written before specs recorded their dialect
    and column types (as the registry of an earlier indb holds them)."""
    with duckdb.connect(db) as con:
        spec_json, result_json = con.execute(
            "SELECT spec_json, result_json FROM indb_registry.model_version WHERE model_name = ?",
            [name],
        ).fetchone()
        spec = json.loads(spec_json)
        result = json.loads(result_json)
        spec.pop("sql_dialect")
        result["spec"].pop("sql_dialect")
        result["design"].pop("column_types")
        con.execute(
            "UPDATE indb_registry.model_version SET spec_json = ?, result_json = ? "
            "WHERE model_name = ?",
            [json.dumps(spec, sort_keys=True), json.dumps(result), name],
        )


def fit_freq(db: str, offset: str, **kw: object) -> indb.FitResult:
    return indb.fit(
        "pol",
        "claims",
        "poisson",
        db=db,
        offset=offset,
        exclude=["id"],
        name="freq",
        **kw,
    )


def test_a_version_without_a_recorded_dialect_is_read_as_its_engines(reg_db: str) -> None:
    first = fit_freq(reg_db, "ln(exposure) + age // 10 / 10")
    assert first.spec["sql_dialect"] == "duckdb"
    assert first.design["column_types"]["age"] == "INTEGER"
    strip_recorded_dialect(reg_db, "freq")
    reg = indb.api.registry(reg_db)
    try:
        assert reg.load("freq").spec["sql_dialect"] == "duckdb"
    finally:
        reg.engine.close()
    # the same spec on the same data still adds no version (the stored spec is hashed again
    # with the registry engine's dialect filled in)
    again = fit_freq(reg_db, "ln(exposure) + age // 10 / 10")
    assert (again.deployment["version"], again.deployment["created"]) == (1, False)
    # `//` needs the column types: described from the scoring source, as DuckDB has it
    sql = indb.api.scoring_sql("freq", db=reg_db, dialect="postgres")
    assert "DIV(" in sql and '"age"' in sql
    with duckdb.connect(reg_db) as con:  # without the source, nothing says age is an integer
        con.execute("ALTER TABLE pol RENAME TO pol_gone")
    with pytest.raises(UnsupportedError, match="age // 10.*operands' types are not known"):
        indb.api.scoring_sql("freq", db=reg_db, dialect="spark", source="/data/pol.parquet")


def test_a_stored_query_source_is_not_reused_in_another_dialect(reg_db: str) -> None:
    fit_freq(reg_db, "ln(exposure)", score_source="SELECT * FROM pol WHERE age // 10 = 4")
    with pytest.raises(
        UnsupportedError, match="scoring source of model 'freq' is a query written for duckdb"
    ):
        indb.api.scoring_sql("freq", db=reg_db, dialect="postgres")
    sql = indb.api.scoring_sql("freq", db=reg_db, dialect="postgres", source="pol")
    assert sql.endswith('FROM "pol" AS "indb_src";')
    duck = indb.api.scoring_sql("freq", db=reg_db)  # its own dialect: the query as stored
    assert "// 10" in duck


def test_cli_refusal_is_one_line_and_exit_code_4(reg_db: str) -> None:
    fit_freq(reg_db, "ln(exposure) + floor(age / 10) / 10")
    out = CliRunner().invoke(main, ["scoring-sql", "freq", "--db", reg_db, "--dialect", "spark"])
    assert out.exit_code == 4, out.output
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("indb: error: offset expression")
    assert "'FLOOR(age / 10)' is not among the operators" in lines[0]
    ok = CliRunner().invoke(main, ["scoring-sql", "freq", "--db", reg_db])
    assert ok.exit_code == 0 and "FLOOR(" in ok.stdout  # DuckDB reads its own FLOOR
