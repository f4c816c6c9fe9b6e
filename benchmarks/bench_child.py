"""One measured fit, run in its own process by ``bench_fit.py``.

Usage (internal): ``python benchmarks/bench_child.py '<job as JSON>'``. The job names the
tool (``indb``, ``statsmodels`` or ``sklearn``), the Parquet file and the model key. The
result is printed as one line ``BENCH_JSON {...}`` on standard output. Each fit runs in a
fresh process so that its peak resident memory (``VmHWM``) is its own.

Reference fits (statsmodels, scikit-learn) cap their address space with ``RLIMIT_AS`` first,
so a fit that does not fit in memory fails with ``MemoryError`` (reported as
"out of memory") instead of taking the machine down.
"""

from __future__ import annotations

import json
import math
import os
import resource
import sys
import tempfile
import time
import traceback
from typing import Any

import bench_data
import numpy as np

MARK = "BENCH_JSON "


def vm_kib(field: str) -> int:
    """A ``/proc/self/status`` memory field (VmHWM = peak RSS, VmRSS = current) in KiB."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1])
    return -1


def cpu_seconds() -> float:
    """User + system CPU time of this process so far (all its threads)."""
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def model_by_key(key: str) -> bench_data.Model:
    return next(m for m in bench_data.MODELS if m.key == key)


# -- indb ------------------------------------------------------------------------------------


def run_indb(job: dict[str, Any]) -> dict[str, Any]:
    import duckdb

    import indb
    from indb.engines.duckdb import DuckDBEngine

    class RecordingEngine(DuckDBEngine):
        """The stock DuckDB adapter, noting each query's text and engine time."""

        def __init__(self) -> None:
            self.executed: list[tuple[str, float]] = []  # the adapter runs SETs on start
            # DuckDB's own memory cap: the table (up to 8 GB of Parquet at 1e8 rows) never
            # has to fit; spill files go to the temp directory
            super().__init__(
                None, memory_limit=job.get("memory_limit"), temp_directory=job.get("temp_directory")
            )
            self.calls: list[tuple[str, float]] = []

        def fetch_columns(self, sql: str) -> dict[str, np.ndarray]:
            out = super().fetch_columns(sql)
            self.calls.append((sql, self.last_seconds))
            return out

        def execute(self, sql: str):  # noqa: ANN201 - the adapter's own return type
            out = super().execute(sql)
            self.executed.append((sql, self.last_seconds))
            return out

    model = model_by_key(job["model"])
    rss_before = vm_kib("VmRSS")
    engine = RecordingEngine()
    cpu0 = cpu_seconds()
    t0 = time.perf_counter()
    res = indb.fit(
        job["path"],
        model.response,
        model.family,
        db=engine,
        offset=model.offset,
        predictors=list(model.predictors),
    )
    wall = time.perf_counter() - t0
    cpu = cpu_seconds() - cpu0
    peak = vm_kib("VmHWM")  # read before the planning probes below

    fit_recs = [r for r in res.iteration_log if r.phase == "fit"]
    null_recs = [r for r in res.iteration_log if r.phase == "null"]
    sample_recs = [r for r in res.iteration_log if r.phase == "sample"]
    # IRLS scans: gram_query's and the log-link scan's sums (gamma's later scans have no s_*)
    gram = [(sql, s) for sql, s in engine.calls if "s_0_0" in sql or '"r_0"' in sql]
    # the sample start's scans come first (on its small table), then the fit's
    n_sample_scans = sum(1 + r.step_halvings for r in sample_recs)
    n_fit_scans = sum(1 + r.step_halvings for r in fit_recs)
    fit_gram = gram[n_sample_scans : n_sample_scans + n_fit_scans]
    sample_copy = sum(
        s for sql, s in engine.executed if sql.startswith("CREATE") and "indb_sample_" in sql
    )
    # statements run for their effect (the fold's and the sample's tables, settings)
    executed_other = sum(s for _, s in engine.executed) - sample_copy
    engine_total = sum(s for _, s in engine.calls) + sum(s for _, s in engine.executed)
    out: dict[str, Any] = {
        "status": "ok",
        "seconds": wall,
        "cpu_seconds": cpu,
        "fit_seconds": res.seconds,
        "indb_file": indb.__file__,
        "iterations": res.iterations,
        "converged": res.converged,
        "path": res.path,
        "scan_seconds": [r.seconds for r in fit_recs],
        "null_scan_seconds": [r.seconds for r in null_recs],
        "queries": len(engine.calls),
        "engine_seconds": engine_total,
        "gram_engine_seconds": [s for _, s in fit_gram],
        "sample_scan_seconds": [r.seconds for r in sample_recs],
        "sample_copy_seconds": sample_copy,
        "other_query_seconds": sum(s for _, s in engine.calls)
        - sum(s for _, s in gram)
        + executed_other,
        "other_queries": len(engine.calls)
        - len(gram)
        + sum(1 for sql, _ in engine.executed if not sql.startswith(("SET", "DROP")))
        - (1 if sample_copy else 0),
        "terms": res.terms,
        "params": [float(v) for v in res.estimates],
        "deviance": res.deviance,
        "peak_kib": peak,
        "start_kib": rss_before,
    }
    # Planning versus execution of one IRLS query (the last fit-phase scan, with coefficients):
    # EXPLAIN parses, binds, optimizes and builds the physical plan without running it; the
    # full run's time is already in gram_engine_seconds, so the query runs only once more,
    # under DuckDB's profiler.
    # (not on the compressed route: its folded table lived only during the fit)
    if fit_gram and not any(t in fit_gram[-1][0] for t in ("indb_fold_", "indb_rows_")):
        sql = fit_gram[-1][0]
        con = duckdb.connect()
        DuckDBEngine(con)  # the session settings indb uses (optimizer rules, progress bar)
        out["gram_sql_chars"] = len(sql)
        out["explain_seconds"] = _best(lambda: con.execute("EXPLAIN " + sql).fetchall())
        out["profile"] = _profile(con, sql)
        con.close()
    engine.close()
    return out


