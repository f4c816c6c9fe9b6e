"""A DuckDB connection of the caller's: open transactions, settings put back, input mistakes.

``indb.fit(db=con, ...)`` borrows the caller's connection. Inside the caller's open
transaction indb's own BEGIN failed, which aborted that transaction; the caller's later
COMMIT returned normally and discarded their tables. indb now refuses such a connection
before running anything, and every setting it changes on a borrowed connection (threads,
memory_limit, temp_directory, the progress bar, the optimizer rule it turns off) is put back
when the call ends, also when it fails. PostgreSQL's and Spark's versions of these tests are
in ``tests/engines/test_postgres.py`` and ``tests/engines/test_spark.py``.

Data: ``statsmodels.datasets.spector`` (32 students); oracle for the fits: statsmodels GLM.
The settings are compared with what DuckDB itself reports before the call.
"""

from __future__ import annotations

import re
import warnings
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import duckdb
import pytest
import robust_support as R
from click.testing import CliRunner

import indb
from indb.cli import main
from indb.engines.duckdb import DuckDBEngine, shown_size_range, size_shown_as
from indb.errors import SpecError

RTOL = 1e-6
PREDICTORS = ["GPA", "TUCE", "PSI"]
OPEN = r"the DuckDB connection passed as db= has an open transaction;.*Commit or roll back first"
FAILED = r"the DuckDB connection passed as db= has a failed transaction;.*Commit or roll back"


def settings(con: duckdb.DuckDBPyConnection) -> dict[str, str]:
    """Every setting of the connection as DuckDB shows it (not only those indb touches)."""
    return dict(con.execute("SELECT name, value FROM duckdb_settings()").fetchall())


def registry_schemas(con: duckdb.DuckDBPyConnection) -> int:
    return con.execute(
        "SELECT count(*) FROM duckdb_schemas() WHERE schema_name = 'indb_registry'"
    ).fetchall()[0][0]


@pytest.fixture
def con(tmp_path: Path) -> Iterator[duckdb.DuckDBPyConnection]:
    path = tmp_path / "caller.duckdb"
    R.write_db(path, {"spector": R.spector()})
    c = duckdb.connect(str(path))
    try:
        yield c
    finally:
        c.close()


def _reference() -> Any:
    frame = R.spector()
    return R.sm_fit(frame["GRADE"], R.design(frame, PREDICTORS), "binomial")


# -- the caller's open transaction ----------------------------------------------------------------


def test_named_fit_in_the_callers_transaction_is_refused_and_their_work_kept(
    con: duckdb.DuckDBPyConnection,
) -> None:
    """The reproduction: a named fit inside the caller's transaction used to abort it."""
    before = settings(con)
    con.begin()
    con.execute("CREATE TABLE my_work AS SELECT 42 AS answer")
    with pytest.raises(SpecError, match=OPEN):
        indb.fit(
            "spector", "GRADE", "binomial", db=con, name="grades", threads=1, memory_limit="1GB"
        )
    assert settings(con) == before  # refused before anything was set
    con.execute("INSERT INTO my_work VALUES (43)")  # the transaction is still alive
    con.commit()
    assert con.execute("SELECT answer FROM my_work ORDER BY 1").fetchall() == [(42,), (43,)]
    assert registry_schemas(con) == 0  # nothing of indb's was written
    # committed, the same call works on the same connection
    res = indb.fit("spector", "GRADE", "binomial", db=con, name="grades", tol=1e-12)
    assert res.deployment["version"] == 1
    R.assert_coefs(res, _reference(), rtol=RTOL, se_rtol=RTOL)
    assert settings(con) == before


def _entry_points(con: duckdb.DuckDBPyConnection) -> dict[str, Callable[[], Any]]:
    fitted = indb.fit("spector", "GRADE", "binomial", db=con, name="grades")
    return {
        "fit": lambda: indb.fit("spector", "GRADE", "binomial", db=con),
        "fit name=": lambda: indb.fit("spector", "GRADE", "binomial", db=con, name="g2"),
        "dry_run": lambda: indb.api.dry_run("spector", "GRADE", "binomial", db=con),
        "deploy": lambda: indb.api.deploy(fitted, "g3", db=con),
        "scoring_sql": lambda: indb.api.scoring_sql("grades", db=con),
        "registry": lambda: indb.api.registry(con),
        "connect": lambda: indb.connect(con),
    }


ENTRY_POINTS = ["fit", "fit name=", "dry_run", "deploy", "scoring_sql", "registry", "connect"]


@pytest.mark.parametrize("entry", ENTRY_POINTS)
def test_every_entry_point_refuses_an_open_transaction(
    con: duckdb.DuckDBPyConnection, entry: str
) -> None:
    call = _entry_points(con)[entry]
    before = settings(con)
    snapshot = R.dump(con)
    con.begin()
    con.execute("CREATE TABLE my_work AS SELECT 1 AS x")
    with pytest.raises(SpecError, match=OPEN):
        call()
    con.rollback()  # the caller decides: here, roll back
    assert R.dump(con) == snapshot
    assert settings(con) == before


