"""Benchmark of ``indb assess``: its time against a plain DuckDB scan of the same columns, and
its peak memory, on the invented policies of the demo (``indb/demo_data.py``).

The demo's frequency model (Poisson, offset ln(exposure), 5 numeric and 3 categorical
predictors) is fitted on 10^6 policies (seed 2026) and judged on ``--rows`` held-out
policies (seed 2027), by itself, with ``--by driver_age`` and ``--against`` a second
frequency model without driver_age and vehicle_age (both scored in the same scans). The floor is
``SELECT count(*), sum(col), ...`` over the columns the assessment reads (string lengths for
the categorical ones), best of 3 after a warm-up, in this process. Each assessment runs in a
fresh process (its peak resident memory, ``VmHWM``, includes Python and DuckDB), with
DuckDB's memory limit at ``--memory-limit``.

    .venv/bin/python benchmarks/bench_assess.py --rows 1e6,1e7 --out benchmarks/ASSESS.md
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))

from indb import demo_data  # noqa: E402
from indb.demo import FACTORS, NUMERIC, demo_models  # noqa: E402

#: predictors the second model (``--against``) leaves out
AGAINST_DROPS = ["driver_age", "vehicle_age"]

CHILD = """
import json, sys, time
import indb
db, on, by, limit = sys.argv[1], sys.argv[2], json.loads(sys.argv[3]), sys.argv[4]
against = sys.argv[5] or None
t0 = time.perf_counter()
a = indb.assess("frequency", on, db=db, by=by, against=against, memory_limit=limit)
seconds = time.perf_counter() - t0
peak = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM"))
print(json.dumps({"seconds": seconds, "scans": a.scans, "peak_mib": peak / 1024,
                  "gini": a.gini, "rows": a.rows}))
"""


def rows_arg(text: str) -> list[int]:
    return [int(float(t.replace("^", "e").replace("10e", "1e"))) for t in text.split(",")]


def floor_seconds(path: str) -> float:
    import duckdb

    cols = [*NUMERIC, "exposure", "claim_count"]
    sums = ", ".join(f"sum({c})" for c in cols)
    lengths = ", ".join(f"sum(length({c}))" for c in FACTORS)
    sql = f"SELECT count(*), {sums}, {lengths} FROM read_parquet('{path}')"
    con = duckdb.connect()
    con.execute(sql).fetchall()
    best = float("inf")
    for _ in range(3):
        t0 = time.perf_counter()
        con.execute(sql).fetchall()
        best = min(best, time.perf_counter() - t0)
    con.close()
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", default="1e6,1e7", type=rows_arg)
    ap.add_argument("--memory-limit", default="512MB")
    ap.add_argument("--data-dir", default=str(HERE / "data"))
    ap.add_argument("--out", default=None, help="Markdown file to write the table to")
    args = ap.parse_args()
    os.makedirs(args.data_dir, exist_ok=True)
    import indb

    work = tempfile.mkdtemp(prefix="indb-assess-bench-")
    train = os.path.join(args.data_dir, "policies_1000000_2026.parquet")
    if not os.path.exists(train):
        demo_data.write_policies(train, 1_000_000, seed=2026)
    db = os.path.join(work, "models.duckdb")
    model = next(m for m in demo_models(train) if m.name == "frequency")
    indb.fit(model.source, db=db, name="frequency", **model.options)
    # the second model: the same family, response and offset, two predictors fewer
    fewer = {**model.options, "exclude": [*model.options["exclude"], *AGAINST_DROPS]}
    indb.fit(model.source, db=db, name="frequency_b", **fewer)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    lines = [
        "| rows | --by | --against | floor s | assess s | assess / floor | scans | peak MiB "
        "| Gini |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    for rows in args.rows:
        path = os.path.join(args.data_dir, f"policies_{rows}_2027.parquet")
        if not os.path.exists(path):
            demo_data.write_policies(path, rows, seed=2027)
        floor = floor_seconds(path)
        for by, against in (([], ""), (["driver_age"], ""), ([], "frequency_b")):
            out = subprocess.run(
                [sys.executable, "-c", CHILD, db, path, json.dumps(by), args.memory_limit, against],
                capture_output=True,
                text=True,
                env=env,
                check=False,
            )
            if out.returncode != 0:
                # the row says how it failed (out of memory, say) and the run goes on
                last = (out.stderr.strip().splitlines() or ["no message"])[-1][:160]
                lines.append(
                    f"| {rows:.0e} | {', '.join(by) or '-'} | {against or '-'} | {floor:.3f} | "
                    f"failed: {last} | | | | |"
                )
                print(lines[-1], flush=True)
                continue
            m = json.loads(out.stdout.strip().splitlines()[-1])
            lines.append(
                f"| {rows:.0e} | {', '.join(by) or '-'} | {against or '-'} | {floor:.3f} | "
                f"{m['seconds']:.2f} | "
                f"{m['seconds'] / floor:.1f} | {m['scans']} | {m['peak_mib']:.0f} | "
                f"{m['gini']:.4f} |"
            )
            print(lines[-1], flush=True)
    table = "\n".join(lines)
    print(table)
    if args.out:
        Path(args.out).write_text(
            "# indb assess benchmark\n\n"
            f"Measured {time.strftime('%Y-%m-%d %H:%M')} by `benchmarks/bench_assess.py` "
            f"(DuckDB memory limit {args.memory_limit}; nproc {os.cpu_count()}).\n\n"
            f"{table}\n"
        )


if __name__ == "__main__":
    main()
