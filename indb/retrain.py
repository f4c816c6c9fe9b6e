"""Scheduled retraining: refit a spec file warm-started from the live version, compare, and
promote only when the gates pass.

With ``[gates] holdout = "SOURCE"`` the new version and the live one are judged on the
holdout's rows in the same scans (:func:`indb.assess_run.assess_version` with the live
version as the second model) before anything is written; the holdout gates read those
figures, and the assessment is recorded with the new version (``version_assessment``).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from indb.api import with_deployment
from indb.assess_run import StoredVersion, assess_version, comparison_refusal, describe_source
from indb.assessment import AssessResult, worst_level_deviation
from indb.assessment_log import assessment_rows
from indb.engines.backends import connect
from indb.engines.base_engine import Engine
from indb.errors import SpecError
from indb.fitter import fit_spec, plan_spec
from indb.registry import DEFAULT_SCHEMA, _now
from indb.registry_append import open_registry
from indb.results import FitResult
from indb.spec import ModelSpec, Source
from indb.specfile import Gates, SpecFile

#: Exit codes of ``indb retrain`` (documented in the README for schedulers).
EXIT_PROMOTED = 0
EXIT_HELD = 6


@dataclass(frozen=True)
class GateCheck:
    gate: str
    value: float
    limit: float
    passed: bool
    #: where the value comes from, when it is one of many (a level: "region = north")
    detail: str = ""


@dataclass(frozen=True)
class RetrainOutcome:
    """What a retrain did: status is ``promoted``, ``held``, ``unchanged`` or ``first``."""

    status: str
    model: str
    version: int
    previous_version: int | None
    iterations: int
    previous_iterations: int | None
    checks: tuple[GateCheck, ...] = ()
    result: FitResult | None = None
    sql: tuple[tuple[str, str], ...] = ()
    comparison: dict[str, Any] = field(default_factory=dict)
    #: the new version (and the live one, as its second model) judged on the holdout
    holdout: AssessResult | None = None
    min_level_exposure: float = 0.0

    @property
    def exit_code(self) -> int:
        return EXIT_HELD if self.status == "held" else EXIT_PROMOTED

    def to_dict(self) -> dict[str, Any]:
        return {
            "status": self.status,
            "model": self.model,
            "version": self.version,
            "previous_version": self.previous_version,
            "iterations": self.iterations,
            "previous_iterations": self.previous_iterations,
            "gates": [
                {
                    "gate": c.gate,
                    "value": _num(c.value),
                    "limit": c.limit,
                    "passed": c.passed,
                    **({"detail": c.detail} if c.detail else {}),
                }
                for c in self.checks
            ],
            "holdout": holdout_figures(self.holdout, self.min_level_exposure),
            "exit_code": self.exit_code,
            "comparison": self.comparison,
            "scoring_view": (
                self.result.deployment.get("scoring_view") if self.result is not None else None
            ),
        }


def _num(v: float) -> float | None:
    return v if math.isfinite(v) else None


def holdout_figures(a: AssessResult | None, min_exposure: float = 0.0) -> dict[str, Any] | None:
    """Both versions' holdout figures, the new version first (JSON-ready)."""
    if a is None:
        return None
    versions = [_version_figures(a, a, "new", min_exposure)]
    if a.against is not None:
        versions.append(_version_figures(a, a.against, "live", min_exposure))
    return {
        "source": a.source,
        "rows": a.rows,
        "rows_read": a.rows_read,
        "scans": a.scans,
        "versions": versions,
    }


def _version_figures(a: AssessResult, figures: Any, role: str, min_exposure: float) -> dict:
    worst = worst_level_deviation(a, min_exposure, against=role == "live")
    out = {"version": figures.version, "role": role}
    for key in (
        "expected",
        "actual_over_expected",
        "deviance",
        "mean_deviance",
        "deviance_explained",
        "gini",
        "gini_normalized",
    ):
        out[key] = _num(float(getattr(figures, key)))
    out["worst_level_ae_deviation"] = _num(worst.value)
    out["worst_level"] = None if worst.column is None else worst.describe()
    return out


