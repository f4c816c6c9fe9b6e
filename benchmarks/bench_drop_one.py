"""What ``drop_one`` costs: the full fit's scans against the extra scans that fit every
model without one term, all of them in shared (model-batch) scans.

Run from the repository root::

    .venv/bin/python benchmarks/bench_drop_one.py                 # 10^7 rows
    .venv/bin/python benchmarks/bench_drop_one.py --rows 1e6 --no-write

The data are ``bench_data.py``'s invented rows (``benchmarks/data/bench_<rows>_<seed>.parquet``,
written when missing). Models: ``poisson_num`` (10 numeric predictors, offset, k = 10
terms), ``poisson`` (10 numeric + 2 categorical, k = 12 terms, p = 55) and ``poisson_cat``
(2 categorical: the compressed route, k = 2). Each model is fitted twice, each fit in a
fresh process (its peak resident memory, ``VmHWM``, is its own): without and with
``drop_one``. Scans are the iteration log's records (each one query over the source) by
phase; ``drop_one`` is the batch scans. The ratio printed is the drop-one scans over the
full fit's scans (the issue's target: at most 2), and the same for their time. The results
go into ``benchmarks/RESULTS.md`` between this script's markers.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import sys
import time
from typing import Any

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, HERE)

import bench_data  # noqa: E402
from bench_child import vm_kib  # noqa: E402
from bench_covariance import phase_totals, run_child, write_section  # noqa: E402

MARK = "DROP_ONE_JSON "
BEGIN = "<!-- bench_drop_one.py: begin -->"
END = "<!-- bench_drop_one.py: end -->"


def child(job: dict[str, Any]) -> dict[str, Any]:
    """One fit in this process; its numbers as a dict."""
    import indb

    model = next(m for m in bench_data.MODELS if m.key == job["model"])
    t0 = time.perf_counter()
    res = indb.fit(
        job["path"],
        model.response,
        model.family,
        offset=model.offset,
        predictors=list(model.predictors),
        drop_one=job["drop_one"],
        memory_limit=job.get("memory_limit"),
    )
    wall = time.perf_counter() - t0
    phases, seconds = phase_totals(res.iteration_log)
    peak = vm_kib("VmHWM") / 1024
    return {
        "status": "ok",
        "wall": wall,
        "phases": phases,
        "phase_seconds": seconds,
        "terms": len(res.term_tests),
        "peak_mib": peak,
        "deviance": res.deviance,
    }


def run_one(path: str, model: str, drop_one: bool, limit: str | None, timeout: float) -> dict:
    job = {"path": path, "model": model, "drop_one": drop_one, "memory_limit": limit}
    return run_child(os.path.abspath(__file__), job, MARK, timeout)


def compare(plain: dict[str, Any], drop: dict[str, Any]) -> dict[str, Any]:
    """The full fit's scans and time against the drop-one scans and time."""
    full_scans = sum(plain["phases"].values())
    full_s = sum(plain["phase_seconds"].values())
    extra = drop["phases"].get("drop_one", 0)
    extra_s = drop["phase_seconds"].get("drop_one", 0.0)
    return {
        "model": plain["model"],
        "terms": drop["terms"],
        "full_scans": full_scans,
        "full_s": full_s,
        "irls_scans": plain["phases"].get("fit", 0),
        "irls_s": plain["phase_seconds"].get("fit", 0.0),
        "drop_scans": extra,
        "drop_s": extra_s,
        "scan_ratio": extra / full_scans,
        "time_ratio": extra_s / full_s if full_s else float("nan"),
        "wall_plain": plain["wall"],
        "wall_drop": drop["wall"],
        "peak_plain": plain["peak_mib"],
        "peak_drop": drop["peak_mib"],
        "load": drop["load"],
    }


