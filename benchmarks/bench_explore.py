"""``indb explore`` on the invented demo book: time of each of its three scans next to a plain
scan of the same columns, and peak memory.

Run from the repository root (writes the data once to ``benchmarks/data``, git-ignored)::

    .venv/bin/python benchmarks/bench_explore.py --rows 1e7 --threads 2
    .venv/bin/python benchmarks/bench_explore.py --rows 1e7 --memory-limit 500MB

The plain scan reads the same columns once and sums each (COUNT of every column, the sum of
ln(exposure) and of the response): the floor any in-database exploration pays. The
exploration explores the 8 predictor columns of the demo (5 numeric, 3 categorical) with the
offset ln(exposure). Each timing is the best of ``--repeat`` runs; the peak is the process's
resident high-water mark (``VmHWM``) after all runs.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import duckdb

import indb
from indb.demo_data import write_policies
from indb.engines.duckdb import DuckDBEngine

COLUMNS = ["driver_age", "vehicle_power", "vehicle_age", "bonus_malus", "density"]
COLUMNS += ["region", "vehicle_group", "fuel"]


def peak_mib() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=float, default=1e7)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--memory-limit", default=None)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    rows = int(args.rows)
    data = Path("benchmarks/data") / f"policies_{rows}.parquet"
    if not data.exists():
        data.parent.mkdir(parents=True, exist_ok=True)
        write_policies(data, rows)
    config = {"threads": args.threads}
    if args.memory_limit:
        config["memory_limit"] = args.memory_limit
    con = duckdb.connect(config=config)
    engine = DuckDBEngine(con)
    timings: list[float] = []
    fetch = engine.fetch_columns

    def timed(sql: str):
        t0 = time.perf_counter()
        out = fetch(sql)
        timings.append(time.perf_counter() - t0)
        return out

    engine.fetch_columns = timed  # type: ignore[method-assign]
    counts = ", ".join(f'count("{c}")' for c in COLUMNS)
    plain = (
        f"SELECT count(*), {counts}, sum(ln(exposure)), sum(claim_count) "
        f"FROM read_parquet('{data}')"
    )

    def best(run) -> float:
        spent = []
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            run()
            spent.append(time.perf_counter() - t0)
        return min(spent)

    floor = best(lambda: con.sql(plain).fetchall())
    per_scan: list[list[float]] = []

    def explore() -> None:
        timings.clear()
        indb.explore(str(data), "claim_count", offset="ln(exposure)", by=COLUMNS, db=engine)
        per_scan.append(list(timings))

    wall = best(explore)
    names = ["profile", "order statistics (band edges)", "GROUPING SETS scan"]
    print(f"rows {rows:,}, threads {args.threads}, memory limit {args.memory_limit or 'none'}")
    print(f"plain scan of the same columns     {floor:8.3f} s")
    print(
        f"explore (8 columns)                {wall:8.3f} s  ({wall / floor:.1f} x the plain scan)"
    )
    for k, name in enumerate(names):
        spent = min(t[k] for t in per_scan)
        print(f"  {name:32s} {spent:8.3f} s  ({spent / floor:.1f} x)")
    print(f"peak resident memory               {peak_mib():8.0f} MiB")


if __name__ == "__main__":
    main()
