"""Public entry points: wire spec -> plan -> engine -> solver -> result -> write-back."""

from __future__ import annotations

import dataclasses
import os
import warnings
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

from indb import options as O
from indb import writeback as W
from indb.assessment import AssessResult
from indb.comparison import NestedTest
from indb.engines.backends import connect
from indb.engines.base_engine import Engine
from indb.errors import ConvergenceWarning, SpecError
from indb.exploration import Exploration, explore_source
from indb.fitter import fit_spec, plan_spec
from indb.prefit import scoring_inputs
from indb.registry import DEFAULT_SCHEMA, Registry, SaveOutcome
from indb.registry_append import open_registry
from indb.results import FitResult
from indb.spec import ModelSpec

if TYPE_CHECKING:
    from indb.report_run import ReportFile

# The options of fit() and their kinds, as the checks here read them; declared once in
# indb.options (OPTIONS), which the spec file and the command line read too.
FIT_ARGUMENTS = O.FIT_ARGUMENTS
SPEC_OPTIONS = O.SPEC_OPTIONS
DEPLOY_OPTIONS = O.DEPLOY_OPTIONS
ENGINE_OPTIONS = O.ENGINE_OPTIONS
FIT_OPTIONS = O.FIT_OPTIONS


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
    start: Mapping[str, float] | None = None,
    compress: str = "auto",
    sample_start: str = "auto",
    covariance: str = "model",
    cluster: str | None = None,
    penalty: float | None = None,
    l1_share: float = 0.0,
    standardize: bool = False,
    penalty_for: Mapping[str, float] | None = None,
    path: int | None = None,
    path_ratio: float = 1e-3,
    drop_one: bool = False,
    folds: int | None = None,
    fold_by: str | None = None,
    cv_rule: str = "one_se",
    progress: Any = None,
    name: str | None = None,
    promote: bool | None = None,
    new_version: bool = False,
    view_schema: str | None = None,
    score_source: str | None = None,
    intervals: bool | None = None,
    diagnostics: bool | None = None,
    registry_schema: str = DEFAULT_SCHEMA,
    memory_limit: str | None = None,
    temp_directory: str | None = None,
    threads: int | None = None,
) -> FitResult:
    """Fit a generalized linear model on ``source`` inside the database.

    Each IRLS iteration is one generated aggregate query; only sums (X'WX, X'Wz, deviance)
    leave the database. With ``name`` the fitted model is written back: a new registry
    version and, when promoted, a scoring view ``name`` (and a ``name_score`` macro on
    DuckDB); ``result.deployment`` then says where. Every option is declared, with its
    kind, default and help, in ``indb.options.OPTIONS``; see the README and ``indb fit --help``.

    Returns
    -------
    FitResult
        Coefficients on the original scale with standard errors, fit statistics and the
        iteration log.
    """
    # every parameter is a local here, before any other name is bound
    O.check_options(locals(), FIT_OPTIONS)
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
        start=start,
        compress=compress,
        sample_start=sample_start,
        covariance=covariance,
        cluster=cluster,
        penalty=penalty,
        l1_share=l1_share,
        standardize=standardize,
        penalty_for=penalty_for,
        path=path,
        path_ratio=path_ratio,
        drop_one=drop_one,
        folds=folds,
        fold_by=fold_by,
        cv_rule=cv_rule,
    )
    if name is not None:
        check_deploy_names(name, view_schema, registry_schema, spec, db)
    elif diagnostics:
        raise SpecError(
            "diagnostics=True writes the view NAME_diagnostics next to the scoring view, so it "
            "needs the model written back: give name= (CLI: --name) and db="
        )
    engine = connect(
        db,
        # without write-back nothing is written: a database file opens read-only, so a fit
        # also works on a read-only filesystem or a file without write permission
        read_only=name is None,
        memory_limit=memory_limit,
        temp_directory=temp_directory,
        threads=threads,
    )
    try:
        if name is not None:  # a name the deployment cannot take is refused before any scan
            open_registry(engine, registry_schema).check_before_fit(
                name,
                view_schema=view_schema,
                promote=promote,
                inputs=scoring_inputs(spec, engine),
                score_source=score_source,
                diagnostics=diagnostics,
            )
        result = fit_spec(spec, engine, progress)
        if name is not None:
            # a fit that did not converge is recorded but never made live on its own (as
            # retrain's require_converged gate holds it): the live version keeps serving
            hold = promote is not False and not result.converged
            reg = open_registry(engine, registry_schema)
            outcome = reg.save(
                name,
                result,
                promote=False if hold else promote,
                force_new=new_version,
                view_schema=view_schema,
                score_source=score_source,
                intervals=intervals,
                diagnostics=diagnostics,
            )
            result = with_deployment(result, outcome)
            if hold and not outcome.promoted:
                result = _warn_held(result, outcome, reg.model(name)["live_version"])
        return result
    finally:
        if engine is not db:
            engine.close()