def holdout_checks(gates: Gates, a: AssessResult | None) -> list[GateCheck]:
    """The holdout gates on an assessment of the new version (with the live version as its
    second model; without one, only ``max_level_ae_deviation`` applies)."""
    out: list[GateCheck] = []
    if a is None:
        return out
    if gates.max_level_ae_deviation is not None:
        worst = worst_level_deviation(a, gates.min_level_exposure or 0.0)
        limit = gates.max_level_ae_deviation
        out.append(
            GateCheck(
                "max_level_ae_deviation", worst.value, limit, worst.value <= limit, worst.describe()
            )
        )
    live = a.against
    if live is None:
        return out
    if gates.max_holdout_deviance_increase is not None:
        inc = (a.deviance - live.deviance) / abs(live.deviance) if live.deviance else 0.0
        limit = gates.max_holdout_deviance_increase
        out.append(GateCheck("max_holdout_deviance_increase", inc, limit, inc <= limit))
    if gates.max_gini_drop is not None:
        drop, limit = live.gini - a.gini, gates.max_gini_drop
        out.append(GateCheck("max_gini_drop", drop, limit, drop <= limit))
    return out


def gate_note(checks: Sequence[GateCheck]) -> str | None:
    """The gates' outcomes in one line, recorded as the new version's note in the registry
    (the version history of ``indb report`` shows it); None without gates."""
    if not checks:
        return None
    parts = [
        f"{c.gate} {c.value:.6g} (limit {c.limit:.6g}) {'passed' if c.passed else 'FAILED'}"
        for c in checks
    ]
    return "gates: " + "; ".join(parts)


def check_gates(gates: Gates, new: FitResult, old: FitResult | None) -> list[GateCheck]:
    """Evaluate the gates of a new version against the live one (None: first version)."""
    out: list[GateCheck] = []
    if gates.require_converged:
        out.append(GateCheck("require_converged", float(new.converged), 1.0, new.converged))
    if gates.min_rows is not None:
        out.append(
            GateCheck(
                "min_rows", float(new.n_used), float(gates.min_rows), new.n_used >= gates.min_rows
            )
        )
    if gates.max_excluded_share is not None:
        total = new.n_used + new.n_excluded
        share = new.n_excluded / total if total else 0.0
        out.append(
            GateCheck(
                "max_excluded_share",
                share,
                gates.max_excluded_share,
                share <= gates.max_excluded_share,
            )
        )
    if old is None:
        return out
    by_term = {c.term: c for c in old.coefficients}
    rel, in_se = 0.0, 0.0
    for c in new.coefficients:
        o = by_term.get(c.term)
        if o is None or c.aliased or o.aliased:
            continue
        d = abs(c.estimate - o.estimate)
        if o.estimate != 0:
            rel = max(rel, d / abs(o.estimate))
        if o.std_error > 0:
            in_se = max(in_se, d / o.std_error)
    if gates.max_relative_change is not None:
        out.append(
            GateCheck(
                "max_relative_change",
                rel,
                gates.max_relative_change,
                rel <= gates.max_relative_change,
            )
        )
    if gates.max_change_in_se is not None:
        out.append(
            GateCheck(
                "max_change_in_se", in_se, gates.max_change_in_se, in_se <= gates.max_change_in_se
            )
        )
    if gates.max_deviance_per_row_increase is not None:
        a = old.deviance / max(old.n_used, 1)
        b = new.deviance / max(new.n_used, 1)
        inc = (b - a) / abs(a) if a else 0.0
        out.append(
            GateCheck(
                "max_deviance_per_row_increase",
                inc,
                gates.max_deviance_per_row_increase,
                inc <= gates.max_deviance_per_row_increase,
            )
        )
    return out


