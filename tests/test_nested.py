"""``indb nested SMALL BIG`` and ``indb.nested``: a registered model within a larger one
(issue 15, item 3).

Oracle: statsmodels (test-only) refits of both models on the same data (datasets shipped in
statsmodels and scikit-learn), their deviance difference, and scipy.stats' chi-squared and F
survival functions; for the Gaussian identity model also statsmodels' OLS ``compare_f_test``,
the textbook F test of nested least-squares fits, which checks the GLM route's F statistic
(deviance change per df over the larger model's Pearson dispersion) where the two coincide.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from click.testing import CliRunner
from diagnostics_cases import SM_FIT, diabetes, fair_affair, fair_children, grunfeld
from numpy.testing import assert_allclose
from reference_cases import design_matrix
from scipy import stats
from statsmodels.genmod.families import links

import indb
from indb.cli import main
from indb.errors import DeploymentWarning, RegistryError, SpecError

# both fits converge to 1e-13; a deviance difference of two such fits keeps ~1e-9
RTOL = 1e-8


def database(tmp_path: Path, **tables: pd.DataFrame) -> str:
    path = str(tmp_path / "nested.duckdb")
    con = duckdb.connect(path)
    for name, frame in tables.items():
        con.register("frame", frame)
        con.execute(f'CREATE OR REPLACE TABLE "{name}" AS SELECT * FROM frame')
        con.unregister("frame")
    con.close()
    return path


def fit(path: str, name: str, **kw: Any) -> indb.FitResult:
    kw.setdefault("source", "data")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeploymentWarning)
        return indb.fit(db=path, name=name, tol=1e-13, promote=True, **kw)


def sm_fit(frame: pd.DataFrame, response: str, predictors: list[str], family: Any, **kw: Any):
    x = design_matrix(frame, predictors, categorical=kw.pop("categorical", ()))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return sm.GLM(frame[response], x, family=family, **kw).fit(**SM_FIT)


def test_poisson_with_offset_chi_squared(tmp_path: Path) -> None:
    # statsmodels.datasets.fair: children ~ rating + age (+ religious + educ), offset
    # ln(years married); fixed dispersion: chi-squared on the added coefficients
    frame = fair_children()
    path = database(tmp_path, data=frame)
    common = {"response": "children", "family": "poisson", "offset": "ln(years)"}
    fit(path, "small", predictors=["rating", "age"], **common)
    fit(path, "big", predictors=["rating", "religious", "age", "educ"], **common)
    test = indb.nested("small", "big", db=path)
    off = np.log(frame["years"])
    s = sm_fit(frame, "children", ["rating", "age"], sm.families.Poisson(), offset=off)
    b = sm_fit(
        frame, "children", ["rating", "religious", "age", "educ"], sm.families.Poisson(), offset=off
    )
    change = s.deviance - b.deviance
    df = b.df_model - s.df_model  # 3 religious levels and educ
    assert (test.test, test.df, test.rows) == ("chi2", df, len(frame)) and df == 4
    assert_allclose(test.deviance_change, change, rtol=RTOL)
    assert_allclose(test.statistic, change, rtol=RTOL)
    assert_allclose(test.p_value, stats.chi2.sf(change, df), rtol=1e-6)
    # the design built from the data names the same coefficients (reference_cases)
    assert set(test.terms_added) == set(b.params.index) - set(s.params.index)


def test_binomial_two_versions_of_one_model(tmp_path: Path) -> None:
    # statsmodels.datasets.fair: had_affair; version 1 without, version 2 with the
    # rating x religiousness interaction (NAME:VERSION references)
    frame = fair_affair()
    path = database(tmp_path, data=frame)
    common = {
        "response": "had_affair",
        "family": "binomial",
        "predictors": ["rate_marriage", "religious", "age"],
        "categorical": ["rate_marriage", "religious"],
    }
    fit(path, "aff", **common)
    fit(path, "aff", interactions=[("rate_marriage", "religious")], **common)
    test = indb.nested("aff:1", "aff:2", db=path)
    cat = ["rate_marriage", "religious"]
    preds = ["rate_marriage", "religious", "age"]
    s = sm_fit(frame, "had_affair", preds, sm.families.Binomial(), categorical=cat)
    x = design_matrix(frame, preds, categorical=cat, interactions=[("rate_marriage", "religious")])
    b = sm.GLM(frame["had_affair"], x, family=sm.families.Binomial()).fit(**SM_FIT)
    change = s.deviance - b.deviance
    assert (test.small, test.big, test.df) == ("aff:1", "aff:2", 12)
    assert_allclose(test.deviance_change, change, rtol=RTOL)
    assert_allclose(test.p_value, stats.chi2.sf(change, 12), rtol=1e-6)


def test_gamma_f_with_the_larger_models_dispersion(tmp_path: Path) -> None:
    # statsmodels.datasets.grunfeld: invest ~ value + capital (+ firm), gamma with log link;
    # estimated dispersion: F = (change / df) / phi_big on (df, residual df of the big model)
    frame = grunfeld()
    path = database(tmp_path, data=frame)
    common = {"response": "invest", "family": "gamma", "link": "log"}
    fit(path, "small", predictors=["value", "capital"], **common)
    fit(path, "big", predictors=["value", "capital", "firm"], **common)
    test = indb.nested("small", "big", db=path)
    fam = sm.families.Gamma(links.Log())
    s = sm_fit(frame, "invest", ["value", "capital"], fam)
    b = sm_fit(frame, "invest", ["value", "capital", "firm"], sm.families.Gamma(links.Log()))
    change, df = s.deviance - b.deviance, 10
    f = change / df / b.scale  # statsmodels' scale: Pearson's chi-squared / residual df
    assert (test.test, test.df) == ("F", df)
    assert_allclose(test.deviance_change, change, rtol=RTOL)
    assert_allclose(test.dispersion, b.scale, rtol=1e-7)
    assert test.residual_df == b.df_resid == 220 - 13
    assert_allclose(test.statistic, f, rtol=1e-7)
    assert_allclose(test.p_value, stats.f.sf(f, df, b.df_resid), rtol=1e-5)


def test_gaussian_f_is_the_least_squares_f_test(tmp_path: Path) -> None:
    # sklearn.datasets.load_diabetes: target ~ bmi + bp (+ s5 + sex); for the Gaussian
    # identity model the F test is OLS's compare_f_test
    frame = diabetes()
    path = database(tmp_path, data=frame)
    fit(path, "small", response="target", predictors=["bmi", "bp"])
    fit(path, "big", response="target", predictors=["bmi", "bp", "s5", "sex"], categorical=["sex"])
    test = indb.nested("small", "big", db=path)
    xs = design_matrix(frame, ["bmi", "bp"])
    xb = design_matrix(frame, ["bmi", "bp", "s5", "sex"], categorical=["sex"])
    ols_small = sm.OLS(frame["target"], xs).fit()
    ols_big = sm.OLS(frame["target"], xb).fit()
    f, p, df = ols_big.compare_f_test(ols_small)
    assert (test.test, test.df) == ("F", int(df))
    assert_allclose(test.deviance_change, ols_small.ssr - ols_big.ssr, rtol=1e-9)
    assert_allclose(test.statistic, f, rtol=1e-9)
    assert_allclose(test.p_value, p, rtol=1e-7)


# -- refusals ----------------------------------------------------------------------------------


def nested_cli(path: str, *args: str) -> Any:
    return CliRunner().invoke(main, ["nested", *args, "--db", path])


def registry_events(path: str) -> int:
    con = duckdb.connect(path, read_only=True)
    try:
        return con.execute("SELECT count(*) FROM indb_registry.registry_event").fetchone()[0]
    finally:
        con.close()


@pytest.fixture(scope="module")
def grunfeld_models(tmp_path_factory: pytest.TempPathFactory) -> str:
    # statsmodels.datasets.grunfeld, with an exposure and a weight column of our own
    frame = grunfeld().assign(
        exposure=lambda f: 1.0 + f["row_id"] % 3, w=lambda f: 1.0 + f["row_id"] % 2
    )
    doubled = frame.assign(invest=frame["invest"] * 2)
    path = database(tmp_path_factory.mktemp("nested"), data=frame, doubled=doubled)
    common = {"response": "invest", "family": "gamma", "link": "log", "exclude": ["row_id"]}
    big = ["value", "capital", "firm"]
    fit(path, "small", predictors=["value", "capital"], **common)
    fit(path, "big", predictors=big, **common)
    fit(path, "other", source="doubled", predictors=big, **common)
    fit(path, "offset", predictors=big, offset="ln(exposure)", **common)
    fit(path, "weighted", predictors=big, weight="w", **common)
    fit(path, "poisson", response="invest", family="poisson", predictors=["value", "firm"])
    fit(path, "capital_only", predictors=["capital", "firm"], **common)
    return path


@pytest.mark.parametrize(
    ("small", "big", "message"),
    [
        ("small", "other", "sources differ ('main.data' and 'main.doubled')"),
        ("small", "offset", "offset expressions differ (none and 'ln(exposure)')"),
        ("small", "weighted", "weight expressions differ (none and 'w')"),
        ("small", "poisson", "families differ ('gamma' and 'poisson')"),
        ("big", "small", "terms 'firm=Atlantic Refining', "),
        ("small", "capital_only", "terms 'value' of the smaller model are not in the larger one"),
        ("big", "big", "the larger model adds none"),
        ("small:x", "big", "the part after ':' must be a version number"),
    ],
)
def test_refused_naming_the_difference(
    grunfeld_models: str, small: str, big: str, message: str
) -> None:
    path = grunfeld_models
    before = registry_events(path)
    with pytest.raises(SpecError, match=None) as err:
        indb.nested(small, big, db=path)
    assert message in str(err.value)
    out = nested_cli(path, small, big)
    assert out.exit_code == 2
    lines = out.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("indb: error: ") and message in lines[0]
    assert registry_events(path) == before  # nothing written


def test_different_rows_are_refused(tmp_path: Path) -> None:
    # the same table, but the larger model reads a column with NULLs: fewer rows used
    frame = grunfeld().assign(extra=lambda f: f["capital"].where(f["row_id"] % 7 != 0))
    path = database(tmp_path, data=frame)
    common = {"response": "invest", "family": "gamma", "link": "log"}
    fit(path, "small", predictors=["value", "capital"], **common)
    fit(path, "big", predictors=["value", "capital", "extra"], **common)
    with pytest.raises(SpecError, match=r"rows used differ \(220 and 188\)"):
        indb.nested("small", "big", db=path)


def test_unknown_model_or_version(grunfeld_models: str) -> None:
    with pytest.raises(RegistryError, match="no model named 'nope'"):
        indb.nested("nope", "big", db=grunfeld_models)
    with pytest.raises(RegistryError, match="has no version 9"):
        indb.nested("small:9", "big", db=grunfeld_models)
    assert nested_cli(grunfeld_models, "small:9", "big").exit_code == 7


def test_cli_text_and_json(grunfeld_models: str) -> None:
    text = nested_cli(grunfeld_models, "small", "big")
    assert text.exit_code == 0, text.output
    lines = text.output.splitlines()
    assert lines[0] == "small:1 within big:1: gamma, 220 rows used by both"
    assert lines[6].startswith("deviance change   ") and " on 10 df (added: firm=" in lines[6]
    assert lines[7].startswith("F                 ") and "on 10 and 207 df" in lines[7]
    assert lines[8].startswith("p-value           ")
    out = CliRunner().invoke(main, ["nested", "small", "big:1", "--db", grunfeld_models, "--json"])
    got = json.loads(out.output)["nested"]
    want = indb.nested("small", "big", db=grunfeld_models).to_dict()
    assert got == want and got["test"] == "F" and got["df"] == 10
