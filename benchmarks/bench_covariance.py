"""What the covariance kinds cost: scans, time and peak memory of model, robust and
cluster-robust fits of the same model.

Run from the repository root::

    .venv/bin/python benchmarks/bench_covariance.py                 # 10^7 rows
    .venv/bin/python benchmarks/bench_covariance.py --rows 1e6 --no-write

The data are ``bench_data.py``'s invented rows (``benchmarks/data/bench_<rows>_<seed>.parquet``,
written when missing). Two of its models: ``poisson`` (12 predictors, 2 of them
categorical, offset ln(exposure), p = 55) and ``poisson_num`` (the 10 numeric predictors,
p = 11). Each is fitted with ``covariance`` model, robust, and cluster on three cluster
expressions: ``c40`` (40 clusters), ``CAST(floor(x2 * 2e6) AS BIGINT)`` (about 2 million
clusters of about 5 rows: x2 is uniform on (0, 1)) and ``CAST(floor(x2 * 1e9) AS BIGINT)``
(about one cluster per row, 10^7 at 10^7 rows), the last also with DuckDB's
``memory_limit`` at 1 GB (the engine spills its per-cluster sums to disk beyond it).

Each fit runs in a fresh process (its peak resident memory, ``VmHWM``, is its own; about
150 MiB of it is the interpreter and libraries). Scans: the iteration log's records (each
one query over the source) by phase: ``fit`` (IRLS), ``sample`` (the sample start), ``null``,
``covariance`` (a scan only the covariance needs). The results go into
``benchmarks/RESULTS.md`` between this script's markers (``bench_fit.py`` keeps them).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import subprocess
import sys
import time
from typing import Any

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, HERE)

import bench_data  # noqa: E402
from bench_child import vm_kib  # noqa: E402

MARK = "COVARIANCE_JSON "
BEGIN = "<!-- bench_covariance.py: begin -->"
END = "<!-- bench_covariance.py: end -->"
ONE_PER_ROW = "CAST(floor(x2 * 1e9) AS BIGINT)"
#: (covariance, cluster, DuckDB memory_limit)
KINDS: list[tuple[str, str | None, str | None]] = [
    ("model", None, None),
    ("robust", None, None),
    ("cluster", "c40", None),
    ("cluster", "CAST(floor(x2 * 2e6) AS BIGINT)", None),
    ("cluster", ONE_PER_ROW, None),
    ("cluster", ONE_PER_ROW, "1GB"),
]


def child(job: dict[str, Any]) -> dict[str, Any]:
    """One fit in this process; its numbers as a dict."""
    import indb

    model = next(m for m in bench_data.MODELS if m.key == job["model"])
    t0 = time.perf_counter()
    cpu0 = time.process_time()
    res = indb.fit(
        job["path"],
        model.response,
        model.family,
        offset=model.offset,
        predictors=list(model.predictors),
        covariance=job["kind"],
        cluster=job["cluster"],
        memory_limit=job["memory_limit"],
    )
    wall = time.perf_counter() - t0
    cpu = time.process_time() - cpu0
    phases, seconds = phase_totals(res.iteration_log)
    peak = vm_kib("VmHWM") / 1024
    return {
        "status": "ok",
        "wall": wall,
        "cpu": cpu,
        "phases": phases,
        "phase_seconds": seconds,
        "clusters": res.clusters,
        "peak_mib": peak,
        "path": res.path,
        "se": [float(x) for x in res.std_errors],
    }


def run_one(
    path: str, model: str, kind: str, cluster: str | None, limit: str | None, timeout: float
) -> dict:
    job = {"path": path, "model": model, "kind": kind, "cluster": cluster, "memory_limit": limit}
    return run_child(os.path.abspath(__file__), job, MARK, timeout)


def phase_totals(log: Any) -> tuple[dict[str, int], dict[str, float]]:
    """Scans and seconds per phase of a fit's iteration log."""
    phases: dict[str, int] = {}
    seconds: dict[str, float] = {}
    for r in log:
        phases[r.phase] = phases.get(r.phase, 0) + 1
        seconds[r.phase] = seconds.get(r.phase, 0.0) + r.seconds
    return phases, seconds


def run_child(script: str, job: dict[str, Any], mark: str, timeout: float) -> dict[str, Any]:
    """Run ``script --child JOB`` in a fresh process (its peak memory is its own) and return
    the job with the numbers it printed after ``mark``, or with a status saying why not."""
    env = dict(os.environ, PYTHONPATH=ROOT)
    load = os.getloadavg()[0]
    try:
        proc = subprocess.run(
            [sys.executable, script, "--child", json.dumps(job)],
            capture_output=True,
            text=True,
            env=env,
            timeout=timeout,
            check=False,
        )
    except subprocess.TimeoutExpired:
        return {**job, "status": f"timeout (> {timeout:.0f} s)", "load": load}
    for line in proc.stdout.splitlines():
        if line.startswith(mark):
            return {**job, **json.loads(line[len(mark) :]), "load": load}
    tail = (proc.stderr.strip().splitlines() or ["no output"])[-1]
    return {**job, "status": f"failed (exit {proc.returncode}): {tail[:200]}", "load": load}


