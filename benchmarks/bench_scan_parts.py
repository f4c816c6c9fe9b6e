"""Where the time of one IRLS scan goes: CPU seconds of its parts against the floor scan.

Run from the repository root (after ``bench_fit.py`` has written the data)::

    .venv/bin/python benchmarks/bench_scan_parts.py [--rows 1e6]

On the benchmark table and its Poisson model (10 numeric + c6 + c40, p = 55) it times, in
one DuckDB session with 2 threads, best of 5 CPU seconds of this process (DuckDB's worker
threads included, so other load on the machine inflates them less than wall time):

* the floor: one SUM per used column (string length for the categorical ones);
* the GROUP BY over the 240 cells with COUNT(*) only;
* the 77 raw sums an IRLS scan needs for the numeric part of X'WX and X'Wz
  (sum w, sum w x_a, sum w x_a x_b, sum wz, sum wz x_a), grouped by the cells and ungrouped,
  with plain columns standing in for w and wz (no IRLS arithmetic at all);
* indb's own IRLS query for that model (the last one of a fit), as sent.

The ratios say what any SQL formulation of one Newton step costs on this engine: the sums
alone are a lower bound for a scan that computes X'WX.
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import bench_data
import duckdb
from bench_fit import floor_sql, parse_rows

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

import indb  # noqa: E402
from indb.engines import duckdb as E  # noqa: E402


def cpu_best(con: duckdb.DuckDBPyConnection, sql: str, repeats: int = 5) -> float:
    best = float("inf")
    for _ in range(repeats):
        t0 = time.process_time()
        con.execute(sql).fetchall()
        best = min(best, time.process_time() - t0)
    return best


def sums_sql(path: str, grouped: bool) -> str:
    xs = [f"x{i}" for i in range(1, 11)]
    aggs = ["sum(w)"] + [f"sum(w * {a})" for a in xs]
    aggs += [f"sum(w * {a} * {b})" for i, a in enumerate(xs) for b in xs[i:]]
    aggs += ["sum(wz)"] + [f"sum(wz * {a})" for a in xs]
    src = f"(SELECT *, exposure AS w, claims * exposure AS wz FROM read_parquet('{path}'))"
    if grouped:
        return f"SELECT c6, c40, {', '.join(aggs)} FROM {src} GROUP BY c6, c40"
    return f"SELECT {', '.join(aggs)} FROM {src}"


def last_irls_query(path: str, model: bench_data.Model) -> str:
    """indb's last IRLS query of a fit of ``model`` (recorded from the stock adapter)."""
    sent: list[str] = []
    original = E.DuckDBEngine.fetch_columns

    def record(self, sql):  # noqa: ANN001
        sent.append(sql)
        return original(self, sql)

    E.DuckDBEngine.fetch_columns = record
    try:
        indb.fit(
            f"SELECT * FROM read_parquet('{path}')",
            model.response,
            model.family,
            offset=model.offset,
            predictors=list(model.predictors),
            compress="never",
        )
    finally:
        E.DuckDBEngine.fetch_columns = original
    return [s for s in sent if '"s_0_0"' in s][-1]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", default="1e6", help="table size (data written by bench_fit)")
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    args = ap.parse_args()
    rows = parse_rows(args.rows)[0]
    path, _ = bench_data.ensure_data(args.data_dir, rows)
    model = next(m for m in bench_data.MODELS if m.key == "poisson")
    con = duckdb.connect()
    con.execute("SET threads = 2")
    con.execute("SET disabled_optimizers = 'partial_aggregate_pushdown'")  # as indb does
    parts = [
        ("floor: a SUM per used column", floor_sql(path, model)),
        (
            "GROUP BY the 240 cells, COUNT(*) only",
            f"SELECT c6, c40, count(*) FROM read_parquet('{path}') GROUP BY c6, c40",
        ),
        ("77 raw sums of X'WX/X'Wz, ungrouped", sums_sql(path, grouped=False)),
        ("77 raw sums, grouped by the cells", sums_sql(path, grouped=True)),
        ("indb's IRLS scan (as sent)", last_irls_query(path, model)),
    ]
    print(f"{rows:,} rows, load average {os.getloadavg()[0]:.2f}")
    floor = None
    for label, sql in parts:
        con.execute(sql).fetchall()  # warm
        cpu = cpu_best(con, sql)
        floor = floor or cpu
        print(f"{label:45s} {cpu:8.3f} CPU s  {cpu / floor:5.1f}x floor")


if __name__ == "__main__":
    main()
