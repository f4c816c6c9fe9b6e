"""The table of backends, and the lookups that read it: :func:`connect`, :func:`dialect_for`.

One row per engine indb runs on. Every question "which engine is this?" is answered here:
opening a ``db`` argument (:func:`connect`), naming a dialect for printed scoring SQL
(:func:`dialect_for`, :data:`SCORING_DIALECTS`, the CLI's ``--dialect``) and listing the
engines whose registry DDL is kept in ``sql/`` (:mod:`indb.sqlfiles`). Adding a backend is
one module in :mod:`indb.engines` and one row in :data:`BACKENDS`.

Rows name their module's classes by path and load them on first use, so a driver
(psycopg, pyspark) is imported only when its engine is asked for; this module imports no
backend module itself.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from indb.engines.base_dialect import Dialect
from indb.engines.base_engine import Engine
from indb.errors import SpecError


@dataclass(frozen=True)
class Backend:
    """One engine indb runs on.

    Attributes
    ----------
    name:
        The engine's name: ``--dialect`` value, ``sql/registry_<name>.sql``, ``Dialect.name``.
    label:
        How messages name it.
    dialect:
        ``module:Class`` of its dialect (constructible without arguments).
    engine:
        ``module:function`` that opens its engine from a ``db`` argument and settings.
    aliases:
        Other accepted spellings of ``name`` (lower case).
    url_prefixes:
        Lower-case prefixes of ``db`` strings it opens.
    driver_objects:
        (module prefix, class name or None) of open driver objects it accepts as ``db``
        (matched on the object's type, so the driver need not be imported to recognise it).
    settings:
        Keyword settings its engine factory takes.
    db_forms:
        How an error message describes the ``db`` values it takes.
    """

    name: str
    label: str
    dialect: str
    engine: str
    aliases: tuple[str, ...] = ()
    url_prefixes: tuple[str, ...] = ()
    driver_objects: tuple[tuple[str, str | None], ...] = ()
    settings: tuple[str, ...] = ()
    db_forms: tuple[str, ...] = ()

    def recognises(self, db: Any) -> bool:
        """Whether ``db`` (a URL string or an open driver object) belongs to this backend."""
        if isinstance(db, str):
            return db.strip().lower().startswith(self.url_prefixes) if self.url_prefixes else False
        kind = type(db)
        return any(
            kind.__module__.startswith(module) and (cls is None or kind.__name__ == cls)
            for module, cls in self.driver_objects
        )

    def make_dialect(self) -> Dialect:
        """A default-configured dialect (for rendering SQL without a connection)."""
        return _load(self.dialect)()

    def open(self, db: Any, **settings: Any) -> Engine:
        """Open this backend's engine on ``db``."""
        factory: Callable[..., Engine] = _load(self.engine)
        return factory(db, **settings)


#: every backend; the first is the default (``db`` None, a file path, an unrecognised object)
BACKENDS: tuple[Backend, ...] = (
    Backend(
        name="duckdb",
        label="DuckDB",
        dialect="indb.engines.duckdb:DuckDBDialect",
        engine="indb.engines.duckdb:open_engine",
        settings=("read_only", "memory_limit", "temp_directory", "threads", "compensated_sums"),
        db_forms=("a DuckDB file path", "omit --db for an in-memory DuckDB database"),
    ),
    Backend(
        name="postgres",
        label="PostgreSQL",
        dialect="indb.engines.postgres:PostgresDialect",
        engine="indb.engines.postgres:open_engine",
        aliases=("postgresql",),
        url_prefixes=("postgresql://", "postgres://"),
        driver_objects=(("psycopg", None),),
        db_forms=("postgresql://...",),
    ),
    Backend(
        name="spark",
        label="Spark",
        dialect="indb.engines.spark:SparkDialect",
        engine="indb.engines.spark:open_engine",
        url_prefixes=("spark:", "sc://"),
        driver_objects=(("pyspark", "SparkSession"),),
        settings=("view_kind",),
        db_forms=("spark:local[N]", "sc://host:port"),
    ),
)
DEFAULT_BACKEND = BACKENDS[0]

#: dialect names for printed scoring SQL, one per backend
SCORING_DIALECTS: tuple[str, ...] = tuple(b.name for b in BACKENDS)
#: every accepted dialect spelling (names and aliases)
DIALECT_NAMES: tuple[str, ...] = tuple(n for b in BACKENDS for n in (b.name, *b.aliases))


def backend_named(name: str) -> Backend:
    """The backend called ``name`` (or one of its aliases), any case."""
    key = name.strip().lower()
    for b in BACKENDS:
        if key == b.name or key in b.aliases:
            return b
    raise SpecError(
        f"dialect {name!r} is not supported for scoring SQL; supported: "
        f"{', '.join(SCORING_DIALECTS)}"
    )


def dialect_for(name: str) -> Dialect:
    """A dialect by name, for printing scoring SQL (engine modules load on demand)."""
    return backend_named(name).make_dialect()


def backend_for(db: Any) -> Backend:
    """The backend that opens ``db``: the one recognising its URL or driver object, else
    the default backend (DuckDB) for None, file paths and its own connections."""
    for b in BACKENDS:
        if b.recognises(db):
            return b
    if isinstance(db, str) and "://" in db:
        forms = [f for b in (*BACKENDS[1:], DEFAULT_BACKEND) for f in b.db_forms]
        raise SpecError(
            f"database URL {db!r} names an engine indb does not support; use "
            f"{', '.join(forms[:-1])}, or {forms[-1]}"
        )
    return DEFAULT_BACKEND


def connect(db: Any = None, *, read_only: bool = False, **settings: Any) -> Engine:
    """Open an engine from ``db``.

    ``db`` is None (in-memory DuckDB), a DuckDB file path or connection, an :class:`Engine`,
    a ``postgresql://`` / ``postgres://`` URL or open ``psycopg`` connection (PostgreSQL),
    ``spark:MASTER`` such as ``spark:local[2]`` (an in-process Spark driver), ``sc://host:port``
    (a Spark Connect server) or an open ``SparkSession``. ``settings`` (memory_limit,
    temp_directory, threads) apply to DuckDB only; ``view_kind`` (temporary | persistent
    scoring views, see :class:`indb.engines.spark.SparkEngine`) to Spark only. ``read_only``
    says that nothing will be written: a backend that takes it (DuckDB: a file is opened
    read-only) is told so; servers and Spark sessions are opened as usual (their permissions
    are the server's business).
    """
    if isinstance(db, Engine):
        return db
    backend = backend_for(db)
    _refuse_foreign_settings(backend, settings)
    own = {k: v for k, v in settings.items() if k in backend.settings or _owner(k) is None}
    if "read_only" in backend.settings:
        own["read_only"] = read_only
    return backend.open(db, **own)


def _owner(setting: str) -> Backend | None:
    return next((b for b in BACKENDS if setting in b.settings), None)


def _refuse_foreign_settings(backend: Backend, settings: dict[str, Any]) -> None:
    """Refuse settings given (not None) that belong to another backend.

    A choice of what indb writes (Spark's ``view_kind``) is named with its value; tuning
    settings of the embedded default engine are refused together, with where the chosen
    engine is tuned instead.
    """
    foreign = {
        k: v
        for k, v in settings.items()
        if v is not None and k not in backend.settings and _owner(k) is not None
    }
    for key, value in foreign.items():
        owner = _owner(key)
        if owner is not DEFAULT_BACKEND:
            raise SpecError(f"{key}={value!r} applies to {owner.label} only")
    if foreign:
        raise SpecError(
            f"engine settings {sorted(foreign)} apply to {DEFAULT_BACKEND.label} only; "
            f"configure {backend.label} on the server or session instead"
        )


def _load(path: str) -> Any:
    """The object ``module:name`` (the module imported on first use)."""
    module, _, name = path.partition(":")
    return getattr(importlib.import_module(module), name)