def _profile(con: Any, sql: str) -> dict[str, Any]:
    """DuckDB's detailed profile of one run: planner/optimizer time, time by operator type."""
    with tempfile.TemporaryDirectory() as tmp:
        target = os.path.join(tmp, "profile.json")
        con.execute("SET enable_profiling = 'json'")
        con.execute("SET profiling_mode = 'detailed'")
        con.execute("SET profiling_output = '" + target.replace("'", "''") + "'")
        con.execute(sql).fetchall()
        con.execute("PRAGMA disable_profiling")
        with open(target) as fh:
            prof = json.load(fh)
    by_type: dict[str, float] = {}

    def walk(node: dict[str, Any]) -> None:
        kind = str(node.get("type") or node.get("name") or "?")
        by_type[kind] = by_type.get(kind, 0.0) + float(node.get("timing") or 0.0)
        for child in node.get("children") or ():
            walk(child)

    for node in prof.get("operator") or ():
        walk(node)
    opt = {k: float(v) for k, v in (prof.get("optimizer") or {}).items() if k != "total_time"}
    top = max(opt.items(), key=lambda kv: kv[1]) if opt else ("", 0.0)
    query = prof.get("query") or {}
    return {
        "planner": float((prof.get("planner") or {}).get("total_time") or 0.0),
        "optimizer": float((prof.get("optimizer") or {}).get("total_time") or 0.0),
        "optimizer_top": [top[0], top[1]],
        "physical_planner": float((prof.get("physical_planner") or {}).get("total_time") or 0.0),
        "latency": float(query.get("total_time") or 0.0),
        "cpu_time": float(query.get("cpu_time") or 0.0),
        "operators": by_type,
    }


def _best(call, repeats: int = 3) -> float:
    best = math.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        call()
        best = min(best, time.perf_counter() - t0)
    return best


# -- in-memory references --------------------------------------------------------------------