def test_a_failed_transaction_is_refused_too(con: duckdb.DuckDBPyConnection) -> None:
    con.begin()
    with pytest.raises(duckdb.Error):
        con.execute("SELECT * FROM no_such_table")
    with pytest.raises(SpecError, match=FAILED):
        indb.fit("spector", "GRADE", "binomial", db=con, name="grades")
    con.rollback()
    assert registry_schemas(con) == 0


# -- settings put back ----------------------------------------------------------------------------

# the caller's own settings before the call: DuckDB's defaults, or values of their own
# (4GB shows as '3.7 GiB', which DuckDB cannot read back exactly: see size_shown_as)
PRESETS = {
    "defaults": [],
    "own values": [
        "SET memory_limit = '4GB'",
        "SET threads = 1",
        "SET disabled_optimizers = 'filter_pushdown'",
        "SET enable_progress_bar = false",
    ],
}


@pytest.mark.parametrize("preset", list(PRESETS))
def test_settings_are_put_back_after_a_fit(
    con: duckdb.DuckDBPyConnection, tmp_path: Path, preset: str
) -> None:
    for stmt in PRESETS[preset]:
        con.execute(stmt)
    before = settings(con)
    spill = tmp_path / "spill"
    res = indb.fit(
        "spector",
        "GRADE",
        "binomial",
        db=con,
        name="grades",
        tol=1e-12,
        threads=2,
        memory_limit="256MB",
        temp_directory=str(spill),
        compress="always",  # the folded route: a temporary table, dropped again
    )
    R.assert_coefs(res, _reference(), rtol=RTOL, se_rtol=RTOL)
    assert settings(con) == before
    temporary = "SELECT count(*) FROM duckdb_tables() WHERE temporary"
    assert con.execute(temporary).fetchall() == [(0,)]
    # repeated calls do not drift (writing DuckDB's rounded text back would lower the limit)
    for _ in range(3):
        indb.api.dry_run("spector", "GRADE", "binomial", db=con, memory_limit="100MB")
    assert settings(con) == before


def test_settings_are_put_back_when_the_call_fails(con: duckdb.DuckDBPyConnection) -> None:
    before = settings(con)
    with pytest.raises(SpecError, match="no_such_column"):
        indb.fit("spector", "no_such_column", "binomial", db=con, threads=1, memory_limit="1GB")
    assert settings(con) == before
    # threads is set before memory_limit: a memory limit DuckDB refuses puts threads back
    with pytest.raises(SpecError, match=r"memory_limit='lots' was refused by DuckDB"):
        indb.fit("spector", "GRADE", "binomial", db=con, threads=1, memory_limit="lots")
    assert settings(con) == before


def test_an_engine_made_on_the_callers_connection_restores_at_close(
    con: duckdb.DuckDBPyConnection,
) -> None:
    before = settings(con)
    engine = DuckDBEngine(con, threads=1, memory_limit="300MB")
    assert con.execute("SELECT current_setting('threads')").fetchall() == [(1,)]
    res = indb.fit("spector", "GRADE", "binomial", db=engine, tol=1e-12)
    R.assert_coefs(res, _reference(), rtol=RTOL, se_rtol=RTOL)
    engine.close()
    assert settings(con) == before
    engine.close()  # a second close changes nothing
    assert settings(con) == before


# (size as set, its bytes by DuckDB's units: "KB, MB, GB, TB for 1000^i units or KiB, MiB,
# GiB, TiB for 1024^i units", from DuckDB's own parser error message); None: not round
SIZES = [
    ("4GB", 4 * 10**9),
    ("4GiB", 4 * 2**30),
    ("8GiB", 8 * 2**30),
    ("500MB", 500 * 10**6),
    ("256MB", 256 * 10**6),
    ("1536MiB", 1536 * 2**20),
    ("2000000B", 2 * 10**6),
    ("123456789B", None),
    ("1234567891B", None),
]


@pytest.mark.parametrize(("size", "exact"), SIZES)
def test_size_written_back_shows_as_found(size: str, exact: int | None) -> None:
    """Oracle: DuckDB's own display of the memory limit (it has no exact read-out)."""
    con = duckdb.connect()
    try:

        def shown(value: str) -> str:
            con.execute(f"SET memory_limit = '{value}'")
            return con.execute("SELECT current_setting('memory_limit')").fetchall()[0][0]

        text = shown(size)
        span = shown_size_range(text)
        assert span is not None
        low, high = span
        # the span is exactly the byte counts DuckDB shows as this text
        assert shown(f"{low}B") == text and shown(f"{high}B") == text
        assert shown(f"{low - 1}B") != text and shown(f"{high + 1}B") != text
        back = size_shown_as(text)
        assert back is not None and low <= back <= high
        if exact is not None:  # a round limit comes back exactly
            assert back == exact
    finally:
        con.close()
    assert size_shown_as("90% of available disk space") is None


