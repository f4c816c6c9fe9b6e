"""Helpers shared by the engine tests: loading frames into each engine, spread records."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

#: observed max relative differences from DuckDB, collected by the cross-engine tests and
#: printed in the terminal summary: {engine: {quantity: (value, case)}}
SPREADS: dict[str, dict[str, tuple[float, str]]] = {}


def record_spread(engine: str, quantity: str, value: float, case: str) -> None:
    current = SPREADS.setdefault(engine, {}).get(quantity)
    if current is None or value > current[0]:
        SPREADS[engine][quantity] = (value, case)


def open_engine(request: Any, name: str) -> Any:
    """A fresh engine by test name: a new in-memory DuckDB, a PostgreSQL connection to the
    session's server (fixture ``pg_url``) or the shared local Spark session (``spark_local``)."""
    if name == "duckdb":
        import duckdb

        from indb.engines.duckdb import DuckDBEngine

        return DuckDBEngine(duckdb.connect())
    if name == "postgres":
        from indb.engines.postgres import PostgresEngine

        return PostgresEngine(request.getfixturevalue("pg_url"))
    from indb.engines.spark import SparkEngine

    return SparkEngine(request.getfixturevalue("spark_local"))


# -- loading a pandas frame into each engine ------------------------------------------------


def _pg_type(s: pd.Series) -> str:
    if pd.api.types.is_bool_dtype(s):
        return "boolean"
    if pd.api.types.is_integer_dtype(s):
        return "bigint"
    if pd.api.types.is_float_dtype(s):
        return "double precision"
    return "text"


def _py(v: Any) -> Any:
    if v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v)):
        return None
    return v.item() if isinstance(v, np.generic) else v


def pg_load(con: Any, name: str, frame: pd.DataFrame) -> None:
    """CREATE TABLE name with the frame's columns (quoted names) and COPY the rows in."""

    def q(ident: str) -> str:
        return '"' + ident.replace('"', '""') + '"'

    cols = ", ".join(f"{q(c)} {_pg_type(frame[c])}" for c in frame.columns)
    con.execute(f"DROP TABLE IF EXISTS {q(name)}")
    con.execute(f"CREATE TABLE {q(name)} ({cols})")
    with (
        con.cursor() as cur,
        cur.copy(f"COPY {q(name)} ({', '.join(q(c) for c in frame.columns)}) FROM STDIN") as copy,
    ):
        for row in frame.itertuples(index=False, name=None):
            copy.write_row([_py(v) for v in row])


def write_parquet(frame: pd.DataFrame, path: Path) -> Path:
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path)
    return path


def spark_view(session: Any, name: str, parquet: Path) -> None:
    assert "'" not in str(parquet) and "`" not in name
    session.sql(
        f"CREATE OR REPLACE TEMPORARY VIEW `{name}` USING parquet OPTIONS (path '{parquet}')"
    ).collect()


class Loader:
    """An indb engine plus a way to put a pandas frame into it as a named source."""

    def __init__(self, name: str, engine: Any, tmp: Path) -> None:
        self.name, self.engine, self.tmp = name, engine, tmp

    def load(self, table: str, frame: pd.DataFrame) -> str:
        """Load ``frame`` as ``table`` (a table, or a Spark view over Parquet); return its name."""
        if self.name == "duckdb":
            self.engine.con.register("indb_frame", frame)
            self.engine.con.execute(f'CREATE OR REPLACE TABLE "{table}" AS FROM indb_frame')
            self.engine.con.unregister("indb_frame")
        elif self.name == "postgres":
            pg_load(self.engine.con, table, frame)
        else:
            spark_view(self.engine.session, table, write_parquet(frame, self.tmp / f"{table}.pq"))
        return table
