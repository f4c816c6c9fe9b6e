"""Tables, target checks and the Markdown report of ``bench_fit.py``.

Everything here is computed from the measured results handed in; nothing is assumed.
"""

from __future__ import annotations

import datetime as dt
import importlib.metadata as md
import math
import os
import platform
import subprocess
from collections.abc import Sequence
from typing import Any

import bench_data
import numpy as np

TOOLS = ("floor", "indb", "statsmodels", "sklearn")
TOOL_LABEL = {
    "floor": "floor (DuckDB SUM scan)",
    "indb": "indb",
    "statsmodels": "statsmodels GLM",
    "sklearn": "scikit-learn",
}
SANITY_RTOL = 1e-6  # indb vs statsmodels coefficients on the 1e6 Poisson case (brief)
HEADERS = (
    "rows",
    "model",
    "tool",
    "status",
    "time s",
    "CPU s",
    "iters",
    "s/scan",
    "queries",
    "peak MiB",
    "Mrows/s",
    "scan/floor",
    "time/floor",
    "time/indb",
    "coef rel.diff",
    "path / solver",
    "load",
)


def fmt(x: Any, digits: int = 3) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return ""
    if isinstance(x, int):
        return str(x)
    if isinstance(x, float):
        if x == 0:
            return "0"
        if abs(x) >= 100:
            return f"{x:.0f}"
        if abs(x) >= 1e-3:
            return f"{x:.{digits}g}"
        return f"{x:.1e}"
    return str(x)


def rows_label(n: int) -> str:
    e = math.log10(n)
    return f"1e{int(e)}" if e == int(e) else f"{n:,}"


def _sample_cell(r: dict[str, Any]) -> str:
    """The sample start: seconds to copy the sample, then its IRLS scans and their time."""
    scans = r.get("sample_scan_seconds") or []
    if not scans:
        return "none"
    return f"{fmt(r.get('sample_copy_seconds'))} + {len(scans)} / {fmt(float(sum(scans)))}"


