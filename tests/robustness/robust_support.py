"""Shared helpers of the robustness suite: data, an independent design builder, the
statsmodels oracle and a full dump of a DuckDB database for before/after comparisons.

Datasets ship inside PyPI packages and are named where they are loaded:
``statsmodels.datasets.spector`` (Spector & Mazzeo, 32 students), ``statsmodels.datasets.
randhie`` (RAND Health Insurance Experiment, 20,190 rows) and ``sklearn.datasets.
load_diabetes`` (442 patients, raw features).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import statsmodels.api as sm
import statsmodels.datasets as smd
from numpy.testing import assert_allclose
from sklearn.datasets import load_diabetes

import indb

# statsmodels IRLS stopped on the coefficients at a tight tolerance, so that comparisons are
# limited by the tolerances of each test and not by the oracle's stopping rule.
SM_FIT = {"tol_criterion": "params", "atol": 1e-14, "rtol": 1e-13, "maxiter": 2000}
# the registry's schema and tables as the README documents them (checked by name, not read
# from indb, so a renamed or extra table shows up as a difference)
DEFAULT_REGISTRY = "indb_registry"
REGISTRY_TABLES = (
    "model",
    "model_version",
    "version_term",
    "version_iteration",
    "registry_event",
    "version_assessment",
)
FAMILIES = {
    "gaussian": sm.families.Gaussian,
    "poisson": sm.families.Poisson,
    "binomial": sm.families.Binomial,
    "gamma": sm.families.Gamma,
}


# -- data ---------------------------------------------------------------------------------------
def spector() -> pd.DataFrame:
    """statsmodels.datasets.spector: GRADE (0/1), GPA, TUCE, PSI; 32 rows."""
    return smd.spector.load_pandas().data[["GRADE", "GPA", "TUCE", "PSI"]].reset_index(drop=True)


def randhie() -> pd.DataFrame:
    """statsmodels.datasets.randhie: mdvis (visit counts) and 9 covariates; 20,190 rows."""
    return smd.randhie.load_pandas().data.reset_index(drop=True)


def diabetes() -> pd.DataFrame:
    """sklearn.datasets.load_diabetes(scaled=False): target and ten raw features; 442 rows."""
    return load_diabetes(as_frame=True, scaled=False).frame.reset_index(drop=True)


def quote_ident(name: str) -> str:
    """A DuckDB quoted identifier (test-side only: the SQL these tests write themselves)."""
    return '"' + name.replace('"', '""') + '"'


def load(con: duckdb.DuckDBPyConnection, name: str, frame: pd.DataFrame) -> None:
    """Copy ``frame`` into a table ``name`` (any characters; quoted)."""
    con.register("frame_to_load", frame)
    try:
        con.execute(f"CREATE OR REPLACE TABLE {quote_ident(name)} AS SELECT * FROM frame_to_load")
    finally:
        con.unregister("frame_to_load")


def write_db(path: str | Path, tables: Mapping[str, pd.DataFrame]) -> None:
    with duckdb.connect(str(path)) as con:
        for name, frame in tables.items():
            load(con, name, frame)


# -- an independent design (the API contract's term rules, computed with pandas) ---------------
def default_reference(values: pd.Series) -> str:
    """Contract: the most frequent level, ties broken by the smallest level in string order."""
    counts = values.astype(str).value_counts()
    top = counts.max()
    return min(lv for lv, k in counts.items() if k == top)


def design(
    frame: pd.DataFrame,
    predictors: Sequence[str],
    *,
    categorical: Iterable[str] = (),
    reference: Mapping[str, str] | None = None,
    intercept: bool = True,
) -> pd.DataFrame:
    """Treatment-coded design whose column names are indb term names: intercept, then each
    predictor in the frame's column order; a text column (or one listed in ``categorical``)
    gives one indicator per non-reference level in ascending string order."""
    reference = dict(reference or {})
    categorical = set(categorical)
    cols: dict[str, np.ndarray] = {}
    if intercept:
        cols["intercept"] = np.ones(len(frame))
    for column in [c for c in frame.columns if c in predictors]:
        values = frame[column]
        is_text = not pd.api.types.is_numeric_dtype(values) or pd.api.types.is_bool_dtype(values)
        if column in categorical or is_text:
            text = values.map(lambda v: str(v).lower() if isinstance(v, bool) else str(v))
            ref = reference.get(column, default_reference(text))
            for level in sorted(set(text)):
                if level != ref:
                    cols[f"{column}={level}"] = (text == level).to_numpy(dtype=float)
        else:
            cols[column] = values.to_numpy(dtype=float)
    return pd.DataFrame(cols, index=frame.index)


def sm_fit(
    y: Any,
    X: pd.DataFrame,
    family: str,
    link: Any = None,
    **kwargs: Any,
) -> Any:
    """statsmodels GLM (test-only oracle) at a tight tolerance; warnings silenced."""
    fam = FAMILIES[family](link) if link is not None else FAMILIES[family]()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = sm.GLM(np.asarray(y, dtype=float), X, family=fam, **kwargs).fit(**SM_FIT)
    return res


def assert_coefs(
    res: indb.FitResult,
    ref: Any,
    *,
    rtol: float,
    se_rtol: float | None = None,
    terms: Sequence[str] | None = None,
    atol_in_se: float = 1e-6,
    atol_floor: Mapping[str, float] | None = None,
) -> None:
    """Estimates (and optionally standard errors) of ``res`` against a statsmodels fit whose
    exog columns carry indb term names. A coefficient near zero cannot meet a relative
    tolerance: ``atol_in_se`` of its standard error is statistically invisible (common
    practice); ``atol_floor`` adds a per-term absolute floor (for exact fits, whose
    standard errors are themselves ~0)."""
    names = list(ref.params.index) if terms is None else list(terms)
    floor = dict(atol_floor or {})
    for term in names:
        c = res.coef(term)
        se = float(ref.bse[term])
        atol = max(atol_in_se * se if math.isfinite(se) else 0.0, floor.get(term, 0.0))
        assert_allclose(c.estimate, ref.params[term], rtol=rtol, atol=atol, err_msg=term)
        if se_rtol is not None:
            assert_allclose(c.std_error, se, rtol=se_rtol, err_msg=term)


# -- database dumps ------------------------------------------------------------------------------
def _sortable(row: tuple[Any, ...]) -> tuple[Any, ...]:
    return tuple((v is None, repr(type(v)), repr(v)) for v in row)


BIG_TABLE_ROWS = 5000


def dump(con: duckdb.DuckDBPyConnection) -> dict[str, Any]:
    """Every user object of the database as comparable Python values: schemas, tables (with
    all rows, sorted; a table above ``BIG_TABLE_ROWS`` rows by its row count and the sum of
    DuckDB's row hashes, which is order-free), views (with their SQL), macros and other
    non-internal functions, sequences and indexes."""
    out: dict[str, Any] = {}
    out["schemas"] = sorted(
        r[0]
        for r in con.execute(
            "SELECT schema_name FROM duckdb_schemas() WHERE NOT internal AND database_name = "
            "current_database()"
        ).fetchall()
    )
    tables = con.execute(
        "SELECT schema_name, table_name FROM duckdb_tables() WHERE database_name = "
        "current_database() AND NOT temporary ORDER BY ALL"
    ).fetchall()
    out["tables"] = {}
    for schema, table in tables:
        rel = f"{quote_ident(schema)}.{quote_ident(table)}"
        cols = con.execute(f"DESCRIBE {rel}").fetchall()
        n, digest = con.execute(f"SELECT count(*), sum(hash(t)) FROM {rel} AS t").fetchone()
        rows = con.execute(f"SELECT * FROM {rel}").fetchall() if n <= BIG_TABLE_ROWS else None
        out["tables"][(schema, table)] = {
            "columns": [(c[0], c[1]) for c in cols],
            "rows": sorted(rows, key=_sortable) if rows is not None else None,
            "count": n,
            "hash": digest,
        }
    out["views"] = sorted(
        con.execute(
            "SELECT schema_name, view_name, sql FROM duckdb_views() WHERE NOT internal AND "
            "database_name = current_database()"
        ).fetchall()
    )
    out["functions"] = sorted(
        (tuple(str(v) for v in r))
        for r in con.execute(
            "SELECT schema_name, function_name, function_type, parameters, macro_definition "
            "FROM duckdb_functions() WHERE NOT internal AND database_name = current_database()"
        ).fetchall()
    )
    out["sequences"] = sorted(
        con.execute(
            "SELECT schema_name, sequence_name FROM duckdb_sequences() WHERE NOT temporary"
        ).fetchall()
    )
    out["indexes"] = sorted(
        con.execute("SELECT schema_name, index_name, sql FROM duckdb_indexes()").fetchall()
    )
    return out


def dump_file(path: str | Path, read_only: bool = True) -> dict[str, Any]:
    """:func:`dump` of a database file (read-only by default, so the dump cannot change it;
    after a crash, open it for writing as the next job would, to replay the log)."""
    with duckdb.connect(str(path), read_only=read_only) as con:
        return dump(con)


def object_names(snap: Mapping[str, Any]) -> dict[str, set[tuple[str, str]]]:
    """(schema, name) of the tables, views and functions of a dump."""
    return {
        "tables": set(snap["tables"]),
        "views": {(s, v) for s, v, _ in snap["views"]},
        "functions": {(f[0], f[1]) for f in snap["functions"]},
    }
