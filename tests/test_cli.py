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
import numpy as np
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
    # use_t=True: the dispersion is estimated, so intervals and p-values use t on residual_df
    # (API contract); statsmodels GLM uses the normal distribution unless asked.
    fitted = sm.GLM(data["invest"], exog, family=sm.families.Gaussian()).fit(use_t=True)
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
    if result.stdout:  # only under --json (issue 13): one JSON error object, the same words
        assert json.loads(result.stdout) == {
            "error": lines[0].removeprefix("indb: error: "),
            "exit_code": code,
        }
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


# The options' names (as in Python and spec files) and their former spellings, kept as
# hidden aliases for one release: both must reach the library the same way.
@pytest.mark.parametrize(
    ("only", "interact"), [("--predictors", "--interactions"), ("--only", "--interact")]
)
def test_json_fit_with_categorical_reference_interaction_and_only(
    cpunish_parquet: Path, only: str, interact: str
):
    result = _run(
        "fit",
        "--family",
        "poisson",
        "--response",
        "EXECUTIONS",
        only,
        "INCOME",
        only,
        "PERPOVERTY",
        only,
        "SOUTH",
        "--categorical",
        "SOUTH",
        "--reference",
        "SOUTH=1",
        interact,
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
    # 90% intervals from statsmodels (t quantiles on residual_df, as the API contract says).
    bounds = oracle.conf_int(alpha=0.10).to_numpy()
    assert_allclose([c["lower_bound"] for c in out["coefficients"]], bounds[:, 0], rtol=1e-6)
    assert_allclose([c["upper_bound"] for c in out["coefficients"]], bounds[:, 1], rtol=1e-6)
    assert out["confidence"] == 0.9


def test_text_report_with_progress_lines(cpunish_parquet: Path):
    result = _run("fit", "--family", "poisson", "--response", "EXECUTIONS", str(cpunish_parquet))
    assert result.exit_code == 0, result.stderr
    progress = [line for line in result.stderr.splitlines() if line.startswith("indb: iteration")]
    assert progress, result.stderr
    assert all("deviance" in line and "relative change" in line for line in progress)
    # before them, a line per pre-fit scan (describe, profile, levels...), so a long
    # profile on a big table is not silent
    lines = result.stderr.splitlines()
    prefit = [line for line in lines if line.startswith("indb: pre-fit scan")]
    assert prefit and lines.index(prefit[-1]) < lines.index(progress[0])
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
    assert "Wald t" in text.stdout and "firm=General Motors" in text.stdout
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


def test_missing_database_file_is_not_created(tmp_path: Path):
    db_path = tmp_path / "typo.duckdb"
    result = _run("fit", "--db", str(db_path), "--family", "gaussian", "--response", "y", "t")
    _assert_one_error_line(result, 2, "--db", "typo.duckdb")
    assert not db_path.exists()


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
        ("--splines", "value=four"),
        ("--splines", "value"),
        ("--interactions", "value"),
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

    # Text mode: the warning is printed once, in the report's notes, not again on stderr;
    # the report is printed in full and the exit code still says "did not converge".
    text = _run(*base, str(cpunish_parquet))
    assert text.exit_code == 5, text.stderr
    assert "NOT converged" in text.stdout
    notes = text.stdout.split("NOTES FROM THE FIT")[1].split("CAUTION")[0]
    assert "did not converge" in notes
    assert "indb: warning:" not in text.stderr

    lenient = _run(*base, "--json", str(cpunish_parquet))
    assert lenient.exit_code == 5
    out = json.loads(lenient.stdout)  # the whole result, as one JSON document
    assert out["converged"] is False
    assert any(line.startswith("indb: warning:") for line in lenient.stderr.splitlines())
    assert all(math.isfinite(c["estimate"]) for c in out["coefficients"])


# -- every model option reaches the library (checked against statsmodels) -------------


def _write(tmp_path: Path, name: str, frame: pd.DataFrame) -> Path:
    path = tmp_path / f"{name}.parquet"
    frame.to_parquet(path, index=False)
    return path


# IRLS stops on the relative change of the deviance, which is quadratic in the coefficient
# error near the optimum: a deviance tolerance of 1e-8 leaves coefficients loose at about
# 1e-4 on some designs below (both in indb and in statsmodels). Both sides are therefore
# fitted to a tight tolerance before comparing at COEF_RTOL.
TIGHT_TOL = 1e-14


def _fit_json(path: Path, *args: str) -> dict[str, Any]:
    return _json(_run("fit", *args, "--tol", str(TIGHT_TOL), "--json", str(path)))


def _oracle(model: Any) -> Any:
    return model.fit(tol=TIGHT_TOL, maxiter=500)


def _check(out: dict[str, Any], exog: pd.DataFrame, oracle: Any, *, null: bool = True) -> None:
    terms = list(exog.columns)
    assert [c["term"] for c in out["coefficients"]] == terms
    assert_allclose([c["estimate"] for c in out["coefficients"]], oracle.params, rtol=COEF_RTOL)
    assert_allclose([c["std_error"] for c in out["coefficients"]], oracle.bse, rtol=COEF_RTOL)
    assert_allclose(out["deviance"], oracle.deviance, rtol=FIT_RTOL)
    if null:
        assert_allclose(out["null_deviance"], oracle.null_deviance, rtol=FIT_RTOL)


def test_trials_and_link_options(tmp_path: Path):
    # statsmodels.datasets.star98: grouped binomial (NABOVE successes out of NABOVE + NBELOW).
    data = sm.datasets.star98.load_pandas().data[
        ["NABOVE", "NBELOW", "LOWINC", "PERASIAN", "PERBLACK"]
    ]
    path = _write(tmp_path, "star98", data)
    out = _fit_json(
        path, "--family", "binomial", "--link", "probit", "--response", "NABOVE",
        "--trials", "NABOVE + NBELOW",
    )  # fmt: skip
    # NBELOW appears in --trials, so it is not a predictor (API contract).
    exog = sm.add_constant(data[["LOWINC", "PERASIAN", "PERBLACK"]]).rename(
        columns={"const": "intercept"}
    )
    endog = data[["NABOVE", "NBELOW"]].to_numpy()  # statsmodels: (successes, failures)
    family = sm.families.Binomial(link=sm.families.links.Probit())
    _check(out, exog, _oracle(sm.GLM(endog, exog, family=family)))


# statsmodels flags the inverse link for gamma (it does not keep the mean positive); the
# documented scotland example uses exactly that link, so the warning is expected.
@pytest.mark.filterwarnings("ignore:The InversePower link function does not respect the domain")
def test_offset_and_power_link_options(tmp_path: Path, cpunish_parquet: Path):
    data = _cpunish()
    out = _fit_json(
        cpunish_parquet, "--family", "poisson", "--response", "EXECUTIONS",
        "--offset", "ln(VC100k96)", "--only", "INCOME", "--only", "PERPOVERTY",
    )  # fmt: skip
    exog = sm.add_constant(data[["INCOME", "PERPOVERTY"]]).rename(columns={"const": "intercept"})
    oracle = _oracle(
        sm.GLM(
            data["EXECUTIONS"], exog, family=sm.families.Poisson(), offset=np.log(data["VC100k96"])
        )
    )
    _check(out, exog, oracle)  # null deviance with the offset refitted, like statsmodels

    # The statsmodels documentation's Gamma example on statsmodels.datasets.scotland uses
    # the canonical inverse link, which is the power link with exponent -1.
    scot = sm.datasets.scotland.load_pandas().data
    path = _write(tmp_path, "scotland", scot)
    out = _fit_json(
        path, "--family", "gamma", "--link", "power", "--link-power", "-1", "--response", "YES",
    )  # fmt: skip
    exog = sm.add_constant(scot.drop(columns="YES")).rename(columns={"const": "intercept"})
    family = sm.families.Gamma(link=sm.families.links.InversePower())
    _check(out, exog, _oracle(sm.GLM(scot["YES"], exog, family=family)))


def test_weight_options_and_no_intercept(tmp_path: Path, cpunish_parquet: Path):
    data = _cpunish()
    # SOUTH + 1 as a frequency weight: SOUTH is then not a predictor (API contract).
    out = _fit_json(
        cpunish_parquet, "--family", "poisson", "--response", "EXECUTIONS",
        "--frequency-weight", "SOUTH + 1", "--only", "INCOME", "--only", "PERBLACK",
    )  # fmt: skip
    exog = sm.add_constant(data[["INCOME", "PERBLACK"]]).rename(columns={"const": "intercept"})
    oracle = _oracle(
        sm.GLM(
            data["EXECUTIONS"], exog, family=sm.families.Poisson(), freq_weights=data["SOUTH"] + 1
        )
    )
    _check(out, exog, oracle)

    # statsmodels.datasets.scotland: Scottish referendum vote shares (32 council areas).
    scot = sm.datasets.scotland.load_pandas().data
    path = _write(tmp_path, "scotland", scot)
    out = _fit_json(
        path, "--family", "gamma", "--link", "log", "--response", "YES", "--weight", "ACT",
        "--only", "COUTAX", "--only", "UNEMPF",
    )  # fmt: skip
    exog = sm.add_constant(scot[["COUTAX", "UNEMPF"]]).rename(columns={"const": "intercept"})
    family = sm.families.Gamma(link=sm.families.links.Log())
    oracle = _oracle(sm.GLM(scot["YES"], exog, family=family, var_weights=scot["ACT"]))
    _check(out, exog, oracle)
    assert_allclose(out["dispersion"], oracle.scale, rtol=FIT_RTOL)

    out = _fit_json(
        path, "--family", "gaussian", "--response", "YES", "--no-intercept",
        "--only", "COUTAX", "--only", "UNEMPF",
    )  # fmt: skip
    exog = scot[["COUTAX", "UNEMPF"]]
    oracle = _oracle(sm.GLM(scot["YES"], exog, family=sm.families.Gaussian()))
    # Null deviance left out: without an intercept the null model is a convention choice.
    _check(out, exog, oracle, null=False)


def test_family_parameter_options(cpunish_parquet: Path):
    data = _cpunish()
    exog = sm.add_constant(data[["PERPOVERTY", "SOUTH"]]).rename(columns={"const": "intercept"})
    common = ("--response", "EXECUTIONS", "--only", "PERPOVERTY", "--only", "SOUTH")

    out = _fit_json(cpunish_parquet, "--family", "negative_binomial", "--theta", "2", *common)
    # Fixed theta = 2 is statsmodels' alpha = 1 / theta = 0.5.
    family = sm.families.NegativeBinomial(alpha=0.5)
    _check(out, exog, _oracle(sm.GLM(data["EXECUTIONS"], exog, family=family)))

    out = _fit_json(
        cpunish_parquet, "--family", "tweedie", "--power", "1.5", "--link", "log", *common
    )
    family = sm.families.Tweedie(var_power=1.5, link=sm.families.links.Log())
    _check(out, exog, _oracle(sm.GLM(data["EXECUTIONS"], exog, family=family)))
    assert out["family_params"]["power"] == 1.5


@pytest.mark.parametrize(("only", "nulls"), [("--predictors", "--on-null"), ("--only", "--nulls")])
def test_null_rows_set_aside_or_refused(tmp_path: Path, only: str, nulls: str):
    data = _cpunish()
    data.loc[[0, 3], "INCOME"] = np.nan  # pyarrow writes NaN in a float column as NULL
    path = _write(tmp_path, "cpunish_nulls", data)
    args = ("--family", "poisson", "--response", "EXECUTIONS", only, "INCOME")

    out = _fit_json(path, *args)
    assert out["n_excluded"] == 2 and out["n_used"] == len(data) - 2
    assert out["excluded_by_column"] == {"INCOME": 2}
    kept = data.dropna(subset=["INCOME"])
    exog = sm.add_constant(kept[["INCOME"]]).rename(columns={"const": "intercept"})
    _check(out, exog, _oracle(sm.GLM(kept["EXECUTIONS"], exog, family=sm.families.Poisson())))

    refused = _run("fit", *args, nulls, "error", str(path))
    _assert_one_error_line(refused, 2, "INCOME")


# -- option spellings: the option's name and its former spelling ---------------------------

# (former spelling, the option's name): hidden in --help for one release, still working
RENAMED = [
    ("--only", "--predictors"),
    ("--interact", "--interactions"),
    ("--spline", "--splines"),
    ("--nulls", "--on-null"),
]


def _spelt(args: tuple[str, ...], old: bool) -> list[str]:
    names = dict(RENAMED) if not old else {}
    return [names.get(a, a) for a in args]


def test_old_and_new_spellings_give_the_same_fit(tmp_path: Path):
    # Every renamed option at once, on data with a NULL so --on-null has work to do. The
    # fits are one code path under two spellings, so they must agree exactly; that the fit
    # itself is right is checked against statsmodels above (same spellings, parametrized).
    data = _cpunish()
    data.loc[[5], "PERPOVERTY"] = np.nan
    path = _write(tmp_path, "cpunish_null", data)
    model = (
        "fit", "--family", "poisson", "--response", "EXECUTIONS",
        "--only", "INCOME", "--only", "PERPOVERTY", "--only", "VC100k96",
        "--interact", "INCOME,PERPOVERTY", "--spline", "VC100k96=3",
    )  # fmt: skip
    assert "--only" in model and "--only" not in _spelt(model, old=False)

    def fit(old: bool, on_null: str) -> Result:
        return _run(*_spelt((*model, "--nulls", on_null), old), "--json", "-q", str(path))

    old, new = (_json(fit(flag, "exclude")) for flag in (True, False))
    assert old["n_excluded"] == 1 and new["n_excluded"] == 1
    keep = ("term", "estimate", "std_error")
    assert [[c[k] for k in keep] for c in old["coefficients"]] == [
        [c[k] for k in keep] for c in new["coefficients"]
    ]
    assert any("VC100k96" in c["term"] and c["term"] != "VC100k96" for c in new["coefficients"])
    for key in ("deviance", "null_deviance", "iterations", "n_used", "aic"):
        assert old[key] == new[key], key

    refused = [fit(flag, "error") for flag in (True, False)]
    assert _assert_one_error_line(refused[0], 2) == _assert_one_error_line(refused[1], 2)


def test_one_option_under_both_spellings(grunfeld_parquet: Path):
    base = ("fit", "--family", "gaussian", "--response", "invest", "--json", "-q")
    # repeated options add up across the two spellings
    both = _json(_run(*base, "--predictors", "value", "--only", "capital", str(grunfeld_parquet)))
    assert [c["term"] for c in both["coefficients"]] == ["intercept", "value", "capital"]
    # one value given twice must agree; the message names both spellings as typed
    clash = _run(*base, "--on-null", "error", "--nulls", "exclude", str(grunfeld_parquet))
    _assert_one_error_line(clash, 2, "--on-null and --nulls", "give it once")
    twice = _run(*base, "--splines", "value=4", "--spline", "value=3", str(grunfeld_parquet))
    _assert_one_error_line(twice, 2, "--splines and --spline", "'value'")


def test_help_shows_only_the_options_names():
    text = _run("fit", "--help").stdout
    for old, new in RENAMED:
        assert f"{new} " in text and f"{old} " not in text, (old, new)
    assert "--no-promote" in text and "--hold" not in text


@pytest.mark.slow
def test_demo_command_writes_reports(tmp_path: Path):
    out_dir = tmp_path / "demo"
    result = _run("demo", "--rows", "2000", "--out", str(out_dir))
    assert result.exit_code == 0, result.stderr
    written = sorted(out_dir.glob("*.json"))
    assert written
    for path in written:
        assert json.loads(path.read_text()).keys() >= REQUIRED_KEYS
    assert "CAUTION" in result.stdout
    # issue 13: the views keep policy_id (not a predictor), so scores join back to policies
    import duckdb

    con = duckdb.connect(str(out_dir / "demo.duckdb"), read_only=True)
    try:
        for view in ("frequency", "severity", "pure_premium", "lapse"):
            cols = [r[0] for r in con.execute(f"DESCRIBE {view}").fetchall()]
            assert "policy_id" in cols, view
            n, ids = con.execute(
                f"SELECT count(*), count(DISTINCT policy_id) FROM {view}"
            ).fetchone()
            assert n == ids > 0, view
        terms = json.loads((out_dir / "frequency.json").read_text())["coefficients"]
        assert not [t for t in terms if "policy_id" in t["term"]]
        # issue 14: the demo ends by judging the frequency model on held-out policies
        judged = json.loads((out_dir / "assessments" / "frequency.json").read_text())
        assert judged["rows"] == 500 and judged["model"] == "frequency"
        assert {"deviance", "gini", "bands", "levels"} <= judged.keys()
        assert "judged on" in result.stdout
        # issue 17: an HTML report per model (two with their holdout assessment), and the
        # demo's last lines say which files to open
        reports = out_dir / "reports"
        assert sorted(p.name for p in reports.glob("*.html")) == [
            "frequency.html",
            "lapse.html",
            "pure_premium.html",
            "severity.html",
        ]
        last = result.stdout.strip().splitlines()[-4:]
        assert [line.split()[0] for line in last] == [
            str(reports / f"{m}.html") for m in ("frequency", "severity", "pure_premium", "lapse")
        ]
        assert "with the holdout assessment" in last[0]
        for name, judged_too in (("frequency", True), ("severity", False), ("lapse", True)):
            page = (reports / f"{name}.html").read_text(encoding="utf-8")
            assert page.startswith("<!DOCTYPE html>") and ('id="holdout"' in page) == judged_too
        assert 'data-chart="calibration"' in (reports / "lapse.html").read_text(encoding="utf-8")
    finally:
        con.close()


def test_usage_errors_and_json_errors_are_one_line(tmp_path: Path):
    # issue 13: click's own option errors printed three lines against the documented one,
    # and --json printed nothing on an error
    bogus = _run("fit", "--bogus", "x")
    line = _assert_one_error_line(bogus, 2, "--bogus", "indb fit --help")
    assert bogus.stdout == "" and "Usage:" not in bogus.stderr, line
    missing = _run("fit", "--json", "--family", "poisson", "--response", "y", "nope.parquet")
    assert missing.exit_code != 0 and missing.stdout
    out = json.loads(missing.stdout)
    assert out["exit_code"] == missing.exit_code and out["error"]
    _assert_one_error_line(missing, missing.exit_code)


def test_required_options_are_asked_for(tmp_path: Path):
    # click 8.3 and later took the options' explicit default None as given, so a missing
    # --response or --family reached indb.fit and failed with a TypeError (exit 1) instead of
    # the one-line usage error (exit 2)
    source = str(tmp_path / "x.parquet")
    no_response = _run("fit", "--family", "poisson", source)
    _assert_one_error_line(no_response, 2, "Missing option '--response'", "indb fit --help")
    no_family = _run("fit", "--response", "y", source)
    _assert_one_error_line(no_family, 2, "Missing option '--family'")
