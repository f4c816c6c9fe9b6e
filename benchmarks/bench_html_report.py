"""Benchmark of ``indb report``: the HTML report of a model fitted on ``--train`` rows, judged
on ``--holdout`` rows, against plain DuckDB scans of the holdout, on the invented policies
of the demo (``indb/demo_data.py``).

The demo's frequency model (Poisson, offset ln(exposure), 5 numeric and 3 categorical
predictors) and a lean one (the 3 categorical predictors only, the second model of
``--against``) are fitted once on the training policies (seed 2026; the registry is kept in
``--data-dir`` and reused). Each report runs in a fresh process, its steps timed apart: the
registry read and the assessment's scans (``report_run.build_page``), the drawing
(``html_report.render_html``) and the write; its peak resident memory (``VmHWM``) includes
Python, DuckDB and matplotlib. The floor is ``SELECT count(*), sum(col), ...`` over the
holdout's columns the assessment reads (string lengths for the categorical ones), best of 3
after a warm-up. The target (issue 17): under 3 plain scans of the holdout plus a few
seconds of drawing.

    .venv/bin/python benchmarks/bench_html_report.py --train 1e7 --holdout 1e6

The table goes into ``benchmarks/RESULTS.md`` between this script's markers (``bench_fit.py``
keeps the section when it rewrites the file).
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

BEGIN = "<!-- bench_html_report.py: begin -->"
END = "<!-- bench_html_report.py: end -->"

CHILD = """
import json, sys, time
from pathlib import Path
from indb.api import registry
from indb.html_report import render_html
from indb.report_run import build_page, check_out_path, write_atomically
db, on, out, against = sys.argv[1], sys.argv[2] or None, sys.argv[3], sys.argv[4] or None
t0 = time.perf_counter()
path = check_out_path(out)
reg = registry(db, read_only=True)
try:
    t1 = time.perf_counter()
    page = build_page(reg.engine, reg, "frequency", on=on, against=against)
    t2 = time.perf_counter()
finally:
    reg.engine.close()
text = render_html(page)
t3 = time.perf_counter()
size = write_atomically(text, path)
t4 = time.perf_counter()
a = page.assessment
peak = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM"))
print(json.dumps({
    "gather": t2 - t1, "assess": a.seconds if a else 0.0, "scans": a.scans if a else 0,
    "render": t3 - t2, "write": t4 - t3, "total": t4 - t0, "kib": size / 1024,
    "charts": text.count('data-chart="'), "peak_mib": peak / 1024,
}))
"""


def rows_arg(text: str) -> int:
    return int(float(text.replace("^", "e").replace("10e", "1e")))


def floor_seconds(path: str) -> float:
    """Best of 3 plain aggregate scans of the holdout's columns (after a warm-up)."""
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


def fitted_registry(data_dir: str, rows: int) -> tuple[str, float | None]:
    """The DuckDB file holding the frequency model fitted on ``rows`` policies (fitted now
    unless kept from an earlier run), and the fit's seconds when it ran now."""
    import indb

    train = os.path.join(data_dir, f"policies_{rows}_2026.parquet")
    if not os.path.exists(train):
        demo_data.write_policies(train, rows, seed=2026)
    db = os.path.join(data_dir, f"report_models_{rows}.duckdb")
    if os.path.exists(db):
        return db, None
    model = next(m for m in demo_models(train) if m.name == "frequency")
    t0 = time.perf_counter()
    tmp = db + ".partial"
    indb.fit(model.source, db=tmp, name="frequency", **model.options)
    os.replace(tmp, db)
    return db, time.perf_counter() - t0


#: the second model of ``--against``: the frequency model with its categorical predictors only
LEAN = "frequency_lean"


def lean_model(db: str, train: str) -> float | None:
    """Fit :data:`LEAN` into ``db`` unless it is there; the fit's seconds when it ran now."""
    import indb
    from indb.errors import RegistryError

    reg = indb.api.registry(db, read_only=True)
    try:
        reg.model(LEAN)
        return None
    except RegistryError:
        pass
    finally:
        reg.engine.close()
    model = next(m for m in demo_models(train) if m.name == "frequency")
    t0 = time.perf_counter()
    indb.fit(model.source, db=db, name=LEAN, predictors=list(FACTORS),
             **{k: v for k, v in model.options.items() if k != "exclude"})  # fmt: skip
    return time.perf_counter() - t0


