"""indb: generalized linear models fitted inside the database by generated aggregate SQL."""

from __future__ import annotations

from indb.api import fit
from indb.engine import DuckDBEngine, Engine, connect
from indb.errors import (
    AliasingWarning,
    ConvergenceWarning,
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

__version__ = "0.1.0"

__all__ = [
    "AliasingWarning",
    "Coefficient",
    "ConvergenceWarning",
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
    "fit",
    "__version__",
]
