"""Public entry points: wire spec -> plan -> engine -> solver -> result."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from indb.engine import connect
from indb.fitter import fit_spec
from indb.results import FitResult
from indb.spec import ModelSpec


def fit(
    source: str,
    response: str,
    family: str = "gaussian",
    link: str | None = None,
    *,
    db: Any = None,
    trials: str | None = None,
    offset: str | None = None,
    weight: str | None = None,
    frequency_weight: str | None = None,
    power: float | None = None,
    theta: float | None = None,
    link_power: float | None = None,
    intercept: bool = True,
    predictors: Sequence[str] | None = None,
    exclude: Sequence[str] = (),
    categorical: Sequence[str] = (),
    reference: Mapping[str, str] | None = None,
    interactions: Sequence[Sequence[str]] = (),
    splines: Mapping[str, int] | None = None,
    on_null: str = "exclude",
    tol: float = 1e-8,
    max_iter: int = 50,
    strict: bool = False,
    max_levels: int = 10_000,
    confidence: float = 0.95,
    progress: Any = None,
) -> FitResult:
    """Fit a generalized linear model on ``source`` inside the database.

    Each IRLS iteration is one generated aggregate query; only sums (X'WX, X'Wz, deviance)
    leave the database. See the README for the option semantics and conventions.

    Returns
    -------
    FitResult
        Coefficients on the original scale with standard errors, fit statistics and the
        iteration log.
    """
    spec = ModelSpec.build(
        source,
        response,
        family,
        link,
        trials=trials,
        offset=offset,
        weight=weight,
        frequency_weight=frequency_weight,
        power=power,
        theta=theta,
        link_power=link_power,
        intercept=intercept,
        predictors=predictors,
        exclude=exclude,
        categorical=categorical,
        reference=reference,
        interactions=interactions,
        splines=splines,
        on_null=on_null,
        tol=tol,
        max_iter=max_iter,
        strict=strict,
        max_levels=max_levels,
        confidence=confidence,
    )
    engine = connect(db)
    try:
        return fit_spec(spec, engine, progress)
    finally:
        if engine is not db:
            engine.close()
