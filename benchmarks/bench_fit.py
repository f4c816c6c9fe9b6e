"""Side-by-side benchmark: indb against a plain DuckDB scan and in-memory GLM libraries.

Run from the repository root::

    .venv/bin/python benchmarks/bench_fit.py --rows 1e6,1e7 [--with-1e8] \
        [--out benchmarks/RESULTS.md]

For each size the invented table (``bench_data``) is written once to ``benchmarks/data/``
(git-ignored) and reused afterwards. For each size and model it measures

* the floor: one plain aggregate scan (a SUM per used column) of the same columns in
  DuckDB, best of 3, in this process;
* indb: one fit in a fresh process (total time, iterations, seconds per IRLS scan, path,
  peak RSS), plus planning versus execution of one IRLS query;
* statsmodels GLM and scikit-learn (PoissonRegressor / LogisticRegression) on the data loaded
  into memory, each in a fresh process with its address space capped (``RLIMIT_AS``) and a
  time limit; the time includes reading the Parquet file and building the dense design.

It prints one side-by-side table and writes a Markdown report (``--out``); see
``benchmarks/README.md`` for what each column means.
"""

from __future__ import annotations

import argparse
import datetime as dt
import hashlib
import json
import os
import re
import resource
import shlex
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from typing import Any

import bench_data
import bench_report
import duckdb

HERE = os.path.dirname(os.path.abspath(__file__))
CHILD = os.path.join(HERE, "bench_child.py")
MEMORY_LIMIT = "512MB"  # DuckDB memory_limit for every indb fit, far below the data at 1e8
SPILL_DIR = os.path.join(HERE, "data", "spill")
GIB = 1024**3
# the model whose references always run, even when predicted to fail, to record the outcome
HEADLINE = "poisson"


def parse_rows(text: str) -> list[int]:
    """``"1e6,1e7"`` -> ``[1000000, 10000000]`` (also ``10^6`` and ``1_000_000``)."""
    out: list[int] = []
    for part in text.split(","):
        t = part.strip().replace("_", "")
        if not t:
            continue
        try:
            value = float(t.split("^")[0]) ** float(t.split("^")[1]) if "^" in t else float(t)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"--rows: {part!r} is not a row count; write e.g. 1e6,1e7"
            ) from None
        if value != int(value) or value < 1000:
            raise argparse.ArgumentTypeError(
                f"--rows: {part!r} must be a whole number of at least 1000 rows"
            )
        out.append(int(value))
    if not out:
        raise argparse.ArgumentTypeError("--rows: give at least one size, e.g. 1e6,1e7")
    return out


def mem_total_bytes() -> int:
    with open("/proc/meminfo") as fh:
        for line in fh:
            if line.startswith("MemTotal:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no MemTotal in /proc/meminfo")


# -- the floor -------------------------------------------------------------------------------