def _warn_held(result: FitResult, outcome: SaveOutcome, live: int | None) -> FitResult:
    serving = f"version {live} stays live" if live is not None else "no version is live yet"
    msg = (
        f"model {outcome.model!r}: version {outcome.version} did not converge, so it was "
        f"recorded as held, not promoted; {serving}. To serve it anyway: "
        f"registry(db).promote({outcome.model!r}, {outcome.version}) (CLI: indb promote "
        f"{outcome.model} {outcome.version} --db DB); or refit with a larger max_iter"
    )
    warnings.warn(msg, ConvergenceWarning, stacklevel=3)
    return dataclasses.replace(result, warnings=(*result.warnings, msg))


def check_deploy_names(
    name: str,
    view_schema: str | None,
    registry_schema: str,
    spec: ModelSpec | None = None,
    db: Any = None,
) -> None:
    """Refuse bad write-back names before any scan, not after a long fit."""
    W.check_name(name, "model name")
    if view_schema is not None:
        W.check_name(view_schema, "view schema")
    W.check_name(registry_schema, "registry schema")
    if db is None or (isinstance(db, str) and db.strip() in ("", ":memory:")):
        raise SpecError(
            "name= writes the model to a database that outlives this call; give "
            "db= a database file (an in-memory database would lose it)"
        )
    if spec is not None and spec.source.kind == "table":
        last = spec.source.text.split(".")[-1].strip('"').lower()
        if last == name.lower() and view_schema is None:
            raise SpecError(
                f"model name {name!r} is the name of the source table; the scoring "
                "view would replace it: choose another name or a view schema"
            )


def scoring_sql(
    name: str,
    *,
    db: Any,
    version: int | None = None,
    source: str | None = None,
    intervals: bool | None = None,
    dialect: str = "duckdb",
    view_name: str | None = None,
    registry_schema: str = DEFAULT_SCHEMA,
) -> str:
    """CREATE VIEW text that scores a stored model version, rendered for ``dialect``.

    ``source`` defaults to the model's scoring source; ``view_name`` to the model name. The
    stored offset is read in the dialect it was written in and carried over with its
    meaning; what cannot be raises :class:`~indb.errors.UnsupportedError`.
    """
    from indb.engines.backends import dialect_for

    target = dialect_for(dialect)
    engine = connect(db, read_only=True)
    try:
        reg = open_registry(engine, registry_schema)
        sql = reg.scoring_sql(
            name,
            target,
            version=version,
            source=source,
            intervals=intervals,
            view_name=view_name or name,
        )
        return sql + ";"
    finally:
        if engine is not db:
            engine.close()


def assess(
    name: str,
    on: str,
    *,
    db: Any,
    version: int | None = None,
    by: Sequence[str] = (),
    bands: int = 10,
    against: str | None = None,
    record: bool = False,
    registry_schema: str = DEFAULT_SCHEMA,
    memory_limit: str | None = None,
    temp_directory: str | None = None,
    threads: int | None = None,
) -> AssessResult:
    """Judge a stored model version on the rows of ``on`` (a table, query or file of the
    database ``db`` that holds the registry), inside the database.

    Returns the totals (rows, weight, actual, expected, deviance, deviance explained), the
    Gini of the ordered Lorenz curve, ``bands`` bands of equal exposure along the score,
    actual and expected by level of the model's categorical predictors and of each ``by``
    column (a numeric one in bands of its values) and, for a binomial model, a calibration
    table with the Hosmer-Lemeshow statistic. ``against="NAME2"`` or ``"NAME2:K"`` (the
    live version, or version K; ``"NAME:K"`` compares two versions of one model) scores a
    second model of the same family and response in the same scans: its figures
    (``against``) and the double-lift table (``ratio_bands``). A few grouped scans; nothing
    per row comes back. Nothing is written (a DuckDB file is opened read-only) unless
    ``record``: then the registry keeps the assessment (``Registry.assessments``).
    """
    from indb.assess_run import assess_version, chosen_version, load_against, parse_against
    from indb.registry import _now

    O.check_options(
        {
            "name": name,
            "on": on,
            "by": by,
            "bands": bands,
            "version": version,
            "against": against,
            "record": record,
        },
        {
            "name": O.TEXT,
            "on": O.TEXT,
            "by": O.NAMES,
            "bands": O.WHOLE,
            "version": O.WHOLE,
            "against": O.TEXT,
            "record": O.BOOLEAN,
        },
    )
    O.check_options({"registry_schema": registry_schema}, DEPLOY_OPTIONS)
    O.check_options(
        {"memory_limit": memory_limit, "temp_directory": temp_directory, "threads": threads},
        ENGINE_OPTIONS,
    )
    if db is None or (isinstance(db, str) and db.strip() in ("", ":memory:")):
        raise SpecError(
            "assess reads the model from the registry of a database: give db= the database "
            "(file or URL) the model was written to"
        )
    if against is not None:
        parse_against(against)  # a malformed NAME:K is refused before connecting
    engine = connect(
        db,
        read_only=not record,
        memory_limit=memory_limit,
        temp_directory=temp_directory,
        threads=threads,
    )
    try:
        reg = open_registry(engine, registry_schema)
        version = chosen_version(reg, name, version)
        result = reg.load(name, version)
        other = load_against(reg, against) if against is not None else None
        out = assess_version(
            engine,
            result,
            model=name,
            version=version,
            on=on,
            by=list(by),
            bands=bands,
            against=other,
        )
        if record:
            reg.record_assessment(out, purpose="assess", at=_now())
        return out
    finally:
        if engine is not db:
            engine.close()


