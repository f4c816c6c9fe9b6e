"""The reviewed SQL in sql/ must be what the code generates and must run on DuckDB."""

from __future__ import annotations

from pathlib import Path

import duckdb

from indb.sqlfiles import registry_sql

SQL_DIR = Path(__file__).resolve().parents[1] / "sql"


def test_registry_ddl_file_matches_the_code() -> None:
    # regenerate with: python -m indb.sqlfiles sql/
    assert (SQL_DIR / "registry_duckdb.sql").read_text(encoding="utf-8") == registry_sql("duckdb")


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
    }
