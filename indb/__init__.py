"""indb: generalized linear models fitted inside the database by generated aggregate SQL."""

from __future__ import annotations

from indb import report as _report  # noqa: F401  (registers str(result), the text report)
from indb.api import deploy, fit, nested, scoring_sql
from indb.engines.backends import connect
from indb.engines.base_engine import Engine
from indb.engines.duckdb import DuckDBEngine
from indb.errors import (
    AliasingWarning,
    ConvergenceWarning,
    DesignWarning,
    EngineError,
    IndbError,
    NonConvergenceError,
    NondeterministicSourceError,
    PrecisionWarning,
    ResidualDfWarning,
    SeparationWarning,
    SpecError,
    UnsupportedError,
)
from indb.results import Coefficient, FitResult, IterationRecord
from indb.spec import ModelSpec
from indb.version import __version__

__all__ = [
    "AliasingWarning",
    "Coefficient",
    "ConvergenceWarning",
    "DesignWarning",
    "DuckDBEngine",
    "Engine",
    "EngineError",
    "FitResult",
    "IndbError",
    "IterationRecord",
    "ModelSpec",
    "NonConvergenceError",
    "NondeterministicSourceError",
    "PrecisionWarning",
    "ResidualDfWarning",
    "SeparationWarning",
    "SpecError",
    "UnsupportedError",
    "connect",
    "deploy",
    "fit",
    "nested",
    "scoring_sql",
    "__version__",
]
