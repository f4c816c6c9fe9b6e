"""The built-in demo: invented motor-insurance data fitted end to end inside DuckDB.

``indb demo`` writes the invented policy table of a fictional insurer to Parquet, then fits
four models on it without loading the table into Python: claim frequency (Poisson with an
exposure offset), claim severity (gamma, log link, weighted by claim count), pure premium
(Tweedie) and lapse (logistic). It prints each report and, because the data are invented
with known true coefficients, how close the fitted frequency model comes to the truth. It
ends by judging the frequency model on held-out policies (``indb assess``).
"""

from __future__ import annotations

import math
import os
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from indb import demo_data
from indb.api import assess, fit, report_html
from indb.assess_report import assess_json, assess_text
from indb.engines.duckdb import DuckDBEngine
from indb.report import render_json, render_report
from indb.results import FitResult

NUMERIC = ["driver_age", "vehicle_power", "vehicle_age", "bonus_malus", "density"]
FACTORS = ["region", "vehicle_group", "fuel"]


@dataclass(frozen=True)
class DemoModel:
    """One worked example: a name, a source query and the fit options."""

    name: str
    title: str
    source: str
    options: dict[str, Any]


def demo_models(parquet: str) -> list[DemoModel]:
    """The four worked examples over the invented policy file."""
    lit = "'" + parquet.replace("'", "''") + "'"
    # policy_id rides along (excluded from the predictors) so that the scoring views can be
    # joined back to the policies
    cols = ", ".join(["policy_id", *NUMERIC, *FACTORS])
    return [
        DemoModel(
            "frequency",
            "Claim frequency: Poisson, log link, offset ln(exposure)",
            f"SELECT {cols}, claim_count, exposure FROM read_parquet({lit})",
            {
                "response": "claim_count",
                "family": "poisson",
                "offset": "ln(exposure)",
                "exclude": ["policy_id"],
            },
        ),
        DemoModel(
            "severity",
            "Claim severity: gamma, log link, weight = claim count",
            f"SELECT {cols}, claim_cost / claim_count AS average_cost, claim_count "
            f"FROM read_parquet({lit}) WHERE claim_count > 0",
            {
                "response": "average_cost",
                "family": "gamma",
                "link": "log",
                "weight": "claim_count",
                "exclude": ["policy_id"],
            },
        ),
        DemoModel(
            "pure_premium",
            "Pure premium: Tweedie (power 1.5), log link, weight = exposure",
            f"SELECT {cols}, claim_cost / exposure AS loss_cost, exposure FROM read_parquet({lit})",
            {
                "response": "loss_cost",
                "family": "tweedie",
                "power": 1.5,
                "weight": "exposure",
                "exclude": ["policy_id"],
            },
        ),
        DemoModel(
            "lapse",
            "Lapse at renewal: binomial, logit link",
            f"SELECT {cols}, claim_count, lapsed FROM read_parquet({lit})",
            {"response": "lapsed", "family": "binomial", "exclude": ["policy_id"]},
        ),
    ]


def run(
    quick: bool = False,
    out_dir: str = "demo_out",
    rows: int | None = None,
    echo: Callable[[str], None] = print,
) -> dict[str, FitResult]:
    """Generate the invented data, fit the four models, print and save the reports."""
    n = rows if rows is not None else (100_000 if quick else 1_000_000)
    os.makedirs(out_dir, exist_ok=True)
    parquet = os.path.join(out_dir, "policies.parquet")
    t0 = time.perf_counter()
    demo_data.write_policies(parquet, n)
    echo(
        f"indb demo: wrote {n:,} invented policies of {demo_data.INSURER} to {parquet} "
        f"({time.perf_counter() - t0:.1f} s)"
    )
    echo("All data are invented; see indb/demo_data.py for the scenario and its true effects.\n")
    db_path = os.path.join(out_dir, "demo.duckdb")
    for stale in (db_path, db_path + ".wal"):
        if os.path.exists(stale):
            os.remove(stale)  # each demo run starts a fresh database
    engine = DuckDBEngine(db_path)
    results: dict[str, FitResult] = {}
    try:
        for m in demo_models(parquet):
            echo("=" * 100)
            echo(m.title)
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                res = fit(
                    m.source, db=engine, name=m.name, intervals=m.name == "frequency", **m.options
                )
            for w in caught:
                echo(f"warning: {w.message}")
            echo(render_report(res))
            with open(os.path.join(out_dir, f"{m.name}.json"), "w", encoding="utf-8") as fh:
                fh.write(render_json(res))
            with open(os.path.join(out_dir, f"{m.name}.txt"), "w", encoding="utf-8") as fh:
                fh.write(render_report(res))
            results[m.name] = res
        echo("=" * 100)
        echo(
            truth_table(
                results["frequency"],
                demo_data.FREQUENCY_TRUTH,
                "Claim frequency: fitted vs the invented truth",
            )
        )
        echo("")
        echo(scoring_tour(engine, results))
        echo("=" * 100)
        echo(holdout_assessment(engine, out_dir, n, echo))
        pages = html_reports(engine, out_dir, list(results))
    finally:
        engine.close()
    echo(f"\nindb demo: done in {time.perf_counter() - t0:.1f} s; text reports in {out_dir}/")
    echo("HTML reports (one self-contained file each; open in any browser, works offline):")
    for name, path in pages.items():
        extra = "  (with the holdout assessment)" if name in JUDGED else ""
        echo(f"  {path}{extra}")
    return results


