"""A lambda path on the benchmark table: its cost as a multiple of one plain IRLS scan.

Run from the repository root::

    .venv/bin/python benchmarks/bench_penalty.py                    # 10^6 rows, 20 lambdas
    .venv/bin/python benchmarks/bench_penalty.py --rows 1e7 --data-dir benchmarks/data

The table is ``bench_data.py``'s (p = 55: Poisson with offset ln(exposure), ten numeric and
two categorical predictors). In one process, on one DuckDB connection reading the Parquet
file: an unpenalised fit (its mean IRLS scan time is "one plain scan"), then the elastic
net (l1_share 0.5) over a path of N lambdas down to 10^-3 lambda_max. Reported: wall
seconds, scans by phase, the path's wall time as a multiple of one plain scan, the time in
numpy (wall less the engine's query time) and the peak resident memory of the process.
The result goes into ``benchmarks/RESULTS.md`` between this script's markers
(``bench_fit.py`` keeps the section when it rewrites the file).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import os
import resource
import sys
import time
from collections import Counter

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, HERE)
sys.path.insert(0, ROOT)

import bench_data  # noqa: E402

import indb  # noqa: E402

BEGIN = "<!-- bench_penalty.py: begin -->"
END = "<!-- bench_penalty.py: end -->"


def _peak_gib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20


def measure(path: str, n_lambdas: int, threads: int | None) -> dict:
    model = bench_data.MODELS[0]
    con = indb.connect(None, threads=threads) if threads else indb.connect(None)
    kw = {
        "db": con,
        "offset": model.offset,
        "predictors": list(model.predictors),
    }
    load0 = os.getloadavg()[0]
    t0, c0 = time.perf_counter(), time.process_time()
    plain = indb.fit(path, model.response, model.family, **kw)
    plain_wall, plain_cpu = time.perf_counter() - t0, time.process_time() - c0
    scan = plain.seconds_per_iteration
    t0, c0 = time.perf_counter(), time.process_time()
    pen = indb.fit(path, model.response, model.family, path=n_lambdas, l1_share=0.5, **kw)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    con.close()
    phases = Counter(r.phase for r in pen.iteration_log)
    fit_scans = phases.get("fit", 0)
    return {
        "rows": pen.n_used,
        "p": len(pen.coefficients),
        "lambdas": len(pen.penalty_path),
        "plain_wall": plain_wall,
        "plain_iterations": plain.iterations,
        "scan": scan,
        "path_wall": wall,
        "path_fit_scans": fit_scans,
        "path_scan_seconds": sum(r.seconds for r in pen.iteration_log if r.phase == "fit"),
        "phases": dict(phases),
        "ratio": wall / scan,
        "nonzero": [r["nonzero"] for r in pen.penalty_path],
        "peak_gib": _peak_gib(),
        "plain_cpu": plain_cpu,
        "path_cpu": cpu,
        "load": (load0, os.getloadavg()[0]),
    }


def markdown(rows: list[dict], when: str) -> str:
    lines = [
        BEGIN,
        "## Penalised fits: a lambda path (`benchmarks/bench_penalty.py`)",
        "",
        f"Measured {when}. Poisson + offset, p = 55 (`bench_data.py`), elastic net "
        "l1_share 0.5, a path of 20 lambdas from lambda_max to 10^-3 lambda_max, DuckDB "
        'reading the Parquet file. "One plain scan" is the mean IRLS scan of the '
        "unpenalised fit in the same process; the path's time includes its pre-fit scans "
        "(profile, levels, sample start) and the held-at-0 fit that gives lambda_max.",
        "",
        "| rows | plain fit (s, iterations) | one plain scan (s) | path wall (s) | IRLS scans "
        "in the path | path / plain scan | scans per lambda | CPU s: plain fit, path | "
        "load before, after | peak RSS (GiB) |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        lines.append(
            f"| {r['rows']:,} | {r['plain_wall']:.1f} ({r['plain_iterations']}) | "
            f"{r['scan']:.3f} | {r['path_wall']:.1f} | {r['path_fit_scans']} | "
            f"{r['ratio']:.1f} | {r['path_fit_scans'] / r['lambdas']:.2f} | "
            f"{r['plain_cpu']:.0f}, {r['path_cpu']:.0f} | {r['load'][0]:.1f}, {r['load'][1]:.1f} | "
            f"{r['peak_gib']:.2f} |"
        )
    lines += [
        "",
        "Non-zero penalised coefficients along the path: "
        + "; ".join(f"{r['rows']:,} rows: {r['nonzero']}" for r in rows),
        "",
        "Scans per lambda counts the path's IRLS scans over its lambdas (the held-at-0 fit's "
        "included; lambda_max itself costs none). The ratio is wall against wall in one "
        "process; on a shared machine (see the load column) both are inflated alike.",
        "",
        END,
    ]
    return "\n".join(lines) + "\n"


def write(out: str, text: str, begin: str = BEGIN, end: str = END) -> None:
    """Replace the section between ``begin`` and ``end`` in ``out`` (or append it)."""
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
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", default="1e6", help="comma-separated sizes, e.g. 1e6,1e7")
    ap.add_argument("--lambdas", type=int, default=20)
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--threads", type=int, default=None)
    ap.add_argument("--out", default=os.path.join(HERE, "RESULTS.md"))
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    rows = []
    for size in args.rows.split(","):
        path, _ = bench_data.ensure_data(args.data_dir, int(float(size)))
        r = measure(path, args.lambdas, args.threads)
        print(r, flush=True)
        rows.append(r)
    text = markdown(rows, _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC"))
    print(text)
    if not args.no_write:
        write(args.out, text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
