"""Two copies of indb side by side on the benchmark models: wall time of each fit and the
ratio, in one run.

Run from the repository root::

    git archive 78dfaea indb | tar -x -C /tmp/before      # the code to compare against
    .venv/bin/python benchmarks/bench_versions.py --before /tmp/before --after .

Each fit runs in a fresh process that imports indb from the given directory; the two copies
alternate (before, after, before, after, ...) so that a change in the machine's load hits
both alike, and the median of ``--repeats`` fits per copy and model is compared. The data are
``bench_data.py``'s invented table (written once, cached in ``benchmarks/data``). The numbers
printed are also checked to agree (deviance to 1e-9 relative), so a restructuring that
changed an answer does not pass as a speed-up.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from typing import Any

import bench_data

HERE = os.path.dirname(os.path.abspath(__file__))
MARK = "VERSIONS_JSON "

CHILD = """
import json, sys, time
sys.path.insert(0, {src!r})
import indb
t0 = time.perf_counter()
res = indb.fit({path!r}, {response!r}, {family!r}, offset={offset!r},
               predictors={predictors!r})
wall = time.perf_counter() - t0
assert indb.__file__.startswith({src!r}), indb.__file__
print({mark!r} + json.dumps({{"wall": wall, "deviance": res.deviance,
                            "iterations": res.iterations}}))
"""


def run_fit(src: str, path: str, model: bench_data.Model) -> dict[str, Any]:
    """One fit of ``model`` on ``path`` with indb imported from ``src``, in a fresh process."""
    code = CHILD.format(
        src=os.path.abspath(src),
        path=path,
        response=model.response,
        family=model.family,
        offset=model.offset,
        predictors=list(model.predictors),
        mark=MARK,
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    ).stdout
    line = next(ln for ln in out.splitlines() if ln.startswith(MARK))
    return json.loads(line[len(MARK) :])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--before", required=True, help="directory holding the older indb/")
    ap.add_argument("--after", default=".", help="directory holding the newer indb/")
    ap.add_argument("--rows", type=float, default=1e7)
    ap.add_argument("--models", default="poisson,logistic,poisson_cat")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    args = ap.parse_args()
    path, _ = bench_data.ensure_data(args.data_dir, int(args.rows))
    known = {m.key: m for m in bench_data.MODELS}
    load = os.getloadavg()[0]
    print(f"{int(args.rows):,} rows; load {load:.1f} at start; {time.strftime('%Y-%m-%d %H:%M')}")
    print(f"{'model':<12} {'before s':>9} {'after s':>9} {'after/before':>13}  iterations")
    for key in args.models.split(","):
        model = known[key.strip()]
        runs: dict[str, list[dict[str, Any]]] = {"before": [], "after": []}
        for _ in range(args.repeats):
            for label, src in (("before", args.before), ("after", args.after)):
                runs[label].append(run_fit(src, path, model))
        b = statistics.median(r["wall"] for r in runs["before"])
        a = statistics.median(r["wall"] for r in runs["after"])
        db, da = runs["before"][0]["deviance"], runs["after"][0]["deviance"]
        same = abs(db - da) <= 1e-9 * abs(db)
        its = f"{runs['before'][0]['iterations']} / {runs['after'][0]['iterations']}"
        flag = "" if same else f"  DEVIANCE DIFFERS: {db!r} vs {da!r}"
        print(f"{key:<12} {b:9.2f} {a:9.2f} {a / b:13.2f}  {its}{flag}")


if __name__ == "__main__":
    main()