def load_design(path: str, model: bench_data.Model) -> tuple[np.ndarray, ...]:
    """Read the model's columns and build the dense design (intercept first, then numerics,
    then one 0/1 column per non-reference level, levels in ascending string order).

    The reference level is the most frequent one (ties: smallest string), as in indb, so the
    coefficients line up term by term.
    """
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    table = pq.read_table(path, columns=list(model.columns))
    n = table.num_rows
    y = table.column(model.response).to_numpy().astype(np.float64)
    exposure = table.column("exposure").to_numpy() if model.offset else None
    coded = []
    names = ["intercept", *model.numerics]
    for c in model.factors:
        enc = pc.dictionary_encode(table.column(c)).combine_chunks()
        codes = enc.indices.to_numpy()
        levels = enc.dictionary.to_pylist()
        counts = np.bincount(codes, minlength=len(levels))
        order = sorted(range(len(levels)), key=lambda k: levels[k])
        top = counts.max()
        ref = next(k for k in order if counts[k] == top)
        keep = [k for k in order if k != ref]
        coded.append((codes, keep))
        names += [f"{c}={levels[k]}" for k in keep]
    x = np.empty((n, len(names)))
    x[:, 0] = 1.0
    j = 1
    for c in model.numerics:
        x[:, j] = table.column(c).to_numpy()
        j += 1
    del table
    for codes, keep in coded:
        for k in keep:
            np.equal(codes, k, out=x[:, j], casting="unsafe")
            j += 1
    return x, y, exposure, np.array(names, dtype=object)


def run_reference(job: dict[str, Any]) -> dict[str, Any]:
    cap = int(job["mem_cap_bytes"])
    resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    tool = job["tool"]
    model = model_by_key(job["model"])
    if tool == "statsmodels":
        import statsmodels.api as sm
    else:
        from sklearn.linear_model import LogisticRegression, PoissonRegressor
    start_kib = vm_kib("VmRSS")
    cpu0 = cpu_seconds()
    t0 = time.perf_counter()
    try:
        x, y, exposure, names = load_design(job["path"], model)
        t_load = time.perf_counter() - t0
        if tool == "statsmodels":
            fam = sm.families.Poisson() if model.family == "poisson" else sm.families.Binomial()
            offset = np.log(exposure) if exposure is not None else None
            # IRLS with statsmodels' default deviance tolerance 1e-8 (indb's default too)
            res = sm.GLM(y, x, family=fam, offset=offset).fit(tol=1e-8)
            params = np.asarray(res.params)
            iters = int(res.fit_history["iteration"])
            solver = "GLM IRLS"
        else:
            xs = x[:, 1:]  # the estimator adds its own intercept
            if model.family == "poisson":
                # No offset argument: a Poisson log-link fit of the rate y/exposure with
                # sample weight exposure has the same score equations as the offset model.
                est = PoissonRegressor(alpha=0.0, solver="newton-cholesky", tol=1e-8, max_iter=100)
                est.fit(xs, y / exposure, sample_weight=exposure)
                solver = "PoissonRegressor newton-cholesky"
            else:
                # C=inf is the unpenalized fit (penalty=None is deprecated in this version)
                est = LogisticRegression(
                    C=math.inf, solver="newton-cholesky", tol=1e-8, max_iter=100
                )
                est.fit(xs, y)
                solver = "LogisticRegression newton-cholesky, C=inf"
            params = np.concatenate([[float(np.ravel(est.intercept_)[0])], np.ravel(est.coef_)])
            iters = int(np.max(est.n_iter_))
        seconds = time.perf_counter() - t0
        cpu = cpu_seconds() - cpu0
    except MemoryError as err:
        return {
            "status": "out of memory",
            "detail": f"{type(err).__name__}: {str(err)[:160]}",
            "seconds": time.perf_counter() - t0,
            "cpu_seconds": cpu_seconds() - cpu0,
            "peak_kib": vm_kib("VmHWM"),
            "start_kib": start_kib,
        }
    return {
        "status": "ok",
        "seconds": seconds,
        "cpu_seconds": cpu,
        "load_seconds": t_load,
        "iterations": iters,
        "path": solver,
        "terms": [str(s) for s in names],
        "params": [float(v) for v in params],
        "peak_kib": vm_kib("VmHWM"),
        "start_kib": start_kib,
    }


def main(argv: list[str]) -> int:
    job = json.loads(argv[1])
    try:
        out = run_indb(job) if job["tool"] == "indb" else run_reference(job)
    except MemoryError as err:
        out = {"status": "out of memory", "detail": str(err)[:200], "peak_kib": vm_kib("VmHWM")}
    except Exception as err:  # reported as a result row, with the traceback on stderr
        traceback.print_exc()
        out = {"status": f"error: {type(err).__name__}: {str(err)[:160]}"}
    sys.stdout.write(MARK + json.dumps(out) + "\n")
    sys.stdout.flush()
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