def markdown(rows: list[dict[str, Any]], failed: list[dict[str, Any]], n: int) -> str:
    lines = [
        BEGIN,
        "## Drop-one likelihood-ratio tests (`benchmarks/bench_drop_one.py`)",
        "",
        f"{n:,} invented rows (`bench_data.py`), each fit in its own process on "
        f"{platform.machine()}, {os.cpu_count()} cores (shared with other work: load = the "
        f"1-minute load average at the start), {_dt.date.today()}. full scans: every scan of "
        "the fit without `drop_one` (IRLS, sample start, null model) and their seconds; "
        "drop-one scans: the batch scans that fit all k models without one term (one read "
        "of the source per iteration for all of them) and their seconds; ratios: drop-one "
        "over full (target: scans at most 2x); peak: the process's peak resident memory "
        "(VmHWM) with `drop_one`.",
        "",
        "| model | k terms | full scans | full s | drop-one scans | drop-one s | "
        "scan ratio | time ratio | wall s (plain / drop_one) | peak MiB | load |",
        "|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        lines.append(
            f"| {r['model']} | {r['terms']} | {r['full_scans']} | {r['full_s']:.3g} | "
            f"{r['drop_scans']} | {r['drop_s']:.3g} | {r['scan_ratio']:.2f}x | "
            f"{r['time_ratio']:.2f}x | {r['wall_plain']:.3g} / {r['wall_drop']:.3g} | "
            f"{r['peak_drop']:.0f} | {r['load']:.1f} |"
        )
    for r in failed:
        lines.append(f"| {r['model']} | | | | | | | | {r['status']} | | |")
    lines += ["", *reading(rows), END]
    return "\n".join(lines) + "\n"


def reading(rows: list[dict[str, Any]]) -> list[str]:
    """What the table says: the scan target, and what one model costs inside a batch scan."""
    if not rows:
        return []
    worst = max(r["scan_ratio"] for r in rows)
    out = [
        f"- Scans: every model's drop-one tests took at most {worst:.2f}x the full fit's "
        "scans (target: 2x), each batch scan one read of the source for all k models."
    ]
    for r in rows:
        per_full = r["irls_s"] / max(r["irls_scans"], 1)
        per_batch = r["drop_s"] / max(r["drop_scans"], 1)
        out.append(
            f"- `{r['model']}`: a batch scan took {per_batch:.3g} s against {per_full:.3g} s "
            f"for the full fit's average IRLS scan ({per_batch / per_full:.1f}x, with up to "
            f"{r['terms']} models in it): the read is shared, the per-row arithmetic of each "
            "model is not, so the time grows with k even where the scan count does not."
        )
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--rows", default="1e7")
    ap.add_argument("--models", default="poisson_num,poisson,poisson_cat")
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--out", default=os.path.join(HERE, "RESULTS.md"))
    ap.add_argument("--memory-limit", default=None)
    ap.add_argument("--timeout", type=float, default=3600.0)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    if args.child:
        print(MARK + json.dumps(child(json.loads(args.child))), flush=True)
        return 0
    n = int(float(args.rows))
    path, _ = bench_data.ensure_data(args.data_dir, n)
    rows, failed = [], []
    for model in args.models.split(","):
        plain = run_one(path, model, False, args.memory_limit, args.timeout)
        drop = run_one(path, model, True, args.memory_limit, args.timeout)
        bad = [r for r in (plain, drop) if r["status"] != "ok"]
        if bad:
            failed += bad
            print(json.dumps(bad), flush=True)
            continue
        row = compare(plain, drop)
        rows.append(row)
        print(
            f"{model}: k={row['terms']}  full {row['full_scans']} scans {row['full_s']:.2f} s"
            f"  |  drop-one {row['drop_scans']} scans {row['drop_s']:.2f} s  |  ratio scans "
            f"{row['scan_ratio']:.2f}x  time {row['time_ratio']:.2f}x  |  peak "
            f"{row['peak_drop']:.0f} MiB",
            flush=True,
        )
    text = markdown(rows, failed, n)
    print(text)
    if not args.no_write:
        write_section(text, args.out, BEGIN, END)
    return 0


if __name__ == "__main__":
    sys.exit(main())
