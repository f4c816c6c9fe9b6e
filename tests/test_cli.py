"""The ``indb`` command run end to end on small Parquet files and a DuckDB file.

Data: open datasets shipped inside the statsmodels package (``statsmodels.datasets``),
written to Parquet in ``tmp_path``. Oracle: statsmodels GLM fitted to the same data with a
design matrix built here from the API contract's coding rules (treatment coding, levels in
ascending string order, default reference = most frequent level, ties -> smallest level).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pytest
import statsmodels.api as sm
from click.testing import CliRunner, Result
from numpy.testing import assert_allclose

from indb.cli import main

# statsmodels and indb solve the same likelihood equations; agreement is limited by the two
# convergence tolerances (task brief: coefficients rtol 1e-6).
COEF_RTOL = 1e-6
FIT_RTOL = 1e-6

INDB = Path(sys.executable).parent / "indb"

REQUIRED_KEYS = {
    "coefficients",
    "deviance",
    "null_deviance",
    "pearson_chi2",
    "dispersion",
    "log_likelihood",
    "aic",
    "iterations",
    "converged",
    "n_used",
    "n_excluded",
}


# -- data ---------------------------------------------------------------------------


def _grunfeld() -> pd.DataFrame:
    # statsmodels.datasets.grunfeld: investment of 11 US firms over 20 years (220 rows).
    return sm.datasets.grunfeld.load_pandas().data


def _cpunish() -> pd.DataFrame:
    # statsmodels.datasets.cpunish: US executions by state in 1997 (17 rows).
    data = sm.datasets.cpunish.load_pandas().data
    # Stored as 0/1 integers so the categorical levels read "0" and "1".
    data["SOUTH"] = data["SOUTH"].astype("int64")
    return data


@pytest.fixture
def grunfeld_parquet(tmp_path: Path) -> Path:
    path = tmp_path / "grunfeld.parquet"
    _grunfeld().to_parquet(path, index=False)
    return path


@pytest.fixture
def cpunish_parquet(tmp_path: Path) -> Path:
    path = tmp_path / "cpunish.parquet"
    _cpunish().to_parquet(path, index=False)
    return path


# -- oracle -------------------------------------------------------------------------


def _grunfeld_oracle() -> tuple[list[str], Any]:
    """statsmodels GLM Gaussian for invest ~ value + capital + firm (year left out)."""
    data = _grunfeld()
    # Every firm has 20 rows, so the default reference is the smallest name.
    levels = sorted(data["firm"].unique())
    assert data["firm"].value_counts().nunique() == 1
    exog = pd.DataFrame({"intercept": 1.0, "value": data["value"], "capital": data["capital"]})
    for level in levels[1:]:
        exog[f"firm={level}"] = (data["firm"] == level).astype(float)
    fitted = sm.GLM(data["invest"], exog, family=sm.families.Gaussian()).fit()
    return list(exog.columns), fitted


def _assert_matches_oracle(out: dict[str, Any], terms: list[str], oracle: Any) -> None:
    got_terms = [c["term"] for c in out["coefficients"]]
    assert got_terms == terms
    assert_allclose(
        [c["estimate"] for c in out["coefficients"]], oracle.params.to_numpy(), rtol=COEF_RTOL
    )
    assert_allclose(
        [c["std_error"] for c in out["coefficients"]], oracle.bse.to_numpy(), rtol=COEF_RTOL
    )
    assert_allclose(out["deviance"], oracle.deviance, rtol=FIT_RTOL)
    assert_allclose(out["null_deviance"], oracle.null_deviance, rtol=FIT_RTOL)
    assert_allclose(out["pearson_chi2"], oracle.pearson_chi2, rtol=FIT_RTOL)
    assert_allclose(out["dispersion"], oracle.scale, rtol=FIT_RTOL)


def _run(*args: str) -> Result:
    return CliRunner().invoke(main, list(args))


def _json(result: Result) -> dict[str, Any]:
    assert result.exit_code == 0, result.stderr
    return json.loads(result.stdout)  # fails unless stdout is exactly one JSON document


def _assert_one_error_line(result: Result, code: int, *needles: str) -> str:
    assert result.exit_code == code, (result.exit_code, result.stdout, result.stderr)
    lines = [line for line in result.stderr.splitlines() if line.startswith("indb: error:")]
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.stderr and "Traceback" not in result.stdout
    assert result.stdout == ""
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    return lines[0]


# -- successful fits ----------------------------------------------------------------


def test_json_fit_matches_statsmodels_gaussian(grunfeld_parquet: Path):
    result = _run(
        "fit",
        "--family",
        "gaussian",
        "--response",
        "invest",
        "--exclude",
        "year",
        "--json",
        str(grunfeld_parquet),
    )
    out = _json(result)
    assert out.keys() >= REQUIRED_KEYS
    for coef in out["coefficients"]:
        assert {"term", "estimate", "std_error"} <= coef.keys()
    assert "intercept" in out["coefficients"][0]["term"]
    level_terms = [c["term"] for c in out["coefficients"] if "firm" in c["term"]]
    assert any("General Motors" in t for t in level_terms)
    assert result.stderr == ""  # --json: no progress lines

    terms, oracle = _grunfeld_oracle()
    _assert_matches_oracle(out, terms, oracle)
    # Gaussian identity: statsmodels' llf also uses the ML dispersion, so they agree.
    assert_allclose(out["log_likelihood"], oracle.llf, rtol=FIT_RTOL)
    # indb counts the estimated dispersion as a parameter (API contract); statsmodels'
    # aic counts only the rank, hence the +1.
    k = len(terms) + 1
    assert_allclose(out["aic"], -2 * oracle.llf + 2 * k, rtol=FIT_RTOL)
    assert out["n_used"] == len(_grunfeld()) and out["n_excluded"] == 0
    assert out["converged"] is True and out["iterations"] >= 1
    assert out["test"] == "t"


def test_json_fit_with_categorical_reference_interaction_and_only(cpunish_parquet: Path):
    result = _run(
        "fit",
        "--family",
        "poisson",
        "--response",
        "EXECUTIONS",
        "--only",
        "INCOME",
        "--only",
        "PERPOVERTY",
        "--only",
        "SOUTH",
        "--categorical",
        "SOUTH",
        "--reference",
        "SOUTH=1",
        "--interact",
        "INCOME,PERPOVERTY",
        "--json",
        "-q",
        str(cpunish_parquet),
    )
    out = _json(result)
    terms = ["intercept", "INCOME", "PERPOVERTY", "SOUTH=0", "INCOME & PERPOVERTY"]

    # Oracle: statsmodels GLM Poisson on the matching design.
    data = _cpunish()
    exog = pd.DataFrame(
        {
            "intercept": 1.0,
            "INCOME": data["INCOME"],
            "PERPOVERTY": data["PERPOVERTY"],
            "SOUTH=0": (data["SOUTH"] == 0).astype(float),
            "INCOME & PERPOVERTY": data["INCOME"] * data["PERPOVERTY"],
        }
    )
    oracle = sm.GLM(data["EXECUTIONS"], exog, family=sm.families.Poisson()).fit()
    _assert_matches_oracle(out, terms, oracle)
    assert_allclose(out["log_likelihood"], oracle.llf, rtol=FIT_RTOL)
    # Fixed dispersion: indb's AIC counts the rank only, like statsmodels.
    assert_allclose(out["aic"], oracle.aic, rtol=FIT_RTOL)
    assert out["dispersion"] == 1.0 and out["test"] == "z"
    south = next(c for c in out["coefficients"] if c["term"] == "SOUTH=0")
    assert "SOUTH" in south["columns"] and "0" in south["levels"]


def test_db_file_with_table_source_and_confidence(tmp_path: Path, grunfeld_parquet: Path):
    db_path = tmp_path / "models.duckdb"
    with duckdb.connect(str(db_path)) as con:
        con.execute(
            "CREATE TABLE grunfeld AS SELECT * FROM read_parquet(?)", [str(grunfeld_parquet)]
        )
    out = _json(
        _run(
            "fit",
            "--db",
            str(db_path),
            "--family",
            "gaussian",
            "--response",
            "invest",
            "--exclude",
            "year",
            "--confidence",
            "0.9",
            "--json",
            "grunfeld",
        )
    )
    terms, oracle = _grunfeld_oracle()
    _assert_matches_oracle(out, terms, oracle)
    # 90% intervals from statsmodels (t quantiles on df_resid, as the API contract says).
    bounds = oracle.conf_int(alpha=0.10).to_numpy()
    assert_allclose([c["ci_low"] for c in out["coefficients"]], bounds[:, 0], rtol=1e-6)
    assert_allclose([c["ci_high"] for c in out["coefficients"]], bounds[:, 1], rtol=1e-6)
    assert out["confidence"] == 0.9


def test_text_report_with_progress_lines(cpunish_parquet: Path):
    result = _run("fit", "--family", "poisson", "--response", "EXECUTIONS", str(cpunish_parquet))
    assert result.exit_code == 0, result.stderr
    progress = [line for line in result.stderr.splitlines() if line.startswith("indb: iteration")]
    assert progress, result.stderr
    assert all("deviance" in line and "relative change" in line for line in progress)
    assert "relativity" in result.stdout and "CAUTION" in result.stdout
    iterations_line = next(line for line in result.stdout.splitlines() if "IRLS iterations" in line)
    assert int(iterations_line.split()[2]) == len(progress)

    quiet = _run(
        "fit", "--family", "poisson", "--response", "EXECUTIONS", "-q", str(cpunish_parquet)
    )
    assert quiet.exit_code == 0 and quiet.stderr == ""
    assert quiet.stdout == result.stdout.replace(
        _wall_time(result.stdout), _wall_time(quiet.stdout)
    )


def _wall_time(report: str) -> str:
    return next(line for line in report.splitlines() if "wall time" in line)


def test_installed_console_script_runs_end_to_end(tmp_path: Path, grunfeld_parquet: Path):
    args = [
        str(INDB),
        "fit",
        "--family",
        "gaussian",
        "--response",
        "invest",
        "--exclude",
        "year",
    ]
    as_json = subprocess.run(
        [*args, "--json", str(grunfeld_parquet)], capture_output=True, text=True, timeout=120
    )
    assert as_json.returncode == 0, as_json.stderr
    out = json.loads(as_json.stdout)
    terms, oracle = _grunfeld_oracle()
    _assert_matches_oracle(out, terms, oracle)

    text = subprocess.run(
        [*args, str(grunfeld_parquet)], capture_output=True, text=True, timeout=120
    )
    assert text.returncode == 0, text.stderr
    assert "t ratio" in text.stdout and "firm=General Motors" in text.stdout
    assert "indb: iteration" in text.stderr

    bad = subprocess.run(
        [str(INDB), "fit", "--family", "gaussian", "--response", "no_such_column", "--json"]
        + [str(grunfeld_parquet)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert bad.returncode == 2
    assert bad.stderr.startswith("indb: error:") and "no_such_column" in bad.stderr
    assert "Traceback" not in bad.stderr


# -- failures -----------------------------------------------------------------------


def test_unknown_response_column(grunfeld_parquet: Path):
    result = _run("fit", "--family", "gaussian", "--response", "nosuch", str(grunfeld_parquet))
    _assert_one_error_line(result, 2, "nosuch")


def test_unknown_predictor_in_only(grunfeld_parquet: Path):
    result = _run(
        "fit",
        "--family",
        "gaussian",
        "--response",
        "invest",
        "--only",
        "valu",
        str(grunfeld_parquet),
    )
    _assert_one_error_line(result, 2, "valu")


def test_unknown_family(grunfeld_parquet: Path):
    result = _run("fit", "--family", "poison", "--response", "invest", str(grunfeld_parquet))
    _assert_one_error_line(result, 2, "poison")


def test_negative_counts_for_poisson(tmp_path: Path):
    # statsmodels.datasets.macrodata: realint (real interest rate) is negative in 52 quarters.
    data = sm.datasets.macrodata.load_pandas().data[["realint", "unemp"]]
    assert (data["realint"] < 0).any()
    path = tmp_path / "macro.parquet"
    data.to_parquet(path, index=False)
    result = _run("fit", "--family", "poisson", "--response", "realint", str(path))
    _assert_one_error_line(result, 2, "realint")


def test_missing_source_file(tmp_path: Path):
    result = _run(
        "fit", "--family", "gaussian", "--response", "y", str(tmp_path / "absent.parquet")
    )
    assert result.exit_code != 0
    lines = result.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("indb: error:"), result.stderr
    assert "absent.parquet" in lines[0]


@pytest.mark.parametrize(
    ("option", "value"),
    [
        ("--reference", "firm"),
        ("--reference", "=General Motors"),
        ("--spline", "value=four"),
        ("--interact", "value"),
        ("--interact", "value,"),
    ],
)
def test_malformed_option_values(grunfeld_parquet: Path, option: str, value: str):
    result = _run(
        "fit",
        "--family",
        "gaussian",
        "--response",
        "invest",
        option,
        value,
        str(grunfeld_parquet),
    )
    _assert_one_error_line(result, 2, option, repr(value))


def test_strict_non_convergence_exits_5(cpunish_parquet: Path):
    base = ["fit", "--family", "poisson", "--response", "EXECUTIONS", "--max-iter", "1"]
    strict = _run(*base, "--strict", str(cpunish_parquet))
    _assert_one_error_line(strict, 5)

    lenient = _run(*base, "--json", str(cpunish_parquet))
    out = _json(lenient)
    assert out["converged"] is False and out["iterations"] == 1
    assert any(line.startswith("indb: warning:") for line in lenient.stderr.splitlines())
    assert all(math.isfinite(c["estimate"]) for c in out["coefficients"])