def report_html(
    name: str,
    out: str | os.PathLike[str],
    *,
    db: Any,
    version: int | None = None,
    on: str | None = None,
    by: Sequence[str] = (),
    bands: int = 10,
    against: str | None = None,
    registry_schema: str = DEFAULT_SCHEMA,
    memory_limit: str | None = None,
    temp_directory: str | None = None,
    threads: int | None = None,
) -> ReportFile:
    """Write the HTML report of a stored model version (the live one by default) to ``out``.

    One self-contained page (styles and charts inline, nothing fetched when it opens): the
    model and its version history, fit quality and the iteration trace, a chart per term
    with intervals, the coefficient table and, with ``on`` (a table, query or file of
    ``db``), the assessment of ``indb assess`` on that holdout as charts (lift, ordered
    Lorenz curve, actual against expected by level and ``by`` column, calibration) and,
    with ``against="NAME2"`` or ``"NAME2:K"``, a second model judged in the same scans:
    both models' figures side by side and the double-lift chart (as ``assess``). Only
    grouped results leave the database; nothing is written to it. The file is written
    under a temporary name and renamed, so it is never half-written.
    """
    from indb.assess_run import parse_against
    from indb.report_run import make_report

    O.check_options(
        {"name": name, "on": on, "by": by, "bands": bands, "version": version, "against": against},
        {
            "name": O.TEXT,
            "on": O.TEXT,
            "by": O.NAMES,
            "bands": O.WHOLE,
            "version": O.WHOLE,
            "against": O.TEXT,
        },
    )
    O.check_options({"registry_schema": registry_schema}, DEPLOY_OPTIONS)
    O.check_options(
        {"memory_limit": memory_limit, "temp_directory": temp_directory, "threads": threads},
        ENGINE_OPTIONS,
    )
    if on is None and (by or bands != 10 or against is not None):
        given = "against" if against is not None else "by" if by else "bands"
        raise SpecError(f"{given} applies to the holdout assessment only; give on= a holdout")
    if against is not None:
        parse_against(against)  # a malformed NAME:K is refused before connecting
    if db is None or (isinstance(db, str) and db.strip() in ("", ":memory:")):
        raise SpecError(
            "the report reads the model from the registry of a database: give db= the "
            "database (file or URL) the model was written to"
        )
    engine = connect(
        db,
        read_only=True,
        memory_limit=memory_limit,
        temp_directory=temp_directory,
        threads=threads,
    )
    try:
        reg = open_registry(engine, registry_schema)
        return make_report(
            engine, reg, name, out, version=version, on=on, by=by, bands=bands, against=against
        )
    finally:
        if engine is not db:
            engine.close()


def with_deployment(result: FitResult, outcome: SaveOutcome) -> FitResult:
    """Attach where a saved result lives (registry version, scoring view, mean column), and
    the registry's warnings about deployment settings it did not apply."""
    return dataclasses.replace(
        result,
        warnings=(*result.warnings, *outcome.warnings),
        deployment={
            "model": outcome.model,
            "version": outcome.version,
            "created": outcome.created,
            "promoted": outcome.promoted,
            "scoring_view": outcome.scoring_view,
            "mean_column": outcome.mean_column,
            "macro": outcome.macro,
            **({"diagnostics_view": outcome.diagnostics_view} if outcome.diagnostics_view else {}),
        },
    )


def deploy(
    result: FitResult,
    name: str,
    *,
    db: Any = None,
    promote: bool | None = None,
    new_version: bool = False,
    view_schema: str | None = None,
    score_source: str | None = None,
    intervals: bool | None = None,
    diagnostics: bool | None = None,
    registry_schema: str = DEFAULT_SCHEMA,
) -> FitResult:
    """Write an already fitted result to the registry (and its scoring view) of ``db``."""
    O.check_options(locals(), DEPLOY_OPTIONS)
    engine = connect(db)
    try:
        outcome = open_registry(engine, registry_schema).save(
            name,
            result,
            promote=promote,
            force_new=new_version,
            view_schema=view_schema,
            score_source=score_source,
            intervals=intervals,
            diagnostics=diagnostics,
        )
        return with_deployment(result, outcome)
    finally:
        if engine is not db:
            engine.close()


