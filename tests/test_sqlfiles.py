"""The reviewed SQL in sql/ must be what the code generates and must run on DuckDB."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest

from indb.sqlfiles import REGISTRY_DIALECTS, registry_sql

SQL_DIR = Path(__file__).resolve().parents[1] / "sql"


@pytest.mark.parametrize("dialect", REGISTRY_DIALECTS)
def test_registry_ddl_file_matches_the_code(dialect: str) -> None:
    # regenerate with: python -m indb.sqlfiles sql/ (run on PostgreSQL and Spark in
    # tests/engines/test_writeback.py)
    path = SQL_DIR / f"registry_{dialect}.sql"
    assert path.read_text(encoding="utf-8") == registry_sql(dialect)


def test_registry_ddl_runs_twice_on_duckdb() -> None:
    con = duckdb.connect()
    text = (SQL_DIR / "registry_duckdb.sql").read_text(encoding="utf-8")
    for _ in range(2):  # IF NOT EXISTS: re-running is harmless
        con.execute(text)
    tables = {
        r[0]
        for r in con.execute(
            "SELECT table_name FROM duckdb_tables() WHERE schema_name = 'indb_registry'"
        ).fetchall()
    }
    assert tables == {
        "model",
        "model_version",
        "version_term",
        "version_iteration",
        "registry_event",
        "version_assessment",
    }
