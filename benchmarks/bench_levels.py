"""Fits with many categorical levels: wall time, engine time, solver time and peak memory.

Run from the repository root::

    .venv/bin/python benchmarks/bench_levels.py                       # 3,000 and 50,000 levels
    .venv/bin/python benchmarks/bench_levels.py --cases 3000x1e5 --no-write
    .venv/bin/python benchmarks/bench_levels.py --indb-src /tmp/old   # measure another copy

Each case is a DuckDB table (written once to ``benchmarks/data/levels_<levels>_<rows>.duckdb``,
git-ignored) of invented rows: a factor ``big`` with the given number of levels (level sizes
drawn from a skewed distribution, so some levels are rare), a factor ``region`` of 50 levels,
two numeric columns ``x1``, ``x2``, an ``exposure`` in (0.1, 1] and a Poisson ``claims`` with
mean exposure * exp(eta). The model is Poisson with offset ln(exposure) and all four
predictors (p = levels + 51).

Each fit runs in a fresh process (so its peak resident memory, ``VmHWM``, is its own) with
its address space capped by ``RLIMIT_AS`` (``--mem-cap-gib``), so a fit that needs more
memory fails with ``MemoryError`` instead of taking the machine down. The engine's time is
the sum of every query's time as the DuckDB adapter measures it (``Engine.last_seconds``);
everything else in the ``indb.fit`` call (building SQL, assembling and solving X'WX,
inference) is counted as "Python".

Every measurement is kept in ``benchmarks/data/levels_results.json`` (by label and case) and
the whole set goes into ``benchmarks/RESULTS.md`` between the markers of the "Many levels"
section, which ``bench_fit.py`` keeps when it rewrites the rest of the file. ``--label``
names the code measured (``--indb-src`` with ``--label "dense solver (f64324f)"`` measured
the code before the block solver).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import re
import resource
import subprocess
import sys
import time
from typing import Any

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
MARK = "LEVELS_JSON "
BEGIN = "<!-- bench_levels.py: begin -->"
END = "<!-- bench_levels.py: end -->"
SEED = 20261111


def parse_case(text: str) -> tuple[int, int]:
    """``3000x1e5`` -> (3000 levels, 100000 rows)."""
    levels, rows = text.lower().split("x")
    return int(float(levels)), int(float(rows))


def table_path(data_dir: str, levels: int, rows: int) -> str:
    return os.path.join(data_dir, f"levels_{levels}_{rows}.duckdb")


def write_table(path: str, levels: int, rows: int, seed: int = SEED) -> None:
    """Invent the rows of one case (fixed seed) and write them as table ``pol``."""
    import duckdb
    import numpy as np
    import pyarrow as pa

    rng = np.random.default_rng(seed + levels)
    # level sizes ~ a Zipf-like law: the first levels are common, the last ones rare (every
    # level gets at least one row)
    weights = 1.0 / np.arange(1, levels + 1) ** 0.6
    drawn = rng.choice(levels, rows - levels, p=weights / weights.sum())
    big = np.concatenate([np.arange(levels), drawn])
    rng.shuffle(big)
    region = rng.integers(0, 50, rows)
    x1 = rng.normal(size=rows)
    x2 = rng.uniform(0, 10, rows)
    exposure = rng.uniform(0.1, 1.0, rows)
    eta = (
        -1.5
        + rng.normal(0, 0.3, levels)[big]
        + rng.normal(0, 0.2, 50)[region]
        + 0.2 * x1
        - 0.03 * x2
    )
    claims = rng.poisson(exposure * np.exp(eta))
    width = len(str(levels))
    table = pa.table(
        {
            "id": np.arange(rows),
            "big": pa.array([f"B{i:0{width}d}" for i in range(levels)]).take(pa.array(big)),
            "region": pa.array([f"R{i:02d}" for i in range(50)]).take(pa.array(region)),
            "x1": x1,
            "x2": x2,
            "exposure": exposure,
            "claims": claims,
        }
    )
    tmp = path + ".tmp"
    if os.path.exists(tmp):
        os.remove(tmp)
    con = duckdb.connect(tmp)
    con.register("src", table)
    con.execute("CREATE TABLE pol AS SELECT * FROM src")
    con.close()
    os.replace(tmp, path)


# -- the measured fit (child process) --------------------------------------------------------


def vm_kib(field: str) -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return -1


def cpu_seconds() -> float:
    """User + system CPU seconds of this process (all its threads) so far."""
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def child(job: dict[str, Any]) -> dict[str, Any]:
    cap = int(job["mem_cap_gib"] * 2**30)
    resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    if job.get("indb_src"):
        sys.path.insert(0, job["indb_src"])
    import duckdb

    import indb
    from indb.engines.duckdb import DuckDBEngine

    class TimedEngine(DuckDBEngine):
        """The stock adapter, adding up the engine time of every statement."""

        engine_seconds = 0.0
        queries = 0

        def fetch_columns(self, sql: str):  # noqa: ANN201 - the adapter's own type
            out = super().fetch_columns(sql)
            TimedEngine.engine_seconds += self.last_seconds
            TimedEngine.queries += 1
            return out

        def execute(self, sql: str):  # noqa: ANN201
            out = super().execute(sql)
            TimedEngine.engine_seconds += self.last_seconds
            return out

    con = duckdb.connect(job["path"], read_only=True)
    engine = TimedEngine(con)
    start_kib = vm_kib("VmRSS")
    cpu0 = cpu_seconds()
    t0 = time.perf_counter()
    try:
        res = indb.fit(
            "pol",
            "claims",
            "poisson",
            db=engine,
            offset="ln(exposure)",
            predictors=["big", "region", "x1", "x2"],
            max_levels=job["max_levels"],
        )
    except MemoryError:
        return {
            "status": "out of memory",
            "seconds": time.perf_counter() - t0,
            "peak_kib": vm_kib("VmHWM"),
            "indb_file": indb.__file__,
        }
    wall = time.perf_counter() - t0
    out: dict[str, Any] = {
        "status": "ok",
        "indb_file": indb.__file__,
        "seconds": wall,
        "cpu_seconds": cpu_seconds() - cpu0,
        "engine_seconds": TimedEngine.engine_seconds,
        "queries": TimedEngine.queries,
        "iterations": res.iterations,
        "converged": res.converged,
        "p": len(res.terms),
        "aliased": len(res.aliased_terms),
        "deviance": res.deviance,
        "peak_kib": vm_kib("VmHWM"),
        "start_kib": start_kib,
        "path": res.path,
    }
    out["score_max"] = score_equations(con, res)
    if job.get("save"):
        import numpy as np

        np.savez(job["save"], terms=np.array(res.terms), params=res.estimates, se=res.std_errors)
        out["params_file"] = job["save"]
    return out


def score_equations(con: Any, res: Any) -> float:
    """The largest relative score of the Poisson likelihood at the estimate: for every
    design column, |sum (y - mu) x| / max(sum y |x|, 1), with mu computed by DuckDB from
    the coefficients (KKT of the maximum likelihood estimate: 0 up to rounding)."""
    import pandas as pd

    coef = pd.DataFrame({"term": res.terms, "b": [0.0 if b != b else b for b in res.estimates]})
    con.register("coef", coef)
    sql = """
        WITH m AS (
            SELECT k.big, k.region, k.claims, k.x1, k.x2,
                   k.exposure * exp(
                       (SELECT b FROM coef WHERE term = 'intercept')
                       + coalesce(cb.b, 0) + coalesce(cr.b, 0)
                       + (SELECT b FROM coef WHERE term = 'x1') * k.x1
                       + (SELECT b FROM coef WHERE term = 'x2') * k.x2) AS mu
            FROM pol k
            LEFT JOIN coef cb ON cb.term = 'big=' || k.big
            LEFT JOIN coef cr ON cr.term = 'region=' || k.region
        )
        SELECT max(abs(s) / greatest(t, 1)) FROM (
            SELECT sum(claims - mu) AS s, sum(claims) AS t FROM m GROUP BY big
            UNION ALL SELECT sum(claims - mu), sum(claims) FROM m GROUP BY region
            UNION ALL SELECT sum(claims - mu), sum(claims) FROM m
            UNION ALL SELECT sum((claims - mu) * x1), sum(claims * abs(x1)) FROM m
            UNION ALL SELECT sum((claims - mu) * x2), sum(claims * x2) FROM m
        )
    """
    return float(con.execute(sql).fetchone()[0])


def run_case(args: argparse.Namespace, label: str, levels: int, rows: int) -> dict[str, Any]:
    path = table_path(args.data_dir, levels, rows)
    if not os.path.exists(path):
        t0 = time.perf_counter()
        write_table(path, levels, rows)
        print(f"wrote {path} in {time.perf_counter() - t0:.1f} s", flush=True)
    job = {
        "path": path,
        "max_levels": max(levels, 2),
        "mem_cap_gib": args.mem_cap_gib,
        "indb_src": args.indb_src,
        # the estimates, for the agreement between two codes on the same case
        "save": os.path.join(
            args.data_dir, f"est_{re.sub(r'[^A-Za-z0-9]+', '_', label)}_{levels}_{rows}.npz"
        ),
    }
    env = dict(os.environ, PYTHONPATH=args.indb_src or ROOT)
    load = os.getloadavg()[0]
    t0 = time.perf_counter()
    try:
        proc = subprocess.run(
            [sys.executable, os.path.abspath(__file__), "--child", json.dumps(job)],
            capture_output=True,
            text=True,
            env=env,
            timeout=args.timeout,
            check=False,
        )
    except subprocess.TimeoutExpired:
        return {
            "status": f"timeout (> {args.timeout:.0f} s)",
            "seconds": None,
            "levels": levels,
            "rows": rows,
            "load": load,
        }
    for line in proc.stdout.splitlines():
        if line.startswith(MARK):
            out = json.loads(line[len(MARK) :])
            break
    else:
        tail = (proc.stderr.strip().splitlines() or ["no output"])[-1]
        out = {
            "status": f"failed (exit {proc.returncode}): {tail[:200]}",
            "seconds": time.perf_counter() - t0,
        }
    out.update(levels=levels, rows=rows, load=load)
    return out


# -- report ------------------------------------------------------------------------------------


def _f(v: Any, fmt: str = ".3g") -> str:
    return "" if v is None else format(v, fmt)


def _commit() -> str:
    try:
        out = subprocess.run(
            ["git", "-C", ROOT, "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=False,
        ).stdout.strip()
    except OSError:
        out = ""
    return out or "?"


def section(results: list[dict[str, Any]]) -> str:
    """The Markdown section: every stored measurement, by case, then by code measured."""
    lines = [
        BEGIN,
        "## Many levels (`benchmarks/bench_levels.py`)",
        "",
        "Poisson with offset ln(exposure) on `big` (the levels below) + `region` (50 levels) "
        "+ `x1` + `x2`, invented rows (see `benchmarks/README.md`); each fit in its own "
        f"process on {platform.machine()}, {os.cpu_count()} cores, address space capped. "
        "wall / CPU s: the `indb.fit` call (CPU: user + system of the process, DuckDB's "
        "threads included); engine s: every query's time as the adapter measures it; "
        "Python s: wall minus engine (SQL building, assembling and solving X'WX, inference); "
        "peak: the process's peak resident memory (VmHWM, about 150 MiB of it the "
        "interpreter and libraries); load: the 1-minute load average at the start (the "
        "machine is shared: above 2, other work competed for the cores and wall times grow, "
        "CPU seconds much less).",
        "",
        "| code measured | levels | rows | p | status | wall s | CPU s | engine s | Python s "
        "| iterations | peak MiB | score | load | when |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in sorted(results, key=lambda r: (r["rows"], r["levels"], r.get("when", ""))):
        eng = r.get("engine_seconds")
        py = r["seconds"] - eng if eng is not None and r.get("seconds") is not None else None
        peak = r["peak_kib"] / 1024 if r.get("peak_kib") else None
        lines.append(
            f"| {r.get('label', '')} | {r['levels']:,} | {r['rows']:,} | {_f(r.get('p'), ',')} "
            f"| {r['status']} | {_f(r.get('seconds'))} | {_f(r.get('cpu_seconds'))} | "
            f"{_f(eng)} | {_f(py)} | {_f(r.get('iterations'), 'd')} | {_f(peak, '.0f')} | "
            f"{_f(r.get('score_max'), '.1e')} | {_f(r.get('load'), '.1f')} | "
            f"{r.get('when', '')} |"
        )
    lines += ["", *agreement_lines(results), END]
    return "\n".join(lines) + "\n"


def agreement_lines(results: list[dict[str, Any]]) -> list[str]:
    """For each case measured by two codes with saved estimates: how far they agree."""
    import numpy as np

    out = [
        "score: the largest relative score |sum (y - mu) x| / sum y |x| over the design's "
        "columns at the estimate, mu computed by DuckDB from the coefficients (the "
        "likelihood's first-order conditions; 0 up to rounding)."
    ]
    by_case: dict[tuple[int, int], list[dict[str, Any]]] = {}
    for r in results:
        if r.get("params_file") and os.path.exists(r["params_file"]):
            by_case.setdefault((r["levels"], r["rows"]), []).append(r)
    for (levels, rows), rs in sorted(by_case.items()):
        for i, a in enumerate(rs):
            for b in rs[i + 1 :]:
                x, y = np.load(a["params_file"]), np.load(b["params_file"])
                if list(x["terms"]) != list(y["terms"]):
                    continue
                ok = np.isfinite(x["params"]) & np.isfinite(y["params"])
                dp = np.abs(x["params"][ok] - y["params"][ok])
                dse = np.abs(x["se"][ok] - y["se"][ok]) / x["se"][ok]
                out.append(
                    f"{levels:,} levels, {rows:,} rows: {a['label']} and {b['label']} agree to "
                    f"{dp.max():.1e} in the estimates (largest absolute difference; "
                    f"{(dp / x['se'][ok]).max():.1e} standard errors) and {dse.max():.1e} "
                    "relative in the standard errors."
                )
    return out


def store(path: str, new: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Add ``new`` to the stored measurements (replacing one of the same label and case)."""
    old: list[dict[str, Any]] = []
    if os.path.exists(path):
        with open(path) as fh:
            old = json.load(fh)
    keys = {(r["label"], r["levels"], r["rows"]) for r in new}
    kept = [r for r in old if (r["label"], r["levels"], r["rows"]) not in keys]
    out = kept + new
    with open(path, "w") as fh:
        json.dump(out, fh, indent=1)
    return out


