"""Text and JSON renderings of the command line's outputs, apart from the commands.

``indb.report`` renders one fit; this module renders everything else a command prints:
the progress lines, the registry tables, a comparison of two versions, the outcome of a
retrain, where a deployed model lives, and the JSON documents of those commands. Every
function returns text; printing stays with the commands (``indb.cli``).

Each command's output has a text renderer (``*_text``) and, where the command takes
``--json``, a JSON one (``*_json``) that returns exactly one document.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
from collections.abc import Sequence
from typing import Any

from indb.comparison import NestedTest
from indb.report import render_json, render_report
from indb.results import FitResult, IterationRecord
from indb.retrain import RetrainOutcome, holdout_figures

Statements = Sequence[tuple[str, str]]


def _fmt_number(value: float, spec: str) -> str:
    return format(value, spec) if math.isfinite(value) else "n/a"


# Scans that are not steps of the main IRLS fit (see IterationRecord.phase).
_PHASE_LABELS = {"theta": "theta-estimation", "null": "null-model", "sample": "sample-start"}


def format_iteration(record: IterationRecord) -> str:
    """One progress line for one IRLS iteration (written to stderr by ``indb fit``)."""
    phase = getattr(record, "phase", "fit")
    if phase == "theta":  # relative_change is theta's here (its Poisson start: deviance's)
        return (
            f"indb: theta-estimation scan {record.iteration:>3}"
            f"  deviance {_fmt_number(record.deviance, '.10g')}"
            f"  relative change {_fmt_number(record.relative_change, '.3e')}"
            f"  {_fmt_number(record.seconds, '.3f')} s"
        )
    if phase == "prepare":  # a pre-fit scan: no deviance yet
        return f"indb: pre-fit scan {record.iteration:>3}  {_fmt_number(record.seconds, '.3f')} s"
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


def to_json(value: Any) -> str:
    """One indented JSON document (non-finite numbers as null, timestamps as ISO text)."""
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


def deployment_text(deployment: dict[str, Any], db: str | None) -> str:
    """Where a written-back fit lives, or why nothing new was recorded (one line)."""
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
    diagnostics = deployment.get("diagnostics_view")
    residuals = f"; residuals and influence in view {diagnostics}" if diagnostics else ""
    return (
        f"Model {name}: version {version} is live; scoring view {deployment['scoring_view']} "
        f"(predicted mean in column {deployment['mean_column']}){macro}{residuals}."
    )


def view_label(model_row: dict[str, Any]) -> str:
    """A model's scoring view as a reader writes it: ``schema.view`` or ``view``."""
    schema = model_row.get("view_schema")
    return f"{schema}.{model_row['view_name']}" if schema else str(model_row["view_name"])


def compare_text(cmp: dict[str, Any]) -> str:
    """Two versions side by side (``Registry.compare``): terms, then the fit statistics."""
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