def scoring_tour(engine: DuckDBEngine, results: dict[str, FitResult]) -> str:
    """Show the models living in the database: registry rows, a view, a macro."""
    con = engine.con
    lines = ["The fitted models now live in the database file as SQL:"]
    for name, res in results.items():
        dep = res.deployment
        lines.append(
            f"  {name:<13} registry version {dep['version']}, scoring view "
            f"{dep['scoring_view']} (column {dep['mean_column']}), macro {dep['macro']}"
        )
    rows = con.execute(
        "SELECT region, fuel, round(sum(score_mean) / sum(exposure), 5) AS predicted, "
        "round(sum(claim_count) / sum(exposure), 5) AS observed, count(*) AS policies "
        "FROM frequency GROUP BY ALL ORDER BY region, fuel LIMIT 6"
    ).fetchall()
    lines.append(
        "\nClaims per policy-year from the scoring view (first rows):\n"
        "SELECT region, fuel, sum(score_mean) / sum(exposure), ... "
        "FROM frequency GROUP BY ALL"
    )
    lines.append(f"  {'region':<10}{'fuel':<8}{'predicted':>11}{'observed':>10}{'policies':>10}")
    for r in rows:
        lines.append(f"  {r[0]:<10}{r[1]:<8}{r[2]:>11}{r[3]:>10}{r[4]:>10}")
    one = con.execute(
        "SELECT frequency_score(30, 7, 2, 60.0, 1.5, 'Southbay', 'G09', 'diesel', 1.0)"
    ).fetchall()[0][0]
    lines.append(
        "\nSELECT frequency_score(30, 7, 2, 60.0, 1.5, 'Southbay', 'G09', 'diesel', 1.0)"
        f"\n  -> {one:.5f} expected claims in a policy-year"
    )
    return "\n".join(lines)


#: seed of the held-out policies: the same invented book, policies the fits never saw
HOLDOUT_SEED = 2027


def holdout_assessment(
    engine: DuckDBEngine, out_dir: str, n: int, echo: Callable[[str], None]
) -> str:
    """Judge the frequency model on held-out policies (a quarter as many, another seed),
    inside the database; the text and JSON are saved in ``assessments/``."""
    path = os.path.join(out_dir, "holdout.parquet")
    demo_data.write_policies(path, max(n // 4, 1), seed=HOLDOUT_SEED)
    echo(f"Held-out policies: {max(n // 4, 1):,} more invented policy-years in {path}\n")
    result = assess("frequency", path, db=engine, by=["driver_age"])
    text = assess_text(result)
    # apart from the fits' reports: a folder of their own
    folder = os.path.join(out_dir, "assessments")
    os.makedirs(folder, exist_ok=True)
    with open(os.path.join(folder, "frequency.txt"), "w", encoding="utf-8") as fh:
        fh.write(text)
    with open(os.path.join(folder, "frequency.json"), "w", encoding="utf-8") as fh:
        fh.write(assess_json(result))
    return (
        f"indb assess frequency --db {os.path.join(out_dir, 'demo.duckdb')} --on {path} "
        f"--by driver_age\n\n{text}"
    )


#: the models whose HTML report includes their assessment on the held-out policies
JUDGED = ("frequency", "lapse")


def html_reports(engine: DuckDBEngine, out_dir: str, names: list[str]) -> dict[str, str]:
    """Each model's HTML report in ``reports/``, those of :data:`JUDGED` with their
    assessment on the held-out policies. Returns the paths by model."""
    folder = os.path.join(out_dir, "reports")
    os.makedirs(folder, exist_ok=True)
    holdout = os.path.join(out_dir, "holdout.parquet")
    pages = {}
    for name in names:
        path = os.path.join(folder, f"{name}.html")
        report_html(name, path, db=engine, on=holdout if name in JUDGED else None)
        pages[name] = path
    return pages


def truth_table(res: FitResult, truth: dict[str, float], title: str) -> str:
    """Fitted coefficients beside the invented true values, in standard errors."""
    lines = [title, f"{'term':<24}{'truth':>10}{'fitted':>10}{'gap/se':>9}"]
    for term, true in truth.items():
        try:
            c = res.coef(term)
        except KeyError:
            continue
        z = (c.estimate - true) / c.std_error if c.std_error > 0 else math.nan
        lines.append(f"{term:<24}{true:>10.4f}{c.estimate:>10.4f}{z:>9.2f}")
    return "\n".join(lines)