def write_section(path: str, text: str) -> None:
    """Replace this script's section of ``path`` (or append it)."""
    old = ""
    if os.path.exists(path):
        with open(path) as fh:
            old = fh.read()
    if BEGIN in old and END in old:
        head, rest = old.split(BEGIN, 1)
        tail = rest.split(END, 1)[1].lstrip("\n")
        new = head + text + ("\n" + tail if tail else "")
    else:
        new = old.rstrip("\n") + "\n\n" + text
    with open(path, "w") as fh:
        fh.write(new)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument(
        "--cases",
        default="3000x1e5,50000x1e6",
        help="comma-separated LEVELSxROWS (default 3000x1e5,50000x1e6)",
    )
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument(
        "--mem-cap-gib",
        type=float,
        default=8.0,
        help="address-space cap of each fit process (default 8)",
    )
    ap.add_argument("--timeout", type=float, default=1800.0, help="seconds per fit")
    ap.add_argument("--indb-src", default=None, help="import indb from this directory")
    ap.add_argument(
        "--label", default=None, help="name of the code measured (default: indb at <commit>)"
    )
    ap.add_argument("--out", default=os.path.join(HERE, "RESULTS.md"))
    ap.add_argument("--no-write", action="store_true", help="measure and print only")
    ap.add_argument(
        "--report-only", action="store_true", help="rewrite the section from stored results"
    )
    ap.add_argument("--child", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(MARK + json.dumps(child(json.loads(args.child))), flush=True)
        return
    os.makedirs(args.data_dir, exist_ok=True)
    raw = os.path.join(args.data_dir, "levels_results.json")
    results: list[dict[str, Any]] = []
    if not args.report_only:
        label = args.label or f"indb at {_commit()}"
        for case in args.cases.split(","):
            levels, rows = parse_case(case)
            r = run_case(args, label, levels, rows)
            r.update(label=label, when=_dt.datetime.now().strftime("%Y-%m-%d %H:%M"))
            print(json.dumps(r), flush=True)
            results.append(r)
    if args.no_write:
        print(section(results))
        return
    text = section(store(raw, results))
    print(text)
    write_section(args.out, text)


if __name__ == "__main__":
    main()
