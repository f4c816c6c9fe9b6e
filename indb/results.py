"""Frozen result objects returned by a fit.

A :class:`FitResult` carries everything a report, the registry or a scoring view needs:
coefficients on the original scale of the data, their covariance, goodness-of-fit
statistics and the iteration log. It holds no connection and does no I/O.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np


@dataclass(frozen=True)
class Coefficient:
    """One row of the coefficient table.

    ``term`` is the unique display name (``intercept``, ``age``, ``region=North``,
    ``age & region=North``); ``columns`` and ``levels`` say where it comes from.
    ``aliased`` coefficients are linear combinations of earlier ones: their estimate and
    standard error are NaN.
    """

    term: str
    columns: tuple[str, ...]
    levels: tuple[str | None, ...]
    estimate: float
    std_error: float
    statistic: float
    p_value: float
    ci_low: float
    ci_high: float
    aliased: bool = False


@dataclass(frozen=True)
class IterationRecord:
    """What one IRLS iteration (one aggregate scan) produced."""

    iteration: int
    deviance: float
    relative_change: float
    step_halvings: int
    seconds: float
    phase: str = "fit"  # fit | theta | null (intercept-only refit for the null deviance)


@dataclass(frozen=True)
class FitResult:
    """The outcome of fitting one model.

    Attributes are named in the trade's terms. ``statistic`` in the coefficient table is a
    z statistic when the dispersion is fixed and a t statistic (``df_resid`` degrees of
    freedom) when it is estimated; ``test`` says which.
    """

    family: str
    link: str
    response: str
    source: str
    coefficients: tuple[Coefficient, ...]
    covariance: np.ndarray
    deviance: float
    null_deviance: float
    pearson_chi2: float
    dispersion: float
    dispersion_estimated: bool
    log_likelihood: float
    aic: float
    bic: float
    df_model: int
    df_resid: float
    n_used: int
    n_excluded: int
    n_weighted: float
    iterations: int
    converged: bool
    iteration_log: tuple[IterationRecord, ...]
    test: str
    path: str
    seconds: float
    family_params: dict[str, float] = field(default_factory=dict)
    excluded_by_column: dict[str, int] = field(default_factory=dict)
    aliased_terms: tuple[str, ...] = ()
    condition_number: float = math.nan
    warnings: tuple[str, ...] = ()
    confidence: float = 0.95
    spec: dict[str, Any] = field(default_factory=dict)
    design: dict[str, Any] = field(default_factory=dict)

    # -- convenience views ---------------------------------------------------------------
    @property
    def terms(self) -> list[str]:
        """Term names in design order."""
        return [c.term for c in self.coefficients]

    @property
    def params(self) -> np.ndarray:
        """Estimates in design order (NaN for aliased terms)."""
        return np.array([c.estimate for c in self.coefficients])

    @property
    def std_errors(self) -> np.ndarray:
        """Standard errors in design order (NaN for aliased terms)."""
        return np.array([c.std_error for c in self.coefficients])

    def coef(self, term: str) -> Coefficient:
        """Return the coefficient row named ``term`` (raises ``KeyError`` if absent)."""
        for c in self.coefficients:
            if c.term == term:
                return c
        raise KeyError(f"no term named {term!r}; terms are {self.terms}")

    @property
    def seconds_per_iteration(self) -> float:
        """Mean wall time of one IRLS scan."""
        if not self.iteration_log:
            return math.nan
        return sum(r.seconds for r in self.iteration_log) / len(self.iteration_log)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dictionary (non-finite numbers become ``None``)."""
        out: dict[str, Any] = {
            "family": self.family,
            "link": self.link,
            "response": self.response,
            "source": self.source,
            "coefficients": [_clean(asdict(c)) for c in self.coefficients],
            "covariance": [[_num(v) for v in row] for row in self.covariance.tolist()],
            "deviance": _num(self.deviance),
            "null_deviance": _num(self.null_deviance),
            "pearson_chi2": _num(self.pearson_chi2),
            "dispersion": _num(self.dispersion),
            "dispersion_estimated": self.dispersion_estimated,
            "log_likelihood": _num(self.log_likelihood),
            "aic": _num(self.aic),
            "bic": _num(self.bic),
            "df_model": self.df_model,
            "df_resid": _num(self.df_resid),
            "n_used": self.n_used,
            "n_excluded": self.n_excluded,
            "excluded_by_column": dict(self.excluded_by_column),
            "n_weighted": _num(self.n_weighted),
            "iterations": self.iterations,
            "converged": self.converged,
            "seconds": _num(self.seconds),
            "seconds_per_iteration": _num(self.seconds_per_iteration),
            "iteration_log": [_clean(asdict(r)) for r in self.iteration_log],
            "test": self.test,
            "path": self.path,
            "family_params": {k: _num(v) for k, v in self.family_params.items()},
            "aliased_terms": list(self.aliased_terms),
            "condition_number": _num(self.condition_number),
            "warnings": list(self.warnings),
            "confidence": self.confidence,
            "spec": self.spec,
            "design": self.design,
        }
        return out


def _num(v: Any) -> Any:
    if isinstance(v, float | np.floating):
        v = float(v)
        return v if math.isfinite(v) else None
    if isinstance(v, np.integer):
        return int(v)
    return v


def _clean(d: dict[str, Any]) -> dict[str, Any]:
    return {k: (list(v) if isinstance(v, tuple) else _num(v)) for k, v in d.items()}