class Report:
    """Derived numbers and their renderings for one benchmark run."""

    def __init__(
        self, results: list[dict[str, Any]], run: dict[str, Any], models: Sequence[Any]
    ) -> None:
        self.results = results
        self.run = run
        self.models = list(models)
        self.sizes: list[int] = sorted({r["rows"] for r in results})
        self.by = {(r["rows"], r["model"], r["tool"]): r for r in results}

    # -- lookups ---------------------------------------------------------------------------
    def get(self, rows: int, model: str, tool: str) -> dict[str, Any] | None:
        return self.by.get((rows, model, tool))

    def ok(self, rows: int, model: str, tool: str) -> dict[str, Any] | None:
        r = self.get(rows, model, tool)
        return r if r is not None and r.get("status") == "ok" else None

    def floor(self, rows: int, model: str) -> float:
        r = self.ok(rows, model, "floor")
        return float(r["seconds"]) if r else math.nan

    @staticmethod
    def per_scan(r: dict[str, Any] | None) -> float:
        if not r or not r.get("scan_seconds"):
            return math.nan
        return float(np.mean(r["scan_seconds"]))

    @staticmethod
    def peak_mib(r: dict[str, Any]) -> float:
        kib = r.get("peak_kib") or r.get("kernel_peak_kib")
        return kib / 1024 if kib else math.nan

    def coef_diff(self, rows: int, model: str, tool: str) -> float:
        """Largest |b_ref - b_indb| / |b_indb| over the terms both report."""
        a, b = self.ok(rows, model, "indb"), self.ok(rows, model, tool)
        if not a or not b or "terms" not in b:
            return math.nan
        ours = dict(zip(a["terms"], a["params"], strict=True))
        theirs = dict(zip(b["terms"], b["params"], strict=True))
        if set(ours) != set(theirs):
            return math.nan
        return max(abs(theirs[t] - ours[t]) / max(abs(ours[t]), 1e-300) for t in ours)

    def compression(self, rows: int, model: str) -> float:
        r = self.get(rows, model, "floor") or {}
        d = r.get("distinct_design_rows")
        return rows / d if d else math.nan

    # -- the side-by-side table --------------------------------------------------------------
    def table_rows(self) -> list[list[str]]:
        out: list[list[str]] = []
        for n in self.sizes:
            for m in self.models:
                floor = self.floor(n, m.key)
                indb = self.ok(n, m.key, "indb")
                indb_t = float(indb["seconds"]) if indb else math.nan
                for tool in TOOLS:
                    r = self.get(n, m.key, tool)
                    if r is None:
                        continue
                    ok = r.get("status") == "ok"
                    t = float(r["seconds"]) if ok else math.nan
                    scan = self.per_scan(r) if tool == "indb" else math.nan
                    limit = r.get("timeout_seconds")
                    vs_indb = fmt(t / indb_t)
                    if limit:  # a timeout bounds the time from below
                        vs_indb = f"> {fmt(limit / indb_t)}" if math.isfinite(indb_t) else ""
                    status = str(r.get("status", "?"))
                    if not ok and not limit and isinstance(r.get("seconds"), int | float):
                        status += f" after {fmt(float(r['seconds']))} s"
                    row = [
                        rows_label(n),
                        m.key,
                        TOOL_LABEL[tool],
                        status,
                        f"> {fmt(float(limit))}" if limit else fmt(t),
                        fmt(r.get("cpu_seconds")),
                        fmt(r.get("iterations")) if ok else "",
                        fmt(scan),
                        fmt(r.get("queries")) if tool == "indb" else "",
                        "" if tool == "floor" else fmt(self.peak_mib(r), 4),
                        fmt(n / t / 1e6) if ok else "",
                        fmt(scan / floor) if tool == "indb" else "",
                        fmt(t / floor) if tool != "floor" else "1",
                        vs_indb if tool in ("statsmodels", "sklearn") else "",
                        fmt(self.coef_diff(n, m.key, tool), 2)
                        if tool in ("statsmodels", "sklearn")
                        else "",
                        str(r.get("path", "")) if ok else "",
                        fmt(r.get("load1"), 2),
                    ]
                    out.append(row)
        return out

    def text_table(self) -> str:
        rows = self.table_rows()
        widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(HEADERS)]
        line = "  ".join(h.ljust(w) for h, w in zip(HEADERS, widths, strict=True))
        out = [line, "-" * len(line)]
        out += ["  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) for r in rows]
        return "\n".join(out)

    # -- growth with rows --------------------------------------------------------------------
    def growth_rows(self) -> list[list[str]]:
        out: list[list[str]] = []
        for small, big in zip(self.sizes, self.sizes[1:], strict=False):
            k = big / small
            for m in self.models:
                series = [
                    ("floor", self.floor(small, m.key), self.floor(big, m.key)),
                    ("indb total", *(self._t(n, m.key, "indb") for n in (small, big))),
                    (
                        "indb s/scan",
                        *(self.per_scan(self.ok(n, m.key, "indb")) for n in (small, big)),
                    ),
                    ("statsmodels GLM", *(self._t(n, m.key, "statsmodels") for n in (small, big))),
                    ("scikit-learn", *(self._t(n, m.key, "sklearn") for n in (small, big))),
                ]
                for what, a, b in series:
                    if not (math.isfinite(a) or math.isfinite(b)):
                        continue
                    ratio = b / a
                    out.append(
                        [
                            f"{rows_label(small)} -> {rows_label(big)}",
                            m.key,
                            what,
                            fmt(a),
                            fmt(b),
                            fmt(ratio),
                            fmt(ratio / k),
                        ]
                    )
        return out

    def _t(self, n: int, model: str, tool: str) -> float:
        r = self.ok(n, model, tool)
        return float(r["seconds"]) if r else math.nan

    # -- where indb's time goes ------------------------------------------------------------
    def breakdown_rows(self) -> list[list[str]]:
        out: list[list[str]] = []
        for n in self.sizes:
            for m in self.models:
                r = self.ok(n, m.key, "indb")
                if not r:
                    continue
                total = float(r["seconds"])
                scans = r.get("scan_seconds") or []
                nulls = r.get("null_scan_seconds") or []
                py = total - float(r.get("engine_seconds", math.nan))
                gram_engine = float(np.mean(r["gram_engine_seconds"] or [math.nan]))
                prof = r.get("profile") or {}
                ops = prof.get("operators") or {}
                op_total = sum(ops.values()) or math.nan
                shares = ", ".join(
                    f"{k.lower().replace('_', ' ')} {100 * v / op_total:.0f}%"
                    for k, v in sorted(ops.items(), key=lambda kv: -kv[1])
                    if v / op_total >= 0.05
                )
                top = prof.get("optimizer_top") or ["", math.nan]
                floor_cpu = float((self.ok(n, m.key, "floor") or {}).get("cpu_seconds", math.nan))
                out.append(
                    [
                        rows_label(n),
                        m.key,
                        fmt(total),
                        f"{r.get('other_queries', '')} / {fmt(r.get('other_query_seconds'))}",
                        _sample_cell(r),
                        f"{len(scans)} / {fmt(float(sum(scans)))}",
                        f"{len(nulls)} / {fmt(float(sum(nulls)))}" if nulls else "0",
                        fmt(py),
                        fmt(self.per_scan(r)),
                        fmt(gram_engine),
                        fmt(r.get("explain_seconds")),
                        f"{top[0]} {fmt(top[1])}",
                        fmt(prof.get("cpu_time")),
                        fmt(float(prof.get("cpu_time") or math.nan) / floor_cpu),
                        shares,
                        fmt(r.get("gram_sql_chars")),
                    ]
                )
        return out

    # -- targets -----------------------------------------------------------------------------
    def target_lines(self) -> list[str]:
        lines: list[str] = []
        # 1. per-iteration time <= 2x the floor scan
        checks = []
        for n in self.sizes:
            for m in self.models:
                r = self.ok(n, m.key, "indb")
                if r:
                    checks.append((n, m.key, self.per_scan(r) / self.floor(n, m.key)))
        lines.append(
            self._verdict(
                "Per IRLS scan <= 2x the floor scan (numeric-only and with categoricals)",
                [(f"{rows_label(n)} {k}", v, v <= 2.0) for n, k, v in checks],
                "x",
            )
        )
        # 2. whole fit <= 3x one floor scan when the design compresses >= 10x
        checks2 = []
        for n in self.sizes:
            for m in self.models:
                c = self.compression(n, m.key)
                r = self.ok(n, m.key, "indb")
                if r and math.isfinite(c) and c >= 10:
                    v = float(r["seconds"]) / self.floor(n, m.key)
                    checks2.append((f"{rows_label(n)} {m.key} ({c:,.0f}x)", v, v <= 3.0))
        lines.append(
            self._verdict(
                "Whole fit <= 3x one floor scan when the design compresses >= 10x", checks2, "x"
            )
        )
        # 3. total fit at the largest size >= 10x faster than the fastest in-memory reference
        big = 10**7 if 10**7 in self.sizes else self.sizes[-1]
        checks3 = []
        notes = []
        for m in self.models:
            r = self.ok(big, m.key, "indb")
            refs = [(t, self.ok(big, m.key, t)) for t in ("statsmodels", "sklearn")]
            done = [(t, float(x["seconds"])) for t, x in refs if x]
            if r and done:
                t, best = min(done, key=lambda kv: kv[1])
                v = best / float(r["seconds"])
                checks3.append((f"{m.key} (vs {TOOL_LABEL[t]})", v, v >= 10.0))
            elif r and (
                limits := [
                    float(x["timeout_seconds"])
                    for t, _ in refs
                    if (x := self.get(big, m.key, t)) and x.get("timeout_seconds")
                ]
            ):
                v = min(limits) / float(r["seconds"])
                # a timeout only bounds the ratio from below: below 10 it settles nothing
                checks3.append(
                    (
                        f"{m.key} (no reference finished; lower bound from the time limit)",
                        v,
                        True if v >= 10.0 else None,
                    )
                )
            elif r:
                failed = [
                    f"{TOOL_LABEL[t]}: {(self.get(big, m.key, t) or {}).get('status', 'not run')}"
                    for t, _ in refs
                ]
                notes.append(f"{m.key}: no reference finished ({'; '.join(failed)})")
        head = f"Total fit at {rows_label(big)} >= 10x faster than the fastest in-memory reference"
        lines.append(self._verdict(head, checks3, "x faster", notes))
        # 4. indb peak memory < 1 GiB at every size
        checks4 = [
            (f"{rows_label(n)} {m.key}", self.peak_mib(r), self.peak_mib(r) < 1024)
            for n in self.sizes
            for m in self.models
            if (r := self.ok(n, m.key, "indb"))
        ]
        lines.append(self._verdict("indb peak RSS < 1 GiB at every size", checks4, " MiB"))
        # 5. time linear in rows within 20%
        checks5 = []
        for small, big2 in zip(self.sizes, self.sizes[1:], strict=False):
            k = big2 / small
            for m in self.models:
                a, b = self._t(small, m.key, "indb"), self._t(big2, m.key, "indb")
                if math.isfinite(a) and math.isfinite(b):
                    v = (b / a) / k
                    label = f"{m.key} {rows_label(small)}->{rows_label(big2)}"
                    if v < 0.8:
                        label += " (sub-linear)"
                    checks5.append((label, v, 0.8 <= v <= 1.2))
        sub = (
            [
                "sub-linear growth means fixed per-query costs (planning, Python) weigh more at "
                "the smaller size"
            ]
            if any(v < 0.8 for _, v, _ in checks5)
            else []
        )
        lines.append(
            self._verdict(
                "indb total time linear in rows within 20% (time ratio / rows ratio in 0.8-1.2)",
                checks5,
                "",
                sub,
            )
        )
        # 5b. the same growth set against the floor scan's own growth over the same sizes:
        # a plain scan is not linear here either (fixed costs, file cache), so this says
        # whether indb grows like reading the data does
        checks5b = []
        for small, big2 in zip(self.sizes, self.sizes[1:], strict=False):
            for m in self.models:
                a, b = self._t(small, m.key, "indb"), self._t(big2, m.key, "indb")
                fa, fb = self.floor(small, m.key), self.floor(big2, m.key)
                if all(math.isfinite(x) for x in (a, b, fa, fb)):
                    v = (b / a) / (fb / fa)
                    checks5b.append(
                        (f"{m.key} {rows_label(small)}->{rows_label(big2)}", v, v <= 1.2)
                    )
        lines.append(
            self._verdict(
                "indb total time grows no faster than the floor scan's, within 20% (indb time "
                "ratio / floor time ratio <= 1.2)",
                checks5b,
                "",
            )
        )
        return lines

    @staticmethod
    def _verdict(
        title: str,
        checks: list[tuple[str, float, bool | None]],
        unit: str,
        notes: Sequence[str] = (),
    ) -> str:
        """One bullet: overall state, then each check (ok / no / undetermined)."""
        if not checks and not notes:
            return f"- **{title}**: not measured in this run."
        decided = [ok for *_, ok in checks if ok is not None]
        if not decided:
            state = "not established"
        else:
            met = sum(1 for ok in decided if ok)
            state = (
                "met"
                if met == len(decided)
                else ("not met" if met == 0 else f"met in {met} of {len(decided)}")
            )
            if len(decided) < len(checks):
                state += f" ({len(checks) - len(decided)} undetermined)"
        word = {True: "ok", False: "no", None: "undetermined"}
        parts = [f"{label}: {fmt(v)}{unit} ({word[ok]})" for label, v, ok in checks]
        text = f"- **{title}**: {state}." + (" " + "; ".join(parts) + "." if parts else "")
        if notes:
            text += " " + "; ".join(notes) + "."
        return text

    def sanity_lines(self) -> list[str]:
        n = 10**6 if 10**6 in self.sizes else self.sizes[0]
        d = self.coef_diff(n, "poisson", "statsmodels")
        if not math.isfinite(d):
            r = self.get(n, "poisson", "statsmodels") or {}
            return [
                f"sanity: indb vs statsmodels on the {rows_label(n)} Poisson case: not "
                f"compared (statsmodels: {r.get('status', 'not run')})"
            ]
        verdict = "PASS" if d <= SANITY_RTOL else "FAIL"
        return [
            f"sanity: indb vs statsmodels coefficients, Poisson with offset, {rows_label(n)} "
            f"rows: max relative difference {d:.1e} (rtol {SANITY_RTOL:g}): {verdict}"
        ]

    # -- the reading -------------------------------------------------------------------------
    def reading_lines(self) -> list[str]:
        """Plain statements of where the time goes, generated from this run's numbers."""
        out: list[str] = []
        for n in self.sizes:
            parts = []
            for m in self.models:
                r = self.ok(n, m.key, "indb")
                if not r:
                    continue
                scan = self.per_scan(r)
                floor = self.floor(n, m.key)
                in_db = float(np.mean(r.get("gram_engine_seconds") or [math.nan]))
                plan = float(r.get("explain_seconds") or math.nan)
                exec_only = max(in_db - plan, 0.0)  # both are noisy; never below zero
                prof = r.get("profile") or {}
                floor_cpu = float((self.ok(n, m.key, "floor") or {}).get("cpu_seconds", math.nan))
                cpu_ratio = float(prof.get("cpu_time") or math.nan) / floor_cpu
                parts.append(
                    f"`{m.key}` {fmt(scan)} s/scan = {fmt(scan / floor)}x floor: planning "
                    f"{fmt(plan)} s ({fmt(100 * plan / scan, 2)}%), execution about "
                    f"{fmt(exec_only)} s ({fmt(exec_only / floor)}x floor), Python "
                    f"{fmt(scan - in_db)} s; CPU of one IRLS query {fmt(cpu_ratio)}x the "
                    f"floor's; {r.get('queries')} queries, whole fit "
                    f"{fmt(float(r['seconds']) / floor)}x floor"
                )
            if parts:
                out.append(f"- {rows_label(n)} rows: " + "; ".join(parts) + ".")
        peaks = [
            (self.peak_mib(r), float(r.get("start_kib") or 0) / 1024)
            for n in self.sizes
            for m in self.models
            if (r := self.ok(n, m.key, "indb"))
        ]
        if peaks:
            top = max(peaks)
            out.append(
                f"- indb's largest peak RSS was {fmt(top[0], 4)} MiB, of which about "
                f"{fmt(top[1], 3)} MiB was the interpreter and libraries before the fit."
            )
        for n in self.sizes:
            parts = []
            for m in self.models:
                indb = self.ok(n, m.key, "indb")
                for tool in ("statsmodels", "sklearn"):
                    r = self.get(n, m.key, tool)
                    if not r or not indb:
                        continue
                    if r.get("status") == "ok":
                        ratio = float(r["seconds"]) / float(indb["seconds"])
                        parts.append(
                            f"{TOOL_LABEL[tool]} on `{m.key}` {fmt(ratio)}x indb's time, "
                            f"{fmt(self.peak_mib(r), 4)} MiB"
                        )
                    else:
                        parts.append(f"{TOOL_LABEL[tool]} on `{m.key}`: {r.get('status')}")
            if parts:
                out.append(f"- References at {rows_label(n)} rows: " + "; ".join(parts) + ".")
        return out

    # -- Markdown ----------------------------------------------------------------------------
    def markdown(self) -> str:
        run = self.run
        md_lines = [
            "# indb fit benchmark: results",
            "",
            f"Measured {run.get('finished') or dt.datetime.now().strftime('%Y-%m-%d %H:%M')}"
            " by `benchmarks/bench_fit.py` (see `benchmarks/README.md` for the columns). "
            "Regenerate with the command below; this file is overwritten by each run."
            + (
                f" This text was rewritten from the saved measurements "
                f"(`{run['regenerated_from']}`, `--report-only`); the numbers are that run's."
                if run.get("regenerated_from")
                else ""
            ),
            "",
            "## Command",
            "",
            "```bash",
            run["command"],
            "```",
            "",
            f"Whole run: {run['elapsed_seconds'] / 60:.1f} min. Reference fits capped at "
            f"{run['mem_cap_bytes'] / 1024**3:.1f} GiB of address space (RLIMIT_AS) and "
            f"{run['timeout']:.0f} s each. Load average (1 min) at start "
            f"{run['load_start'][0]:.2f}, at end {run['load_end'][0]:.2f}; the `load` column "
            "is the 1-minute load average just before each measurement. On a shared machine a "
            "load above the core count means other work competed for the CPUs, which inflates "
            "wall times (CPU seconds are less affected).",
            "",
            "## Machine",
            "",
            *(run.get("machine") or machine_lines()),
            f"- indb sources measured (snapshot taken at the start of the run): sha256 "
            f"{run['indb_source_hash']} of `indb/*`",
            "",
            "## Data and models",
            "",
            "Invented data (`benchmarks/bench_data.py`, seed "
            f"{bench_data.SEED}): 10 numeric predictors x1..x10, categorical c6 (6 levels) and "
            "c40 (40 levels), exposure in (0.05, 1], a Poisson claim count with offset "
            "ln(exposure) and a 0/1 flag from a logistic model.",
            "",
            *[
                f"- `{d['path']}`: {d['rows']:,} rows, {d['bytes'] / 1024**2:.0f} MiB"
                + (f" (written in {d['seconds']:.0f} s)" if d["written_now"] else " (cached)")
                for d in run["data"]
            ],
            "",
            "| model | family | predictors | p | columns read |",
            "|---|---|---|---|---|",
            *[
                f"| {m.key} | {m.family}{' + offset ' + m.offset if m.offset else ''} | "
                f"{', '.join(m.predictors)} | {m.p} | {len(m.columns)} |"
                for m in self.models
            ],
            "",
            "## Side by side",
            "",
            *markdown_table(HEADERS, self.table_rows()),
            "",
            *[f"{line}" for line in self.sanity_lines()],
            "",
            "## Growth with rows",
            "",
            *markdown_table(
                ("rows", "model", "what", "time small s", "time big s", "ratio", "ratio / rows"),
                self.growth_rows(),
            ),
            "",
            "## Where indb's time goes",
            "",
            "Pre-fit = every query and statement that is not an IRLS scan: the one-row "
            "look at the data, the compression check, the profile (or the fold and its "
            "tables) and the levels scan; sample start = the "
            "seconds to copy the hashed sample, then its IRLS scans on that small table; IRLS "
            "and null-refit scans (on the whole table) come from the iteration log; Python = "
            "wall time minus time inside DuckDB (building and "
            "rendering the SQL trees, solving, converting results). For one IRLS query (the last "
            "fit-phase scan, run again alone): planning = `EXPLAIN` (parse, bind, optimize, "
            'physical plan, no execution), best of 3, to set against "in DuckDB s/scan" '
            "(the mean time of the IRLS queries inside the fit, planning included); the "
            "busiest optimizer pass, the CPU seconds of the query's operators (all threads) and "
            "the operator shares come from DuckDB's detailed profile of one more run of that "
            "query (profiling adds some overhead of its own); CPU / floor CPU sets those CPU "
            "seconds against the floor scan's (CPU time suffers less than wall time from other "
            "load on the machine).",
            "",
            *markdown_table(
                (
                    "rows",
                    "model",
                    "total s",
                    "pre-fit n / s",
                    "sample start copy s + n / s",
                    "IRLS n / s",
                    "null refit n / s",
                    "Python s",
                    "s/scan",
                    "in DuckDB s/scan",
                    "planning s",
                    "top optimizer pass s",
                    "query CPU s",
                    "CPU / floor CPU",
                    "operator shares",
                    "SQL chars",
                ),
                self.breakdown_rows(),
            ),
            "",
            "## Targets (measured, not assumed)",
            "",
            *self.target_lines(),
            "",
            "## Reading",
            "",
            *self.reading_lines(),
            "",
        ]
        return "\n".join(md_lines)


def markdown_table(headers: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    def esc(s: str) -> str:
        return s.replace("|", "\\|")

    out = ["| " + " | ".join(headers) + " |", "|" + "---|" * len(headers)]
    out += ["| " + " | ".join(esc(c) for c in r) + " |" for r in rows]
    return out


def cpu_and_memory() -> tuple[str, int]:
    """The CPU model name and the machine's memory in bytes, from /proc."""
    cpu, mem = "?", 0
    with open("/proc/cpuinfo") as fh:
        for line in fh:
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    with open("/proc/meminfo") as fh:
        for line in fh:
            if line.startswith("MemTotal:"):
                mem = int(line.split()[1]) * 1024
                break
    return cpu, mem


def indb_commit() -> tuple[str, bool | None]:
    """The repository's short commit and whether indb/ differs from it (``"?"`` and None
    outside a git checkout)."""
    here = os.path.dirname(os.path.abspath(__file__))
    try:
        commit = subprocess.run(
            ["git", "-C", here, "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
        changed = subprocess.run(
            ["git", "-C", here, "diff", "--quiet", "HEAD", "--", "../indb"],
            capture_output=True,
        ).returncode
    except (OSError, subprocess.CalledProcessError):
        return "?", None
    return commit, bool(changed)


def machine_lines() -> list[str]:
    cpu, mem_bytes = cpu_and_memory()
    mem = f"{mem_bytes / 1024**3:.1f} GiB" if mem_bytes else "?"
    nproc = len(os.sched_getaffinity(0))
    versions = []
    for pkg in ("duckdb", "numpy", "scipy", "pyarrow", "sqlglot", "statsmodels", "scikit-learn"):
        try:
            versions.append(f"{pkg} {md.version(pkg)}")
        except md.PackageNotFoundError:
            versions.append(f"{pkg} (not installed)")
    commit, changed = indb_commit()
    dirty = ""
    if changed is not None:
        dirty = " with uncommitted changes under indb/" if changed else " (indb/ unchanged)"
    return [
        f"- CPU: {cpu}; nproc: {nproc}; memory: {mem}",
        f"- OS: {platform.platform()}; Python {platform.python_version()}",
        f"- {', '.join(versions)}",
        f"- repository at commit {commit}{dirty}",
    ]