def markdown(rows: list[dict[str, Any]], n: int) -> str:
    lines = [
        BEGIN,
        "## Covariance kinds (`benchmarks/bench_covariance.py`)",
        "",
        f"{n:,} invented rows (`bench_data.py`), each fit in its own process on "
        f"{platform.machine()}, {os.cpu_count()} cores, {_dt.date.today()}. scans: the "
        "iteration log's queries over the source by phase (IRLS `fit`, `sample` start, "
        "`null` model, `covariance`: a scan only the covariance needs); covariance s: that "
        "scan's time; peak: the process's peak resident memory (VmHWM, about 150 MiB of it "
        "the interpreter and libraries); load: the 1-minute load average at the start (the "
        "machine is shared).",
        "",
        "| model | covariance | cluster | clusters | memory limit | status | wall s | CPU s | "
        "IRLS scans | other scans | covariance s | peak MiB | load |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        ph = r.get("phases", {})
        other = ", ".join(f"{k} {v}" for k, v in sorted(ph.items()) if k != "fit")
        cov_s = r.get("phase_seconds", {}).get("covariance")
        lines.append(
            f"| {r['model']} | {r['kind']} | {r['cluster'] or ''} | "
            f"{'' if r.get('clusters') is None else format(r['clusters'], ',')} | "
            f"{r['memory_limit'] or ''} | {r['status']} | {_f(r.get('wall'))} | "
            f"{_f(r.get('cpu'))} | {ph.get('fit', '')} | "
            f"{other} | {_f(cov_s)} | {_f(r.get('peak_mib'), '.0f')} | {_f(r.get('load'), '.1f')} |"
        )
    lines += ["", *reading(rows), END]
    return "\n".join(lines) + "\n"


def reading(rows: list[dict[str, Any]]) -> list[str]:
    out = []
    for model in dict.fromkeys(r["model"] for r in rows):
        mine = [r for r in rows if r["model"] == model and r["status"] == "ok"]
        base = next((r for r in mine if r["kind"] == "model"), None)
        if base is None:
            continue
        scans = sum(base["phases"].values())
        parts = []
        for r in mine:
            if r is base:
                continue
            label = r["kind"] + (f" on {r['cluster']}" if r["cluster"] else "")
            label += f" (memory_limit {r['memory_limit']})" if r["memory_limit"] else ""
            extra = sum(r["phases"].values()) - scans
            parts.append(
                f"{label}: {extra:+d} scan(s), {r['wall'] / base['wall']:.2f}x the time, "
                f"peak {r['peak_mib']:.0f} MiB"
            )
        out.append(
            f"- `{model}`: model-based {scans} scans, {base['wall']:.3g} s, peak "
            f"{base['peak_mib']:.0f} MiB; " + "; ".join(parts) + "."
        )
    return out


def _f(v: Any, fmt: str = ".3g") -> str:
    return "" if v is None else format(v, fmt)


def write_section(text: str, out: str, begin: str = BEGIN, end: str = END) -> None:
    """Put ``text`` between the markers ``begin`` and ``end`` of ``out`` (appended when they
    are missing); the other sections are kept."""
    old = ""
    if os.path.exists(out):
        with open(out) as fh:
            old = fh.read()
    if begin in old and end in old:
        head, rest = old.split(begin, 1)
        new = head + text.rstrip("\n") + rest.split(end, 1)[1]
    else:
        new = old.rstrip("\n") + "\n\n" + text
    with open(out, "w") as fh:
        fh.write(new)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--rows", default="1e7")
    ap.add_argument("--models", default="poisson,poisson_num")
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--out", default=os.path.join(HERE, "RESULTS.md"))
    ap.add_argument("--timeout", type=float, default=1800.0)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    if args.child:
        print(MARK + json.dumps(child(json.loads(args.child))), flush=True)
        return 0
    n = int(float(args.rows))
    os.makedirs(args.data_dir, exist_ok=True)
    path, _ = bench_data.ensure_data(args.data_dir, n)
    rows = []
    for model in args.models.split(","):
        for kind, cluster, limit in KINDS:
            r = run_one(path, model, kind, cluster, limit, args.timeout)
            rows.append(r)
            print(json.dumps({k: v for k, v in r.items() if k not in ("se", "path")}), flush=True)
    text = markdown(rows, n)
    print(text)
    if not args.no_write:
        write_section(text, args.out)
    return 0


if __name__ == "__main__":
    sys.exit(main())
