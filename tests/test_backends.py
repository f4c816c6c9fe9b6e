"""The table of backends (indb/engines/backends.py) and every lookup that reads it.

``connect``, ``dialect_for``, the scoring dialects, the registry DDL files and the CLI's
``--dialect`` all answer from one table; these tests pin that they agree, that drivers load
only when their engine is asked for, and the messages for what no backend takes. Engines
here are real in-memory DuckDB databases; the PostgreSQL and Spark engines themselves are
exercised in tests/engines.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner

import indb
from indb.cli import main
from indb.engines import backends
from indb.engines.backends import (
    BACKENDS,
    DIALECT_NAMES,
    SCORING_DIALECTS,
    backend_for,
    connect,
    dialect_for,
)
from indb.engines.duckdb import DuckDBDialect, DuckDBEngine
from indb.errors import SpecError
from indb.registry import Registry
from indb.registry_append import AppendOnlyRegistry, open_registry
from indb.sqlfiles import REGISTRY_DIALECTS

ROOT = Path(__file__).resolve().parent.parent


def test_every_lookup_reads_the_one_table() -> None:
    names = tuple(b.name for b in BACKENDS)
    assert SCORING_DIALECTS == names == REGISTRY_DIALECTS
    assert set(names) < set(DIALECT_NAMES)
    for b in BACKENDS:
        # the row's name is its dialect's name, and sql/ keeps its registry DDL
        assert b.make_dialect().name == b.name
        assert (ROOT / "sql" / f"registry_{b.name}.sql").is_file()
        for alias in (b.name, *b.aliases, b.name.upper(), f"  {b.name} "):
            assert type(dialect_for(alias)) is type(b.make_dialect())


def test_unknown_dialect_names_the_supported_ones() -> None:
    with pytest.raises(SpecError) as info:
        dialect_for("oracle9")
    assert str(info.value) == (
        "dialect 'oracle9' is not supported for scoring SQL; supported: duckdb, postgres, spark"
    )


def test_drivers_load_only_when_their_engine_is_asked_for() -> None:
    # a fresh interpreter: the test session itself may have imported the drivers already
    script = textwrap.dedent(
        """
        import sys
        import indb
        from indb.engines.backends import dialect_for

        indb.connect().close()
        dialect_for("duckdb")
        loaded = lambda: sorted(m for m in ("psycopg", "pyspark", "indb.engines.postgres",
                                            "indb.engines.spark") if m in sys.modules)
        print(loaded())
        dialect_for("postgresql"), dialect_for("spark")
        print(loaded())
        """
    )
    run = subprocess.run(
        [sys.executable, "-c", script],
        capture_output=True,
        text=True,
        check=True,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        timeout=120,
    )
    before, after = run.stdout.strip().splitlines()
    assert before == "[]"
    # a dialect renders SQL without a connection: its module loads, its driver does not
    assert after == "['indb.engines.postgres', 'indb.engines.spark']"


def test_db_arguments_pick_their_backend() -> None:
    def name(db: object) -> str:
        return backend_for(db).name

    assert name(None) == "duckdb"
    assert name("warehouse.duckdb") == "duckdb"
    assert name(":memory:") == "duckdb"
    con = duckdb.connect()
    assert name(con) == "duckdb"
    assert name("postgresql://u@h/db") == name(" POSTGRES://u@h/db") == "postgres"
    assert name("spark:local[2]") == name("sc://host:15002") == "spark"
    with pytest.raises(SpecError) as info:
        backend_for("mysql://somewhere/db")
    assert str(info.value) == (
        "database URL 'mysql://somewhere/db' names an engine indb does not support; use "
        "postgresql://..., spark:local[N], sc://host:port, a DuckDB file path, or omit --db "
        "for an in-memory DuckDB database"
    )
    engine = connect(con)
    assert isinstance(engine, DuckDBEngine) and engine.con is con
    assert connect(engine) is engine
    engine.close()
    con.close()


def test_settings_of_another_backend_are_refused() -> None:
    with pytest.raises(SpecError, match=r"^view_kind='temporary' applies to Spark only$"):
        connect(None, view_kind="temporary")
    # checked before anything is opened: no server is needed to be refused
    with pytest.raises(SpecError) as info:
        connect("postgresql://u@127.0.0.1:1/none", threads=2, memory_limit="1GB")
    assert str(info.value) == (
        "engine settings ['memory_limit', 'threads'] apply to DuckDB only; configure "
        "PostgreSQL on the server or session instead"
    )
    # settings left at None are not settings given
    engine = connect(None, view_kind=None, threads=None)
    assert isinstance(engine, DuckDBEngine)
    engine.close()
    engine = connect(None, threads=1, compensated_sums=True)
    assert engine.execute("SELECT current_setting('threads')") == [(1,)]
    assert isinstance(engine.dialect, DuckDBDialect) and engine.dialect.compensated_sums
    engine.close()


def test_open_registry_picks_the_class_from_the_dialect() -> None:
    engine = indb.connect()
    try:
        reg = open_registry(engine, "regs")
        # DuckDB has UPDATE: the full registry (Spark's append-only one: tests/engines)
        assert type(reg) is Registry and not isinstance(reg, AppendOnlyRegistry)
        assert reg.schema == "regs" and reg.engine is engine
        assert type(indb.api.registry(engine)) is Registry
    finally:
        engine.close()


def test_cli_dialect_option_takes_every_table_spelling(tmp_path: Path) -> None:
    db = str(tmp_path / "m.duckdb")
    con = duckdb.connect(db)
    con.execute(
        "CREATE TABLE t AS SELECT x::DOUBLE AS x, (2 * x + 1)::DOUBLE AS y FROM range(5) r(x)"
    )
    con.close()
    indb.fit("t", "y", db=db, name="line")
    for spelling in DIALECT_NAMES:
        out = CliRunner().invoke(main, ["scoring-sql", "line", "--db", db, "--dialect", spelling])
        assert out.exit_code == 0, out.output
        assert out.output.startswith("CREATE")
    assert backends.backend_named("postgresql").name == "postgres"


def test_file_sources_in_each_engines_own_form() -> None:
    # issue 13: Spark's own spelling of a file source, format.`path`, is taken as written
    # (it was refused with a hint about CSV); CSV still needs reader options
    from indb.engines.postgres import PostgresDialect
    from indb.engines.spark import SparkDialect
    from indb.errors import UnsupportedError

    spark = SparkDialect()
    assert spark.render(spark.file_scan("parquet.`/data/p`")) == "`parquet`.`/data/p`"
    assert spark.render(spark.file_scan("ORC.`/data/o`")) == "`orc`.`/data/o`"
    with pytest.raises(UnsupportedError, match="reader options"):
        spark.file_scan("csv.`/data/c`")
    # PostgreSQL names the way out for scoring-sql, --source with a table
    with pytest.raises(UnsupportedError, match="--source TABLE"):
        PostgresDialect().file_scan("/data/p.parquet")