# -- input mistakes are SpecErrors (CLI exit 2, one line naming the option) -----------------------


@pytest.fixture
def db_file(tmp_path: Path) -> Path:
    path = tmp_path / "inputs.duckdb"
    R.write_db(path, {"spector": R.spector()})
    return path


def _cli(*args: str) -> Any:
    return CliRunner().invoke(main, list(args))


def _one_error_line(result: Any) -> str:
    lines = [ln for ln in result.output.splitlines() if ln.strip()]
    assert len(lines) == 1, result.output
    assert lines[0].startswith("indb: error: "), result.output
    return lines[0]


BAD_SETTINGS = [
    (["--memory-limit", "lots"], r"memory_limit='lots' was refused by DuckDB.*such as '4GB'"),
    (["--memory-limit", "12 parsecs"], r"memory_limit='12 parsecs' was refused by DuckDB"),
]


@pytest.mark.parametrize(("flags", "message"), BAD_SETTINGS)
def test_bad_memory_limit_exits_2(db_file: Path, flags: list[str], message: str) -> None:
    before = R.dump_file(db_file)
    result = _cli("fit", "--db", str(db_file), "--family", "binomial", "--response", "GRADE",
                  *flags, "spector")  # fmt: skip
    assert result.exit_code == 2, result.output
    assert re.search(message, _one_error_line(result))
    assert R.dump_file(db_file) == before


@pytest.mark.parametrize(
    ("value", "shown"), [("many", "'many'"), (0, "0"), (True, "True"), (2.5, "2.5")]
)
def test_threads_must_be_a_whole_number(db_file: Path, value: Any, shown: str) -> None:
    # a value of the wrong kind is refused by the option's declared kind (indb/options.py:
    # "must be a whole number, got ..."); a whole number below 1 by the range check
    with pytest.raises(SpecError, match=f"threads must be a whole number( >= 1;|,) got {shown}"):
        indb.fit("spector", "GRADE", "binomial", db=str(db_file), threads=value)


def test_threads_of_the_wrong_type_in_a_spec_file_exits_2(db_file: Path, tmp_path: Path) -> None:
    spec = tmp_path / "model.toml"
    spec.write_text(
        '[model]\nsource = "spector"\nresponse = "GRADE"\nfamily = "binomial"\n'
        '[deploy]\nname = "grades"\n'
        f'[engine]\ndb = "{db_file.name}"\nthreads = "many"\n'
    )
    before = R.dump_file(db_file)
    result = _cli("run", str(spec))
    assert result.exit_code == 2, result.output
    assert "threads" in _one_error_line(result)
    assert R.dump_file(db_file) == before


def test_memory_limit_must_be_text(db_file: Path) -> None:
    # refused by the option's declared kind (indb/options.py) before any connection
    with pytest.raises(SpecError, match=r"memory_limit must be (a size as )?text.*got 4"):
        indb.fit("spector", "GRADE", "binomial", db=str(db_file), memory_limit=4)


STATEMENTS = ["INSTALL x", "ATTACH '..'", "DETACH x", "PRAGMA version", "USE memory", "LOAD x"]


@pytest.mark.parametrize("text", STATEMENTS)
@pytest.mark.parametrize("option", ["offset", "weight"])
def test_a_statement_in_an_expression_exits_2(db_file: Path, text: str, option: str) -> None:
    before = R.dump_file(db_file)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # sqlglot logs "falling back to parsing as a Command"
        result = _cli("fit", "--db", str(db_file), "--family", "binomial", "--response",
                      "GRADE", f"--{option}", text, "spector")  # fmt: skip
    assert result.exit_code == 2, result.output
    line = _one_error_line(result)
    assert f"cannot parse {option} expression" in line and "not a per-row expression" in line
    assert R.dump_file(db_file) == before


# -- read-only opening next to this process's own connections -------------------------------------


def test_a_file_this_process_has_open_for_writing_is_shared(
    con: duckdb.DuckDBPyConnection,
) -> None:
    """A fit without write-back opens the file read-only; DuckDB allows one configuration
    per file and process, so while this process has it open for writing (``con``) that
    open database is shared instead, and the fit still works."""
    path = con.execute("SELECT path FROM duckdb_databases() WHERE database_name = 'caller'")
    path = path.fetchall()[0][0]
    res = indb.fit("spector", "GRADE", "binomial", db=path, tol=1e-12)
    R.assert_coefs(res, _reference(), rtol=RTOL, se_rtol=RTOL)
    result = CliRunner().invoke(main, ["models", "--db", path, "--json"])
    assert result.exit_code == 0, result.output
    con.execute("CREATE TABLE still_writable AS SELECT 1 AS x")  # con is unaffected
