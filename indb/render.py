"""Text and JSON renderings of the command line's outputs, apart from the commands.

``indb.report`` renders one fit; this module renders everything else a command prints:
the progress lines, the registry tables, a comparison of two versions, the outcome of a
retrain, where a deployed model lives, and the JSON documents of those commands. Every
function returns text; printing stays with the commands (``indb.cli``).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
from collections.abc import Sequence
from typing import Any

from indb.results import IterationRecord
from indb.retrain import RetrainOutcome


def _fmt_number(value: float, spec: str) -> str:
    return format(value, spec) if math.isfinite(value) else "n/a"


# Scans that are not steps of the main IRLS fit (see IterationRecord.phase).
_PHASE_LABELS = {"theta": "theta-estimation", "null": "null-model", "sample": "sample-start"}


def format_iteration(record: IterationRecord) -> str:
    """One progress line for one IRLS iteration (written to stderr by ``indb fit``)."""
    phase = getattr(record, "phase", "fit")
    label = "iteration" if phase == "fit" else f"{_PHASE_LABELS.get(phase, phase)} iteration"
    return (
        f"indb: {label} {record.iteration:>3}"
        f"  deviance {_fmt_number(record.deviance, '.10g')}"
        f"  relative change {_fmt_number(record.relative_change, '.3e')}"
        f"  step halvings {record.step_halvings}"
        f"  {_fmt_number(record.seconds, '.3f')} s"
    )


def iteration_json(record: IterationRecord) -> str:
    """One iteration as a single-line JSON object (``--progress-json``; NaN/inf -> null)."""
    fields = {k: _finite_or_none(v) for k, v in dataclasses.asdict(record).items()}
    return json.dumps(fields, allow_nan=False, separators=(",", ":"))


def _finite_or_none(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _plain(value: Any) -> Any:
    """JSON-ready copy: non-finite floats -> null, timestamps -> ISO text, tuples -> lists."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    if isinstance(value, _dt.datetime | _dt.date):
        return value.isoformat()
    return _finite_or_none(value)


def _dumps(value: Any) -> str:
    return json.dumps(_plain(value), indent=2, allow_nan=False, default=str)


def _num(value: Any, spec: str = ".6g") -> str:
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    return _fmt_number(float(value), spec)


def _when(value: Any) -> str:
    if isinstance(value, _dt.datetime):
        return value.strftime("%Y-%m-%d %H:%M:%S")
    return "n/a" if value is None else str(value)


def _table(headers: Sequence[str], rows: Sequence[Sequence[str]], right: Sequence[int]) -> str:
    """Columns separated by two spaces; the columns numbered in ``right`` are right-aligned."""
    widths = [len(h) for h in headers]
    for row in rows:
        widths = [max(w, len(cell)) for w, cell in zip(widths, row, strict=True)]

    def line(cells: Sequence[str]) -> str:
        parts = [
            c.rjust(w) if i in right else c.ljust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        ]
        return "  ".join(parts).rstrip()

    return "\n".join([line(headers), *(line(r) for r in rows)])


def _deployment_text(deployment: dict[str, Any], db: str | None) -> str:
    name, version = deployment["model"], deployment["version"]
    if not deployment["created"]:
        state = "live" if deployment["promoted"] else "held"
        return (
            f"Model {name}: same spec and data as version {version} ({state}); nothing new "
            "recorded (--new-version records one anyway)."
        )
    if not deployment["promoted"]:
        return (
            f"Model {name}: version {version} recorded but not live; make it live with "
            f"`indb promote {name} {version} --db {db}`."
        )
    macro = f", scoring macro {deployment['macro']}" if deployment.get("macro") else ""
    return (
        f"Model {name}: version {version} is live; scoring view {deployment['scoring_view']} "
        f"(predicted mean in column {deployment['mean_column']}){macro}."
    )


def _view_label(model_row: dict[str, Any]) -> str:
    schema = model_row.get("view_schema")
    return f"{schema}.{model_row['view_name']}" if schema else str(model_row["view_name"])


def _compare_text(cmp: dict[str, Any]) -> str:
    a, b = cmp["a"], cmp["b"]
    lines = [f"Model {cmp['model']}: version {a} compared with version {b}", ""]
    rows = [
        [
            t["term"],
            _num(t["estimate_a"]),
            _num(t["estimate_b"]),
            _num(t["change"], ".4g"),
            _num(t["change_in_se"], ".3f"),
            _num(t["relative_change"], ".3g"),
        ]
        for t in cmp["terms"]
    ]
    headers = [
        "term",
        f"version {a}",
        f"version {b}",
        "change",
        f"change in SE of v{a}",
        "relative change",
    ]
    lines.append(_table(headers, rows, right=(1, 2, 3, 4, 5)))
    if cmp["terms_only_in_b"]:
        lines.append(f"terms only in version {b}: {', '.join(cmp['terms_only_in_b'])}")
    lines.append("")
    stats = [
        ["rows used", *(_num(v) for v in cmp["rows"])],
        ["deviance", *(_num(v, ".10g") for v in cmp["deviance"])],
        ["deviance per row", *(_num(v, ".6g") for v in cmp["deviance_per_row"])],
        ["AIC", *(_num(v, ".10g") for v in cmp["aic"])],
        ["converged", *(_num(v) for v in cmp["converged"])],
    ]
    lines.append(_table(["", f"version {a}", f"version {b}"], stats, right=(1, 2)))
    return "\n".join(lines)


def _retrain_text(outcome: RetrainOutcome, db: str | None) -> str:
    name, v, prev = outcome.model, outcome.version, outcome.previous_version
    view = outcome.result.deployment.get("scoring_view") if outcome.result else None
    failed = [c.gate for c in outcome.checks if not c.passed]
    if outcome.status == "first":
        head = f"Model {name}: first version {v} recorded and live; scoring view {view}."
    elif outcome.status == "promoted":
        head = f"Model {name}: version {v} promoted, replacing version {prev}; view {view}."
    elif outcome.status == "unchanged":
        head = (
            f"Model {name}: spec and data unchanged; version {v} stays live "
            "(--force records a new version)."
        )
    else:
        keep = f"version {prev} stays live" if prev is not None else "no version is live"
        head = (
            f"Model {name}: version {v} recorded but HELD BACK by gate(s) "
            f"{', '.join(failed)}; {keep}. Promote it anyway with "
            f"`indb promote {name} {v} --db {db}`."
        )
    if outcome.previous_iterations is None:
        iters = f"IRLS iterations: {outcome.iterations} (cold start: no live version)."
    else:
        iters = (
            f"IRLS iterations: {outcome.iterations}, warm-started from version {prev} "
            f"(version {prev} took {outcome.previous_iterations})."
        )
    lines = [head, iters]
    if outcome.checks:
        rows = [
            [c.gate, _num(c.value, ".6g"), _num(c.limit, ".6g"), "pass" if c.passed else "FAIL"]
            for c in outcome.checks
        ]
        lines += ["", _table(["gate", "value", "limit", "result"], rows, right=(1, 2))]
    return "\n".join(lines)