def dry_run(
    source: str,
    response: str,
    family: str = "gaussian",
    link: str | None = None,
    *,
    db: Any = None,
    **options: Any,
) -> list[tuple[str, str]]:
    """The SQL a fit would send: pre-fit scans (run, read only) and the first IRLS scan."""
    spec_kw = {k: v for k, v in options.items() if k in SPEC_OPTIONS}
    unknown = sorted(set(options) - set(SPEC_OPTIONS) - set(ENGINE_OPTIONS))
    if unknown:
        raise SpecError(f"unknown option(s) {unknown}")
    given = {"source": source, "response": response, "family": family, "link": link}
    O.check_options({**given, **options}, {**FIT_ARGUMENTS, **SPEC_OPTIONS, **ENGINE_OPTIONS})
    spec = ModelSpec.build(source, response, family, link, **spec_kw)
    engine = connect(
        db, read_only=True, **{k: v for k, v in options.items() if k in ENGINE_OPTIONS}
    )
    try:
        return plan_spec(spec, engine)
    finally:
        if engine is not db:
            engine.close()


def explore(
    source: str,
    response: str,
    *,
    offset: str | None = None,
    weight: str | None = None,
    by: Sequence[str] | None = None,
    bands: int = 10,
    max_shown: int = 20,
    exclude: Sequence[str] = (),
    categorical: Sequence[str] = (),
    db: Any = None,
    memory_limit: str | None = None,
    temp_directory: str | None = None,
    threads: int | None = None,
) -> Exploration:
    """One-way figures of ``response`` before a model: per level of each categorical column
    and per quantile band of each numeric column, the rows, exposure, Σ weight x response
    and the observed rate, in three scans of ``source`` inside the database (two without a
    numeric column).

    The columns explored are ``by`` or, by default, those a fit would take as predictors
    (every column but the response and the columns the offset and weight read, less
    ``exclude``; ``categorical`` treats numeric columns as categorical). A row's exposure is
    weight x exp(offset): the offset is read as the log of exposure, as a log-link model
    reads it (without an offset the weight, without either 1). The observed rate is
    Σ weight x response / Σ exposure. Rows with a NULL response, offset or weight are set
    aside and counted; a NULL in an explored column is a level of its own. Numeric columns
    are cut at their quantiles k/bands (linear interpolation, numpy's default) over the rows
    used; a categorical column shows its ``max_shown`` levels with the most exposure and
    sums the rest in one row. Nothing is written.

    Returns
    -------
    Exploration
        The figures per column and in all; ``to_dict()`` is the JSON form.
    """
    # every parameter is a local here, before any other name is bound
    O.check_options(locals(), O.EXPLORE_KINDS)
    engine = connect(
        db,
        read_only=True,
        memory_limit=memory_limit,
        temp_directory=temp_directory,
        threads=threads,
    )
    try:
        return explore_source(
            engine,
            source,
            response,
            offset=offset,
            weight=weight,
            by=by,
            exclude=exclude,
            categorical=categorical,
            bands=bands,
            max_shown=max_shown,
        )
    finally:
        if engine is not db:
            engine.close()


def nested(small: str, big: str, *, db: Any, registry_schema: str = DEFAULT_SCHEMA) -> NestedTest:
    """Test registered model ``small`` within ``big`` (each ``NAME``, its live version, or
    ``NAME:VERSION``): the deviance change on the coefficients ``big`` adds, against
    chi-squared where the family fixes the dispersion and F with ``big``'s dispersion
    otherwise. Both must have been fitted on the same rows with the same family, link,
    weights and offset, ``small``'s terms among ``big``'s; otherwise a
    :class:`~indb.errors.SpecError` names the difference. Reads only the registry."""
    engine = connect(db, read_only=True)
    try:
        return open_registry(engine, registry_schema).nested(small, big)
    finally:
        if engine is not db:
            engine.close()


def registry(db: Any = None, schema: str = DEFAULT_SCHEMA, *, read_only: bool = False) -> Registry:
    """A registry handle on ``db`` (the caller closes ``registry.engine`` when done).

    ``read_only=True`` opens a DuckDB file read-only: listing, loading and comparing work,
    promote and drop fail. On a connection of the caller's, closing ``registry.engine``
    puts back the settings indb changed on it.
    """
    engine = db if isinstance(db, Engine) else connect(db, read_only=read_only)
    return open_registry(engine, schema)
