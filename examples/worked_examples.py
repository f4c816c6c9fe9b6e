"""Worked examples on the invented Quillmere Mutual data (a fictional insurer).

Writes the invented policy table to Parquet, then fits, registers and scores four models in a
DuckDB file: claim frequency (Poisson, offset ln(exposure)), claim severity (gamma, log link,
weighted by claim count), pure premium (Tweedie, power 1.5) and lapse (logistic). The same
walk-through runs as ``indb demo``; this script shows the API calls one by one.

    .venv/bin/python examples/worked_examples.py --rows 1000000 --out demo_out
"""

from __future__ import annotations

import argparse
import os

import duckdb

import indb
from indb import demo_data
from indb.demo import demo_models
from indb.report import render_report


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--out", default="demo_out")
    args = ap.parse_args()
    os.makedirs(args.out, exist_ok=True)
    parquet = demo_data.write_policies(os.path.join(args.out, "policies.parquet"), args.rows)
    db = os.path.join(args.out, "examples.duckdb")
    for model in demo_models(parquet):
        # one call fits inside DuckDB and writes the model back: registry version,
        # scoring view <name> and macro <name>_score
        res = indb.fit(model.source, db=db, name=model.name, **model.options)
        print(render_report(res))
        print(f"-> {res.deployment}\n")
    with duckdb.connect(db) as con:
        # the scoring view is plain SQL: any tool that reads the database can use it
        print(
            con.execute(
                "SELECT region, round(sum(score_mean) / sum(exposure), 5) AS predicted_frequency, "
                "round(sum(claim_count) / sum(exposure), 5) AS observed_frequency "
                "FROM frequency GROUP BY region ORDER BY region"
            ).fetchall()
        )


if __name__ == "__main__":
    main()
