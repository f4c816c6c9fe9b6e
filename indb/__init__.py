"""indb: generalized linear models fitted inside the database by generated aggregate SQL."""

from __future__ import annotations

from indb import report as _report  # noqa: F401  (registers str(result), the text report)
from indb.api import assess, deploy, explore, fit, nested, report_html, scoring_sql
from indb.assessment import AssessResult
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
from indb.exploration import Exploration
from indb.results import Coefficient, FitResult, IterationRecord
from indb.spec import ModelSpec
from indb.version import __version__

__all__ = [
    "AliasingWarning",
    "AssessResult",
    "Coefficient",
    "ConvergenceWarning",
    "DesignWarning",
    "DuckDBEngine",
    "Engine",
    "EngineError",
    "Exploration",
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
    "assess",
    "connect",
    "deploy",
    "explore",
    "fit",
    "nested",
    "report_html",
    "scoring_sql",
    "__version__",
]