def retrain(
    spec_file: SpecFile, *, dry_run: bool = False, progress: Any = None, force: bool = False
) -> RetrainOutcome:
    """Refit ``spec_file``'s model, warm-started from the live version, and promote it only
    if every gate passes; a held-back version is still recorded (status ``held``)."""
    name = spec_file.name
    deploy = spec_file.deploy
    engine_opts = dict(spec_file.engine)
    db = engine_opts.pop("db", None)
    engine = connect(db, read_only=dry_run, **engine_opts)
    try:
        reg = open_registry(engine, deploy.get("registry_schema", DEFAULT_SCHEMA))
        reg.check_model_name(name)  # before the fit, not after it
        live: FitResult | None = None
        live_version: int | None = None
        if reg.exists() and any(m["model_name"] == name for m in reg.models()):
            live_version = reg.model(name)["live_version"]
            if live_version is not None:
                live = reg.load(name, live_version)
        start = (
            {c.term: c.estimate for c in live.coefficients if not c.aliased}
            if live is not None
            else None
        )
        options = dict(spec_file.model)
        spec = ModelSpec.build(
            options.pop("source"),
            options.pop("response"),
            options.pop("family", "gaussian"),
            options.pop("link", None),
            start=start,
            **options,
        )
        check_holdout(engine, spec_file.gates, name, spec, live_version, live)
        if dry_run:
            sql = plan_spec(spec, engine)
            return RetrainOutcome(
                "dry-run",
                name,
                0,
                live_version,
                0,
                live.iterations if live else None,
                sql=tuple(sql),
            )
        result = fit_spec(spec, engine, progress)
        gates = spec_file.gates
        # judged before anything is written: a holdout the new version cannot read is an
        # input error that leaves the registry as it was
        holdout = judge_holdout(engine, gates, name, result, live_version, live)
        checks = [*check_gates(gates, result, live), *holdout_checks(gates, holdout)]
        passed = all(c.passed for c in checks)
        now = _now()
        pending = assessment_rows(holdout, purpose="holdout gates", at=now) if holdout else []
        outcome = reg.save(
            name,
            result,
            promote=passed,
            force_new=force,
            view_schema=deploy.get("view_schema"),
            score_source=deploy.get("score_source"),
            intervals=deploy.get("intervals"),
            diagnostics=deploy.get("diagnostics"),
            parent_version=live_version,
            assessments=pending,
            note=gate_note(checks),
        )
        if holdout is not None:
            holdout = dataclasses.replace(holdout, version=outcome.version)
            if not outcome.created:  # no new version to record it with: on its own
                reg.record_assessment(holdout, purpose="holdout gates", at=now)
        result = with_deployment(result, outcome)
        if not outcome.created and outcome.promoted:
            status = "unchanged"
        elif not outcome.created:
            # same spec and data as a held version: promote it if the gates now pass (they
            # may have been loosened), otherwise it stays held and the exit code says so
            if passed:
                reg.promote(name, outcome.version, view_schema=deploy.get("view_schema"))
                status = "promoted"
            else:
                status = "held"
        elif live is None:
            status = "first" if passed else "held"
        else:
            status = "promoted" if passed else "held"
        comparison = (
            reg.compare(name, live_version, outcome.version)
            if live is not None and outcome.created
            else {}
        )
        return RetrainOutcome(
            status,
            name,
            outcome.version,
            live_version,
            result.iterations,
            live.iterations if live else None,
            tuple(checks),
            result,
            comparison=comparison,
            holdout=holdout,
            min_level_exposure=gates.min_level_exposure or 0.0,
        )
    finally:
        if engine is not db:
            engine.close()


# -- holdout gates ------------------------------------------------------------------------------


def check_holdout(
    engine: Engine,
    gates: Gates,
    name: str,
    spec: ModelSpec,
    live_version: int | None,
    live: FitResult | None,
) -> None:
    """Before the fit: the holdout can be read, and the new version can be judged beside
    the live one (same family, response and weights); a SpecError otherwise."""
    if gates.holdout is None:
        return
    describe_source(engine, Source.parse(gates.holdout))
    if live is None:
        return
    refusal = comparison_refusal((name, None, spec.to_dict()), (name, live_version, live.spec))
    if refusal:
        raise SpecError(
            f"holdout gates: {refusal}; remove holdout and its gates from [gates] for a "
            "refit that changes them"
        )


def judge_holdout(
    engine: Engine,
    gates: Gates,
    name: str,
    result: FitResult,
    live_version: int | None,
    live: FitResult | None,
) -> AssessResult | None:
    """The new version (numbered 0 until it is saved) judged on the holdout, with the live
    version as its second model in the same scans."""
    if gates.holdout is None:
        return None
    against = (
        StoredVersion(name, live_version, live)
        if live is not None and live_version is not None
        else None
    )
    assessed = assess_version(
        engine,
        result,
        model=name,
        version=0,
        on=gates.holdout,
        by=list(gates.holdout_by or ()),
        against=against,
    )
    if gates.max_level_ae_deviation is not None and not assessed.levels:
        raise SpecError(
            f"gate max_level_ae_deviation has no levels to judge: model {name!r} has no "
            "categorical predictor; name columns of the holdout in holdout_by"
        )
    return assessed
