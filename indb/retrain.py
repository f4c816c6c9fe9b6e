"""Scheduled retraining: refit a spec file warm-started from the live version, compare, and
promote only when the gates pass."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from indb.api import with_deployment
from indb.engines.backends import connect
from indb.fitter import fit_spec, plan_spec
from indb.registry import DEFAULT_SCHEMA
from indb.registry_append import open_registry
from indb.results import FitResult
from indb.spec import ModelSpec
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
                {"gate": c.gate, "value": _num(c.value), "limit": c.limit, "passed": c.passed}
                for c in self.checks
            ],
            "exit_code": self.exit_code,
            "comparison": self.comparison,
            "scoring_view": (
                self.result.deployment.get("scoring_view") if self.result is not None else None
            ),
        }


def _num(v: float) -> float | None:
    return v if math.isfinite(v) else None


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
        checks = check_gates(spec_file.gates, result, live)
        passed = all(c.passed for c in checks)
        outcome = reg.save(
            name,
            result,
            promote=passed,
            force_new=force,
            view_schema=deploy.get("view_schema"),
            score_source=deploy.get("score_source"),
            intervals=deploy.get("intervals"),
            parent_version=live_version,
            note=gate_note(checks),
        )
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
        )
    finally:
        if engine is not db:
            engine.close()