def write_section(path: Path, text: str) -> None:
    """Replace this script's section of ``path`` (or append it)."""
    old = path.read_text() if path.exists() else ""
    if BEGIN in old and END in old:
        head, rest = old.split(BEGIN, 1)
        tail = rest.split(END, 1)[1].lstrip("\n")
        new = head + text + ("\n" + tail if tail else "")
    else:
        new = old.rstrip("\n") + "\n\n" + text
    path.write_text(new)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--train", default="1e7", type=rows_arg)
    ap.add_argument("--holdout", default="1e6", type=rows_arg)
    ap.add_argument("--data-dir", default=str(HERE / "data"))
    ap.add_argument("--out", default=str(HERE / "RESULTS.md"))
    args = ap.parse_args()
    os.makedirs(args.data_dir, exist_ok=True)
    db, fit_seconds = fitted_registry(args.data_dir, args.train)
    lean_seconds = lean_model(
        db, os.path.join(args.data_dir, f"policies_{args.train}_2026.parquet")
    )
    hold = os.path.join(args.data_dir, f"policies_{args.holdout}_2027.parquet")
    if not os.path.exists(hold):
        demo_data.write_policies(hold, args.holdout, seed=2027)
    floor = floor_seconds(hold)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    work = tempfile.mkdtemp(prefix="indb-report-bench-")
    rows = []
    for on, against in ((hold, LEAN), (hold, ""), ("", "")):
        out = subprocess.run(
            [sys.executable, "-c", CHILD, db, on, os.path.join(work, "report.html"), against],
            capture_output=True,
            text=True,
            env=env,
            check=True,
        )
        m = json.loads(out.stdout.strip().splitlines()[-1])
        rows.append((on, against, m))
        print(json.dumps(m), flush=True)
    load = os.getloadavg()[0]
    lines = [
        BEGIN,
        "## HTML report (`benchmarks/bench_html_report.py`)",
        "",
        f"Measured {time.strftime('%Y-%m-%d %H:%M')}: the demo's frequency model fitted on "
        f"{args.train:,} invented policies"
        + (f" ({fit_seconds:.0f} s)" if fit_seconds else "")
        + f", its report judged on {args.holdout:,} held-out policies (`--on`), against "
        f"`{LEAN}` (the 3 categorical predictors only"
        + (f"; fitted in {lean_seconds:.0f} s" if lean_seconds else "")
        + ") in the same scans (`--against`), and without "
        f"a holdout; nproc {os.cpu_count()}, load average {load:.1f} at the end of the run "
        "(other jobs shared the machine when it is above the core count). Floor: a plain "
        f"aggregate scan of the holdout's columns, best of 3: **{floor:.3f} s**.",
        "",
        "| --on | --against | scans of the holdout | assessment s | assessment / floor | "
        "gather s | drawing s | charts | write s | total s | file KiB | peak MiB |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    for on, against, m in rows:
        ratio = f"{m['assess'] / floor:.1f}" if on else "-"
        lines.append(
            f"| {'holdout' if on else '-'} | {against or '-'} | {m['scans']} | "
            f"{m['assess']:.2f} | {ratio} | "
            f"{m['gather']:.2f} | {m['render']:.2f} | {m['charts']} | {m['write']:.3f} | "
            f"{m['total']:.2f} | {m['kib']:,.0f} | {m['peak_mib']:.0f} |"
        )
    lines += [
        "",
        "The report reads nothing of the training rows; with `--on` it runs the assessment's "
        "scans of the holdout (a check scan, an order scan that sorts the tie groups of the "
        "score and the actual rate and bands the model's numeric columns, and a band scan "
        "that takes every sum); `--against` scores the second model in the check and band "
        "scans and adds an order scan each for its score and for the ratio of the two "
        "scores. *assessment / floor* is the assessment's time "
        "over one plain scan of the holdout's columns: the target is under 3. *gather* is the "
        "registry read plus the assessment; *drawing* is matplotlib drawing every chart to "
        "SVG and the page's layout.",
        END,
    ]
    text = "\n".join(lines) + "\n"
    print(text)
    write_section(Path(args.out), text)


if __name__ == "__main__":
    main()
