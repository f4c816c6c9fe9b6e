"""Error and warning hierarchy of indb.

Only the CLI turns these into exit codes and one-line messages; library code raises them
with messages that name the option or column, the value seen and what is allowed.
"""

from __future__ import annotations


class IndbError(Exception):
    """Root of every error raised by indb."""


class SpecError(IndbError, ValueError):
    """The model declaration or the input data is not acceptable (fix the input, then rerun)."""


class NondeterministicSourceError(SpecError):
    """The source returned other rows in a later scan than in the first: it must give the
    same rows every time it is read (no unrepeatable sample, random(), or concurrent
    writes)."""


class EngineError(IndbError):
    """The database engine failed while running generated SQL.

    Attributes
    ----------
    sql:
        The statement that failed, as sent to the engine.
    """

    def __init__(self, message: str, sql: str | None = None) -> None:
        super().__init__(message)
        self.sql = sql


class UnsupportedError(IndbError):
    """The chosen engine cannot express something the model needs."""


class NonConvergenceError(IndbError):
    """IRLS did not converge and strict mode was requested."""


class RegistryError(IndbError):
    """The in-database model registry is missing, inconsistent or in conflict."""


class IndbWarning(UserWarning):
    """Root of indb's warnings."""


class ConvergenceWarning(IndbWarning):
    """IRLS stopped at the iteration cap before the deviance settled."""


class SeparationWarning(IndbWarning):
    """Fitted means at the edge of the family's range: binomial probabilities at 0 or 1, or
    IRLS stopped on the boundary (e.g. Poisson means going to 0). A sign of
    (quasi-)separation: some estimates drift to infinity."""


class AliasingWarning(IndbWarning):
    """Some design columns are linear combinations of others and were set aside."""


class DesignWarning(IndbWarning):
    """A column the default design took as a predictor looks like something else (an
    identifier: distinct whole numbers on every row)."""


class DeploymentWarning(IndbWarning):
    """A deployment setting was not applied (for example a held version cannot move the
    live scoring view to another schema)."""


class PrecisionWarning(IndbWarning):
    """A column's magnitude against its spread costs the fit significant digits that the
    internal centring and scaling could not win back (the column is named)."""


class ResidualDfWarning(IndbWarning):
    """The residual degrees of freedom are 0 or negative: no dispersion estimate, and no
    t statistics, p-values or intervals where the dispersion is estimated."""
