"""The engine adapter interface: connect, run SQL text, describe columns, fetch small results.

Adapters know nothing about models. They translate driver errors into
:class:`~indb.errors.EngineError` (keeping the SQL that failed) and run write-back
statements in one transaction. Each backend module of :mod:`indb.engines` subclasses
:class:`Engine`; this module never imports them.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator, Sequence
from decimal import Decimal
from typing import Any

import numpy as np

from indb.engines.base_dialect import Dialect


class Engine:
    """Interface every engine adapter implements."""

    dialect: Dialect

    def execute(self, sql: str) -> list[tuple[Any, ...]]:
        raise NotImplementedError

    def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
        """Run a query and return its columns as numpy arrays (small results only)."""
        raise NotImplementedError

    def describe(self, sql: str) -> list[tuple[str, str]]:
        """(column name, type name) pairs of a query's result, without running it."""
        raise NotImplementedError

    @contextlib.contextmanager
    def transaction(self) -> Iterator[None]:
        raise NotImplementedError
        yield

    def close(self) -> None:
        pass

    #: seconds spent in the last execute/fetch (for iteration timing)
    last_seconds: float = 0.0


def rows_to_columns(names: Sequence[str], rows: Sequence[Sequence[Any]]) -> dict[str, np.ndarray]:
    """Column arrays from driver rows, typed like DuckDB's Arrow results.

    Integers become int64 (float64 with NaN when NULLs occur), floats and decimals float64
    with NaN for NULL, booleans bool, anything else an object array.
    """
    out: dict[str, np.ndarray] = {}
    for i, name in enumerate(names):
        values = [r[i] for r in rows]
        kinds = {type(v) for v in values if v is not None}
        has_null = any(v is None for v in values)
        if kinds and kinds <= {bool} and not has_null:
            out[name] = np.array(values, dtype=bool)
        elif kinds and kinds <= {int} and not has_null:
            out[name] = np.array(values, dtype=np.int64)
        elif kinds <= {int, float, Decimal} and not (kinds & {bool}):
            out[name] = np.array(
                [math.nan if v is None else float(v) for v in values], dtype=np.float64
            )
        else:
            out[name] = np.array(values, dtype=object)
    return out
