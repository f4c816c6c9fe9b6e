"""Engine fixtures: real DuckDB, PostgreSQL, in-process Spark and a Spark Connect cluster.

* PostgreSQL: the server at ``INDB_TEST_POSTGRES_URL`` (``.ci/services.sh start`` sets it in
  CI), else a throwaway cluster started here; either way the tests use a database of their own
  that is dropped at the end.
* Spark local: ONE in-process session (``local[2]``, 4 shuffle partitions) for every Spark test.
* Spark Connect: standalone master + worker + Connect server (separate JVMs, loopback), for the
  tests marked ``slow``.

An engine that cannot be started here skips its tests with the reason, except in CI
(``CI=true``), where every engine must run and a missing one fails.
"""

from __future__ import annotations

import logging
import os
import sys
import tempfile
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import duckdb
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # tests/: reference_cases

from engine_servers import (  # noqa: E402
    TEST_JVM_OPTIONS,
    ServerUnavailable,
    start_postgres,
    start_spark_cluster,
)
from engine_support import SPREADS, Loader, open_engine  # noqa: E402

IN_CI = os.environ.get("CI", "").strip().lower() == "true"


def unavailable(engine: str, reason: str) -> None:
    """Skip locally; in CI every engine must run, so fail."""
    msg = f"{engine} unavailable: {reason}"
    if IN_CI:
        pytest.fail(f"{msg} (CI=true: every engine must run)", pytrace=False)
    pytest.skip(msg)


def pytest_terminal_summary(terminalreporter: Any) -> None:
    if not SPREADS:
        return
    terminalreporter.write_sep("-", "indb: max relative difference from DuckDB, per engine")
    for engine, by_q in sorted(SPREADS.items()):
        parts = [f"{q} {v:.1e} ({case})" for q, (v, case) in sorted(by_q.items())]
        terminalreporter.write_line(f"{engine}: " + "; ".join(parts))


# -- PostgreSQL ---------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def pg_url() -> Iterator[str]:
    """URL of a database of our own on a real PostgreSQL server (dropped at the end)."""
    try:
        import psycopg
    except ImportError:
        unavailable("PostgreSQL", "psycopg is not installed (pip install -e '.[postgres]')")
    stop: Callable[[], None] | None = None
    server = os.environ.get("INDB_TEST_POSTGRES_URL")
    if not server:
        try:
            # not under pytest's temporary folder: that is private to root (0700), and the
            # server runs as the postgres user
            server, stop = start_postgres(Path(tempfile.mkdtemp(prefix="indb-pg-")))
        except (ServerUnavailable, OSError) as err:
            unavailable("PostgreSQL", str(err))
    dbname = f"indb_test_{uuid.uuid4().hex[:10]}"
    try:
        with psycopg.connect(server, autocommit=True) as admin:
            admin.execute(f'CREATE DATABASE "{dbname}"')
    except psycopg.Error as err:
        if stop is not None:
            stop()
        unavailable("PostgreSQL", f"cannot create a test database on {server}: {err}")
    url = _with_dbname(server, dbname)
    try:
        yield url
    finally:
        with psycopg.connect(server, autocommit=True) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{dbname}" WITH (FORCE)')
        if stop is not None:
            stop()


def _with_dbname(server: str, dbname: str) -> str:
    """The postgresql:// URL of database ``dbname`` on the server of ``server`` (URL or DSN)."""
    from urllib.parse import quote

    import psycopg

    info = psycopg.conninfo.conninfo_to_dict(server)
    user = quote(str(info.get("user", "postgres")), safe="")
    password = info.get("password")
    auth = f"{user}:{quote(str(password), safe='')}" if password else user
    host = quote(str(info.get("host", "127.0.0.1")), safe="")
    return f"postgresql://{auth}@{host}:{info.get('port', 5432)}/{dbname}"


@pytest.fixture
def pg_con(pg_url: str) -> Iterator[Any]:
    """A fresh autocommit connection to the test database (tables: create and drop your own)."""
    import psycopg

    con = psycopg.connect(pg_url, autocommit=True)
    try:
        yield con
    finally:
        con.close()


# -- Spark --------------------------------------------------------------------------------------


def _quiet_spark_logging() -> None:
    # pyspark logs every failed query as a JSON error record on stderr; the tests that
    # provoke errors assert on the raised EngineError instead
    for name in ("SQLQueryContextLogger", "DataFrameQueryContextLogger"):
        logging.getLogger(name).setLevel(logging.CRITICAL)


@pytest.fixture(scope="session")
def spark_local(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    """The one in-process Spark session of the test run (local[2])."""
    try:
        import pyspark  # noqa: F401
    except ImportError:
        unavailable("Spark", "pyspark is not installed (pip install -e '.[spark]')")
    from indb.engines.spark import SparkEngine
    from indb.errors import EngineError

    _quiet_spark_logging()
    conf = {
        "spark.sql.shuffle.partitions": "4",
        "spark.driver.host": "127.0.0.1",
        "spark.driver.bindAddress": "127.0.0.1",
        "spark.driver.extraJavaOptions": TEST_JVM_OPTIONS,
        # the default 1 GiB heap ran out late in a full run, planning the scoring views with
        # intervals (their guarded quadratic forms are long SQL); the machine has 24 GiB
        "spark.driver.memory": "3g",
        # catalog tables (the write-back tests' registries) go here, not into the cwd
        "spark.sql.warehouse.dir": str(tmp_path_factory.mktemp("spark-warehouse")),
    }
    try:
        engine = SparkEngine(master="local[2]", conf=conf)
    except EngineError as err:  # the JVM did not start: no Java, no memory, ...
        unavailable("Spark", f"local session did not start: {err}")
    engine.session.sparkContext.setLogLevel("ERROR")
    try:
        yield engine.session
    finally:
        engine.close()


@pytest.fixture(scope="session")
def spark_connect_url(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """sc:// URL of a Spark Connect server on a standalone master + worker (loopback)."""
    try:
        import pyspark.sql.connect  # noqa: F401  (needs grpcio etc.)
    except ImportError as err:
        unavailable("Spark Connect", f"pyspark's Connect client cannot load: {err}")
    _quiet_spark_logging()
    try:
        url, stop = start_spark_cluster(tmp_path_factory.mktemp("spark", numbered=True))
    except (ServerUnavailable, OSError) as err:
        unavailable("Spark Connect", str(err))
    try:
        yield url
    finally:
        stop()


@pytest.fixture
def duck() -> Iterator[duckdb.DuckDBPyConnection]:
    con = duckdb.connect()  # fresh in-memory database per test
    try:
        yield con
    finally:
        con.close()


@pytest.fixture(params=["duckdb", "postgres", "spark-local"])
def loader(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Loader]:
    """Each engine in turn (fresh DuckDB / a PostgreSQL connection / the shared Spark session)."""
    engine = open_engine(request, request.param)
    try:
        yield Loader(request.param, engine, tmp_path)
    finally:
        engine.close()