def retrain_text(outcome: RetrainOutcome, db: str | None) -> str:
    """What a retrain did, its iteration count against the live version's, and the gates."""
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
    elif outcome.result is not None and not outcome.result.deployment.get("created", True):
        keep = f"version {prev} stays live" if prev is not None else "no version is live"
        head = (
            f"Model {name}: spec and data match held version {v}, so no new version was "
            f"recorded; it stays HELD BACK by gate(s) {', '.join(failed)}; {keep}. Promote "
            f"it anyway with `indb promote {name} {v} --db {db}`."
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
    holdout = holdout_figures(outcome.holdout, outcome.min_level_exposure)
    if holdout is not None:
        lines += ["", holdout_text(holdout)]
    if outcome.checks:
        rows = [
            [c.gate, _gate_num(c.value), _gate_num(c.limit), "pass" if c.passed else "FAIL"]
            + ([c.detail] if any(x.detail for x in outcome.checks) else [])
            for c in outcome.checks
        ]
        headers = ["gate", "value", "limit", "result"]
        headers += ["where"] if len(rows[0]) > len(headers) else []
        lines += ["", _table(headers, rows, right=(1, 2))]
    return "\n".join(lines)


def holdout_text(h: dict[str, Any]) -> str:
    """Both versions' figures on the holdout rows (:func:`indb.retrain.holdout_figures`)."""
    both = "both versions" if len(h["versions"]) > 1 else "the new version"
    head = (
        f"Holdout {h['source']}: {h['rows']:,} of {h['rows_read']:,} rows, {both} in the same "
        f"{h['scans']} scan{'s' if h['scans'] != 1 else ''}"
    )
    rows = [
        [
            f"{v['version']} ({v['role']})",
            _num(v["deviance"], ",.6g"),
            _num(v["mean_deviance"], ".5g"),
            _num(v["actual_over_expected"], ".4f"),
            _num(v["gini"], ".4f"),
            _num(v["worst_level_ae_deviation"], ".4f"),
            v["worst_level"] or "",
        ]
        for v in h["versions"]
    ]
    headers = ["version", "deviance", "mean deviance", "A/E", "Gini", "worst level |A/E-1|", "at"]
    return head + "\n" + _table(headers, rows, right=(1, 2, 3, 4, 5))


# -- one renderer per command output ---------------------------------------------------


def fit_text(result: FitResult, db: str | None) -> str:
    """The report of a fit and, when it was written back, where it now lives."""
    text = render_report(result)
    if result.deployment:
        text += "\n" + deployment_text(result.deployment, db) + "\n"
    return text


def fit_json(result: FitResult) -> str:
    return render_json(result)


def statements_text(statements: Statements, note: str = "") -> str:
    """SQL statements (``--dry-run``), each under a comment saying what it is for."""
    text = "".join(f"-- {purpose}\n{sql};\n\n" for purpose, sql in statements)
    return text + (f"-- {note}\n" if note else "")


def statements_json(statements: Statements, note: str = "") -> str:
    return to_json({"sql": [{"purpose": p, "sql": s} for p, s in statements], "note": note})


# (model row of the registry, its versions), as `indb models` lists them
ModelListing = Sequence[tuple[dict[str, Any], Sequence[Any]]]


def models_text(models: ModelListing, db: str) -> str:
    if not models:
        return f"No models in the registry of {db}."
    rows = [
        [
            m["model_name"],
            "none" if m["live_version"] is None else str(m["live_version"]),
            str(len(vs)),
            view_label(m),
        ]
        for m, vs in models
    ]
    return _table(["model", "live version", "versions", "scoring view"], rows, right=(1, 2))


def models_json(models: ModelListing) -> str:
    return to_json(
        {
            "models": [
                {
                    "model": m["model_name"],
                    "live_version": m["live_version"],
                    "versions": len(vs),
                    "scoring_view": view_label(m),
                    "macro": m["macro_name"],
                    "score_source": m["score_source"],
                    "intervals": m["intervals"],
                    "diagnostics": bool(m.get("diagnostics")),
                    "created_at": m["created_at"],
                }
                for m, vs in models
            ]
        }
    )


def assessments_text(rows: Sequence[dict[str, Any]]) -> str:
    """The recorded assessments (registry table ``version_assessment``), oldest first."""
    table = [
        [
            str(r["version"]),
            _when(r["assessed_at"]),
            str(r["purpose"]),
            str(r["source"]),
            _num(r["n_used"]),
            _num(r["deviance"], ".10g"),
            _num(_ratio(r["actual"], r["expected"]), ".4f"),
            _num(r["gini"], ".4f"),
            _beside(r),
        ]
        for r in rows
    ]
    headers = ["version", "assessed (UTC)", "for", "on", "rows", "deviance", "A/E", "Gini"]
    headers.append("beside")
    return "Assessments, oldest first\n" + _table(headers, table, right=(0, 4, 5, 6, 7))


def _beside(row: dict[str, Any]) -> str:
    """The version judged in the same scans, if any."""
    if row["compared_model"] is None:
        return ""
    return f"{row['compared_model']} v{row['compared_version']}"


def _ratio(a: Any, b: Any) -> float | None:
    if a is None or b is None or not b:
        return None
    return float(a) / float(b)


def versions_text(
    versions: Sequence[dict[str, Any]], assessments: Sequence[dict[str, Any]] = ()
) -> str:
    rows = [
        [
            str(v["version"]),
            str(v["status"]),
            _when(v["created_at"]),
            str(v["family"]),
            str(v["link"]),
            _num(v["deviance"], ".10g"),
            _num(v["n_used"]),
            _num(v["iterations"]),
            _num(v["converged"]),
        ]
        for v in versions
    ]
    headers = [
        "version",
        "status",
        "created (UTC)",
        "family",
        "link",
        "deviance",
        "rows",
        "iterations",
        "converged",
    ]
    text = _table(headers, rows, right=(0, 5, 6, 7))
    return text + ("\n\n" + assessments_text(assessments) if assessments else "")


def versions_json(
    name: str, versions: Sequence[dict[str, Any]], assessments: Sequence[dict[str, Any]] = ()
) -> str:
    return to_json({"model": name, "versions": versions, "assessments": list(assessments)})


def show_text(
    name: str,
    version: int,
    row: dict[str, Any],
    result: FitResult,
    assessments: Sequence[dict[str, Any]] = (),
) -> str:
    """The stored report of one version under a line saying which version it is, and the
    assessments recorded of it."""
    head = (
        f"Model {name}, version {version} ({row['status']}), recorded "
        f"{_when(row['created_at'])} UTC\n\n"
    )
    tail = "\n" + assessments_text(assessments) + "\n" if assessments else ""
    return head + render_report(result) + tail


def show_json(
    name: str,
    version: int,
    row: dict[str, Any],
    result: FitResult,
    assessments: Sequence[dict[str, Any]] = (),
) -> str:
    out = result.to_dict()
    out.update({"model": name, "version": version, "status": row["status"]})
    out["assessments"] = list(assessments)
    return to_json(out)


def compare_json(cmp: dict[str, Any]) -> str:
    return to_json(cmp)


def nested_text(test: NestedTest) -> str:
    """A model within a larger one (``indb nested``): the two deviances, their change and
    its test, one fact per line."""
    small, big = test.small, test.big
    width = max(len(small), len(big), 12)
    lines = [
        f"{small} within {big}: {test.family}, {test.rows:,} rows used by both",
        "",
        f"{'':<18}{small:>{width}}  {big:>{width}}",
        f"{'deviance':<18}{_num(test.deviance_small, '.10g'):>{width}}  "
        f"{_num(test.deviance_big, '.10g'):>{width}}",
        f"{'converged':<18}{_num(test.converged[0]):>{width}}  {_num(test.converged[1]):>{width}}",
        "",
        f"deviance change   {_num(test.deviance_change, '.8g')} on {test.df} df "
        f"({_added(test.terms_added)})",
    ]
    if test.test == "chi2":
        lines.append(f"chi-squared       {_num(test.statistic, '.6g')} on {test.df} df")
    else:
        lines.append(
            f"F                 {_num(test.statistic, '.6g')} on {test.df} and "
            f"{_num(test.residual_df, '.6g')} df (dispersion of {big}: "
            f"{_num(test.dispersion, '.6g')})"
        )
    lines.append(f"p-value           {_num(test.p_value, '.4g')}")
    return "\n".join(lines)


def _added(terms: Sequence[str]) -> str:
    shown = ", ".join(terms[:6]) + (f" and {len(terms) - 6} more" if len(terms) > 6 else "")
    return f"added: {shown}" if terms else "no terms added by name"


def nested_json(test: NestedTest) -> str:
    return to_json({"nested": test.to_dict()})


def retrain_json(outcome: RetrainOutcome) -> str:
    out = outcome.to_dict()
    if outcome.comparison:
        out["comparison"] = outcome.comparison
    return to_json(out)


def promote_text(name: str, version: int, previous: int | None, view: str) -> str:
    if previous == version:
        return f"Model {name}: version {version} was already live; scoring view {view} serves it."
    was = f" (was version {previous})" if previous is not None else ""
    return f"Model {name}: version {version} is live{was}; scoring view {view} serves it."


def promote_json(name: str, version: int, previous: int | None, view: str) -> str:
    return to_json(
        {
            "model": name,
            "live_version": version,
            "previous_live_version": previous,
            "scoring_view": view,
        }
    )


def drop_text(name: str, version: int) -> str:
    return f"Model {name}: version {version} dropped (its registry rows are kept)."


def drop_json(name: str, version: int) -> str:
    return to_json({"model": name, "version": version, "status": "dropped"})


def scoring_sql_text(sql: str) -> str:
    return sql + ";"


def scoring_sql_json(
    name: str, version: int | None, dialect: str, model_row: dict[str, Any], sql: str
) -> str:
    return to_json(
        {
            "model": name,
            "version": version,
            "dialect": dialect,
            "scoring_view": view_label(model_row),
            "sql": sql,
        }
    )


def _gate_num(x: float) -> str:
    """A gate's value or limit: whole numbers with thousands separators (min_rows
    1,000,000, not 1e+06), others to 6 significant digits."""
    if isinstance(x, (int, float)) and math.isfinite(x) and float(x).is_integer():
        return f"{int(x):,}"
    return _num(x, ".6g")