def quote_ident(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def quote_text(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def floor_items(
    model: bench_data.Model, quote: Callable[[str], str] = quote_ident, strlen: str = "strlen"
) -> str:
    """The floor's select list: COUNT(*) and a SUM per used column (string length for the
    categorical ones), with the engine's identifier quoting and length function."""
    items = ["count(*)"]
    for c in model.columns:
        q = quote(c)
        items.append(f"sum({strlen}({q}))" if c in model.factors else f"sum({q})")
    return ", ".join(items)


def floor_sql(path: str, model: bench_data.Model) -> str:
    """The floor scan in DuckDB: :func:`floor_items` over the Parquet file, in one scan."""
    return f"SELECT {floor_items(model)} FROM read_parquet({quote_text(path)})"


def measure_floor(
    con: duckdb.DuckDBPyConnection, path: str, model: bench_data.Model
) -> tuple[float, float]:
    """Best of 3 wall seconds of the floor scan, and the CPU seconds of that run."""
    sql = floor_sql(path, model)
    best, best_cpu = float("inf"), float("nan")
    for _ in range(3):
        c0 = cpu_seconds()
        t0 = time.perf_counter()
        con.execute(sql).fetchall()
        t = time.perf_counter() - t0
        if t < best:
            best, best_cpu = t, cpu_seconds() - c0
    return best, best_cpu


def cpu_seconds() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def distinct_design_rows(con: duckdb.DuckDBPyConnection, path: str, cols: tuple[str, ...]) -> int:
    sel = ", ".join(quote_ident(c) for c in cols)
    sql = f"SELECT count(*) FROM (SELECT DISTINCT {sel} FROM read_parquet({quote_text(path)}))"
    return int(con.execute(sql).fetchone()[0])


# -- children ----------------------------------------------------------------------------------


def snapshot_indb(data_dir: str) -> tuple[str, str]:
    """Copy the indb package to ``data_dir/indb_snapshot`` so every fit of a run uses the
    same code even while the working tree is being edited; returns the folder to put on
    PYTHONPATH and a short hash of the copied sources."""
    src = os.path.join(os.path.dirname(HERE), "indb")
    root = os.path.join(data_dir, "indb_snapshot")
    if os.path.exists(root):
        shutil.rmtree(root)
    shutil.copytree(src, os.path.join(root, "indb"), ignore=shutil.ignore_patterns("__pycache__"))
    digest = hashlib.sha256()
    base = os.path.join(root, "indb")
    names = sorted(
        os.path.relpath(os.path.join(d, f), base) for d, _, files in os.walk(base) for f in files
    )
    for name in names:  # every source file, subpackages (plan/, engines/) included
        with open(os.path.join(base, name), "rb") as fh:
            digest.update(name.encode() + b"\0" + fh.read())
    return root, digest.hexdigest()[:12]


def run_child(job: dict[str, Any], timeout: float, pythonpath: str) -> dict[str, Any]:
    """Run one measured fit in a fresh process; peak RSS comes from the kernel (wait4)."""
    env = dict(os.environ, PYTHONPATH=pythonpath)
    load = os.getloadavg()[0]
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        proc = subprocess.Popen(
            [sys.executable, CHILD, json.dumps(job)],
            stdout=out,
            stderr=err,
            cwd=HERE,
            env=env,
        )
        t0 = time.monotonic()
        timed_out = False
        while True:
            pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
            if pid:
                break
            if time.monotonic() - t0 > timeout:
                proc.kill()  # our own child, by its pid
                _, status, usage = os.wait4(proc.pid, 0)
                timed_out = True
                break
            time.sleep(0.05)
        proc.returncode = os.waitstatus_to_exitcode(status)
        wall = time.monotonic() - t0
        out.seek(0)
        err.seek(0)
        stdout = out.read().decode(errors="replace")
        stderr = err.read().decode(errors="replace")
    result: dict[str, Any] = {}
    for line in stdout.splitlines():
        if line.startswith("BENCH_JSON "):
            result = json.loads(line[len("BENCH_JSON ") :])
    result["kernel_peak_kib"] = usage.ru_maxrss  # KiB on Linux
    result["process_cpu_seconds"] = usage.ru_utime + usage.ru_stime
    result["load1"] = load
    result["process_seconds"] = wall
    if timed_out:
        result["status"] = f"timeout (>{timeout:.0f} s)"
        result["seconds"] = None
        result["timeout_seconds"] = timeout
    elif not result:
        code = proc.returncode
        last = stderr.strip().splitlines()[-1:] or [""]
        if code < 0:
            result["status"] = f"killed by signal {-code} (out of memory?)"
        else:
            result["status"] = f"crashed (exit {code}): {last[0][:120]}"
    if result.get("status", "").startswith("error") or (
        result.get("status") != "ok" and stderr.strip()
    ):
        result["stderr_tail"] = stderr.strip()[-600:]
    return result


# -- the run -----------------------------------------------------------------------------------


def log(msg: str) -> None:
    stamp = dt.datetime.now().strftime("%H:%M:%S")
    print(f"[{stamp}] {msg}", file=sys.stderr, flush=True)


def predicted_failure(
    previous: list[dict[str, Any]],
    rows: int,
    model: bench_data.Model,
    tool: str,
    cap: int,
    timeout: float,
) -> str | None:
    """Why a reference fit at ``rows`` is bound to fail, judged from the largest smaller size
    it finished at (peak memory and time scaled by the ratio of rows), or None."""
    done = [
        r
        for r in previous
        if r["model"] == model.key
        and r["tool"] == tool
        and r.get("status") == "ok"
        and r["rows"] < rows
    ]
    if not done:
        return None
    last = max(done, key=lambda r: r["rows"])
    k = rows / last["rows"]
    peak = (last.get("peak_kib") or last.get("kernel_peak_kib") or 0) * 1024 * k
    if peak > cap:
        return (
            f"predicted out of memory: peak {peak / GIB:.0f} GiB (the {last['rows']:.0e}-row "
            f"peak x {k:g}) > cap {cap / GIB:.0f} GiB"
        )
    secs = float(last["seconds"]) * k
    if secs > 2 * timeout:
        return (
            f"predicted timeout: {secs:.0f} s (the {last['rows']:.0e}-row time x {k:g}) "
            f"> 2 x the {timeout:.0f} s limit"
        )
    return None


def bench_size(
    rows: int,
    args: argparse.Namespace,
    models: list[bench_data.Model],
    cap: int,
    previous: list[dict[str, Any]],
) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    t0 = time.perf_counter()
    path, written = bench_data.ensure_data(args.data_dir, rows)
    data_info = {
        "rows": rows,
        "path": os.path.relpath(path),
        "bytes": os.path.getsize(path),
        "written_now": written,
        "seconds": time.perf_counter() - t0,
    }
    log(f"{rows:.0e} rows: data {'written' if written else 'cached'} ({path})")
    results: list[dict[str, Any]] = []
    con = duckdb.connect()
    con.execute("SET enable_progress_bar = false")
    for model in models:
        con.execute(floor_sql(path, model)).fetchall()  # warm the file cache first
        load = os.getloadavg()[0]
        floor, floor_cpu = measure_floor(con, path, model)
        distinct = distinct_design_rows(con, path, model.factors) if model.compresses else None
        base = {"rows": rows, "model": model.key}
        results.append(
            {
                **base,
                "tool": "floor",
                "status": "ok",
                "seconds": floor,
                "cpu_seconds": floor_cpu,
                "load1": load,
            }
        )
        if distinct is not None:
            results[-1]["distinct_design_rows"] = distinct
        log(f"  {model.key}: floor {floor:.3f} s")
        job = {
            "tool": "indb",
            "model": model.key,
            "path": path,
            "memory_limit": MEMORY_LIMIT,
            "temp_directory": SPILL_DIR,
        }
        r = run_child(job, args.indb_timeout, args.pythonpath)
        results.append({**base, "tool": "indb", **r})
        log(f"  {model.key}: indb {r.get('status')} {_secs(r)}")
        for tool in args.refs:
            need = rows * model.p * 8
            why = predicted_failure(previous, rows, model, tool, cap, args.timeout)
            if why and args.skip_predicted and model.key != HEADLINE:
                results.append({**base, "tool": tool, "status": f"skipped: {why}"})
                log(f"  {model.key}: {tool} skipped ({why})")
                continue
            if need > cap:
                results.append(
                    {
                        **base,
                        "tool": tool,
                        "status": f"skipped: the dense design alone needs {need / GIB:.0f} GiB "
                        f"> cap {cap / GIB:.0f} GiB",
                    }
                )
                log(f"  {model.key}: {tool} skipped (design {need / GIB:.0f} GiB)")
                continue
            job = {"tool": tool, "model": model.key, "path": path, "mem_cap_bytes": cap}
            r = run_child(job, args.timeout, args.pythonpath)
            results.append({**base, "tool": tool, **r})
            log(f"  {model.key}: {tool} {r.get('status')} {_secs(r)}")
    con.close()
    return results, data_info


def _secs(r: dict[str, Any]) -> str:
    s = r.get("seconds")
    return f"{s:.2f} s" if isinstance(s, int | float) else ""


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=parse_rows, default=[10**6, 10**7], help="e.g. 1e6,1e7")
    ap.add_argument("--with-1e8", action="store_true", help="also run 1e8 rows")
    ap.add_argument("--out", default=os.path.join(HERE, "RESULTS.md"), help="Markdown report")
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"), help="cached data files")
    ap.add_argument(
        "--models",
        default=",".join(m.key for m in bench_data.MODELS),
        help="comma-separated model keys: " + ", ".join(m.key for m in bench_data.MODELS),
    )
    ap.add_argument(
        "--refs", default="statsmodels,sklearn", help="references to run (comma-separated)"
    )
    ap.add_argument("--timeout", type=float, default=240.0, help="seconds per reference fit")
    ap.add_argument(
        "--no-skip-predicted",
        dest="skip_predicted",
        action="store_false",
        help="run reference fits even when the previous size predicts they will fail "
        "(by default only the headline Poisson model's references always run)",
    )
    ap.add_argument("--indb-timeout", type=float, default=1800.0, help="seconds per indb fit")
    ap.add_argument(
        "--mem-cap-gib",
        type=float,
        default=None,
        help="address-space cap of reference fits (default min(20, 0.85 x RAM) GiB)",
    )
    ap.add_argument(
        "--report-only",
        metavar="JSON",
        default=None,
        help="only rewrite --out from saved raw measurements (results_last_run.json)",
    )
    args = ap.parse_args(argv)
    if args.report_only:
        return report_only(args.report_only, args.out)
    sizes = sorted(set(args.rows + ([10**8] if args.with_1e8 else [])))
    known = {m.key: m for m in bench_data.MODELS}
    wanted = [k.strip() for k in args.models.split(",") if k.strip()]
    bad = [k for k in wanted if k not in known]
    if bad:
        ap.error(f"--models: unknown model(s) {bad}; choose from {sorted(known)}")
    models = [known[k] for k in wanted]
    args.refs = [r.strip() for r in args.refs.split(",") if r.strip()]
    bad = [r for r in args.refs if r not in ("statsmodels", "sklearn")]
    if bad:
        ap.error(f"--refs: unknown reference(s) {bad}; choose from statsmodels, sklearn")
    cap_gib = args.mem_cap_gib or min(20.0, 0.85 * mem_total_bytes() / GIB)
    cap = int(cap_gib * GIB)

    os.makedirs(args.data_dir, exist_ok=True)
    args.pythonpath, code_hash = snapshot_indb(args.data_dir)
    started = time.perf_counter()
    load_start = os.getloadavg()
    results: list[dict[str, Any]] = []
    data_info: list[dict[str, Any]] = []
    for rows in sizes:
        res, info = bench_size(rows, args, models, cap, results)
        results += res
        data_info.append(info)
    elapsed = time.perf_counter() - started

    exe = sys.executable
    rel = os.path.relpath(exe)
    command = shlex.join([rel if not rel.startswith("..") else exe, *sys.argv])
    run = {
        "command": command,
        "elapsed_seconds": elapsed,
        "mem_cap_bytes": cap,
        "timeout": args.timeout,
        "data": data_info,
        "models": [m.key for m in models],
        "sizes": sizes,
        "indb_source_hash": code_hash,
        "load_start": load_start,
        "load_end": os.getloadavg(),
        "finished": dt.datetime.now().strftime("%Y-%m-%d %H:%M"),
        "machine": bench_report.machine_lines(),
    }
    raw = os.path.join(args.data_dir, "results_last_run.json")
    with open(raw, "w") as fh:
        json.dump({"run": run, "results": results}, fh, indent=1, default=str)
    write_report(results, run, models, args.out)
    log(f"wrote {args.out} and {raw} ({elapsed / 60:.1f} min)")
    return 0


def write_report(
    results: list[dict[str, Any]], run: dict[str, Any], models: list[bench_data.Model], out: str
) -> None:
    report = bench_report.Report(results, run, models)
    print(report.text_table())
    for line in report.sanity_lines():
        print(line)
    text = report.markdown()
    kept = _levels_section(out)
    with open(out, "w") as fh:
        fh.write(text if not kept else text.rstrip("\n") + "\n\n" + kept)


def _levels_section(path: str) -> str:
    """The sections other benchmarks wrote into ``path`` between their markers
    (``<!-- NAME: begin -->`` ... ``<!-- NAME: end -->``), kept across rewrites."""
    if not os.path.exists(path):
        return ""
    with open(path) as fh:
        old = fh.read()
    found = re.finditer(r"<!-- ([^>]+?): begin -->.*?<!-- \1: end -->", old, re.S)
    return "\n".join(m.group(0) + "\n" for m in found)


def report_only(raw: str, out: str) -> int:
    """Rewrite the report from a saved ``results_last_run.json`` without measuring again."""
    with open(raw) as fh:
        saved = json.load(fh)
    known = {m.key: m for m in bench_data.MODELS}
    run = saved["run"]
    run["regenerated_from"] = os.path.relpath(raw)
    write_report(saved["results"], run, [known[k] for k in run["models"]], out)
    log(f"wrote {out} from {raw}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
