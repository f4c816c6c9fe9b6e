"""``indb assess NAME --against NAME2[:K]`` on DuckDB (issue 14, item 1): a second model
scored in the same scans as the first, its figures and the double-lift table, against
outside oracles; ``--record`` keeps the figures in the registry.

Data: statsmodels' fair survey (``tests/assess_cases.py``: even rows train, odd rows are
the holdout, with an unseen rating and three NULL ages). Oracle: statsmodels GLM fitted on
the training rows with each model's design (coefficients checked against indb's first), its
predictions on the holdout summed with pandas:

* the second model's expected and deviance: pandas sums of its predictions and statsmodels'
  ``family.deviance``; its deviance explained against statsmodels' intercept-only GLM;
* its Gini: the Lorenz curve written out with pandas (``assess_cases.lorenz_gini``) and, for
  a 0/1 response, scikit-learn's ``roc_auc_score`` (gini = (1 - mean y)(2 AUC - 1));
* the double-lift table: the rows grouped with numpy (``assess_cases.midpoint_bands``, bands
  of equal exposure along ln(score 2) - ln(score 1), a tie group whole in one band) and
  summed with pandas: exposure, actual, both models' predictions.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from assess_cases import (
    CASES,
    CHALLENGERS,
    COEF_RTOL,
    PREDICTORS_B,
    SM_FIT,
    SUM_RTOL,
    Case,
    Oracle,
    estimates,
    fair_frames,
    lorenz_gini,
    midpoint_bands,
    oracle,
)
from click.testing import CliRunner, Result
from numpy.testing import assert_allclose
from reference_cases import level_text
from sklearn.metrics import roc_auc_score

import indb
from indb.assessment import AssessResult
from indb.cli import main
from indb.errors import SpecError


@pytest.fixture(scope="module")
def models(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A DuckDB file with the fair survey's halves and six models in its registry."""
    db = tmp_path_factory.mktemp("against") / "models.duckdb"
    train, hold = fair_frames()
    with duckdb.connect(str(db)) as con:
        for name, frame in (("fair_train", train), ("fair_hold", hold)):
            con.register("frame", frame)
            con.execute(f"CREATE TABLE {name} AS SELECT * FROM frame")
            con.unregister("frame")
    results: dict[str, Any] = {}
    for name in ("children", "had"):
        results[name] = indb.fit(
            "SELECT rating, religious, age, children, had, years FROM fair_train",
            db=str(db),
            name=name,
            tol=1e-12,
            **CASES[name].fit,
        )
    for name, case in CHALLENGERS.items():
        results[name] = indb.fit(
            f"SELECT {', '.join(PREDICTORS_B)}, children, had, years FROM fair_train",
            db=str(db),
            name=name,
            tol=1e-12,
            **case.fit,
        )
    # models that cannot be compared with children: another response, other weights
    for name, extra in (
        ("affairs_p", {"response": "affairs", "offset": "ln(years)"}),
        ("children_w", {"response": "children", "offset": "ln(years)", "weight": "wt"}),
    ):
        indb.fit(
            f"SELECT {', '.join(PREDICTORS_B)}, children, affairs, years, wt FROM fair_train",
            family="poisson",
            db=str(db),
            name=name,
            **extra,
        )
    return {"db": db, "train": train, "hold": hold, "results": results}


def _oracle(models: dict[str, Any], case: Case) -> Oracle:
    """statsmodels on the training rows, predicting the holdout rows that both models of a
    comparison score (no NULL age); its coefficients checked against indb's first."""
    res = models["results"][case.name]
    orc = oracle(case, res, models["train"], models["hold"])
    assert_allclose([orc.params[t] for t in res.terms], estimates(res), rtol=COEF_RTOL, atol=1e-10)
    return orc


def _pair(models: dict[str, Any], first: str, second: str) -> tuple[Oracle, Oracle]:
    case1 = CASES[first]
    return _oracle(models, case1), _oracle(models, CHALLENGERS[second])


def _null_deviance(case: Case, orc: Oracle) -> float:
    """statsmodels' intercept-only GLM on the rows used (offset included)."""
    off = np.log(orc.frame[case.offset].to_numpy(float)) if case.offset else None
    fit = sm.GLM(orc.y, np.ones((len(orc.y), 1)), family=case.family, offset=off).fit(**SM_FIT)
    return float(fit.deviance)


def _assess(models: dict[str, Any], name: str, **kw: Any) -> AssessResult:
    return indb.assess(name, on="fair_hold", db=str(models["db"]), **kw)


def test_poisson_challenger_and_double_lift(models: dict[str, Any]) -> None:
    one, two = _pair(models, "children", "children_b")
    a = _assess(models, "children", against="children_b", by=["educ"])
    assert a.scans == 5  # the check and band scans shared, an order scan per large part
    # the rows both models score: the second has no age, yet rows with a NULL age stay out
    assert a.rows == len(one.frame) == len(two.frame) and a.excluded == {"NULL in age": 3}
    y, ex = one.y, one.exposure
    # the first model's figures are those of statsmodels' first fit
    assert_allclose(a.expected, one.mu.sum(), rtol=SUM_RTOL)
    case2 = CHALLENGERS["children_b"]
    b = a.against
    assert (b.model, b.version, b.family, b.link, b.offset) == (
        "children_b",
        1,
        "poisson",
        "log",
        "ln(years)",
    )
    # the second: pandas sums of statsmodels' predictions, its deviance formula, its
    # intercept-only GLM, the Lorenz curve written out
    assert_allclose(b.expected, two.mu.sum(), rtol=SUM_RTOL)
    dev2 = case2.family.deviance(y, two.mu)
    assert_allclose(b.deviance, dev2, rtol=SUM_RTOL)
    assert_allclose(b.mean_deviance, dev2 / len(y), rtol=SUM_RTOL)
    assert_allclose(b.deviance_explained, 1 - dev2 / _null_deviance(case2, two), rtol=1e-6)
    assert_allclose(b.gini, lorenz_gini(two.score, ex, y), rtol=1e-7)
    best = lorenz_gini(y / ex, ex, y)
    assert_allclose(b.gini_normalized, b.gini / best, rtol=1e-7)
    assert b.rows_unseen == 2  # the unseen rating '9' is unseen by both
    # the double-lift table: bands of equal exposure along ln(score 2) - ln(score 1)
    key = np.log(two.score) - np.log(one.score)
    band = midpoint_bands(key, ex, 10)
    frame = pd.DataFrame(
        {"band": band, "rows": 1, "ex": ex, "ac": y, "ep": one.mu, "ep2": two.mu, "k": key}
    )
    want = frame.groupby("band").agg(
        rows=("rows", "sum"),
        ex=("ex", "sum"),
        ac=("ac", "sum"),
        ep=("ep", "sum"),
        ep2=("ep2", "sum"),
        lo=("k", "min"),
        hi=("k", "max"),
    )
    got = pd.DataFrame([r.__dict__ for r in a.ratio_bands]).set_index("band")
    assert got.index.tolist() == want.index.tolist() == list(range(1, 11))
    assert got["rows"].tolist() == want["rows"].tolist()
    assert_allclose(got["exposure"], want["ex"], rtol=1e-12)
    assert_allclose(got["actual"], want["ac"], rtol=1e-12)
    assert_allclose(got["expected"], want["ep"], rtol=SUM_RTOL)
    assert_allclose(got["expected_against"], want["ep2"], rtol=SUM_RTOL)
    assert_allclose(got["ratio_low"], np.exp(want["lo"]), rtol=1e-7)
    assert_allclose(got["ratio_high"], np.exp(want["hi"]), rtol=1e-7)
    # every band and level carries the second model's expected (pandas sums)
    lift = midpoint_bands(one.score, ex, 10)
    assert_allclose(
        [x.expected_against for x in a.bands], np.bincount(lift, two.mu)[1:], rtol=SUM_RTOL
    )
    own = midpoint_bands(two.score, ex, 10)
    assert [x.rows for x in b.bands] == np.bincount(own)[1:].tolist()
    assert_allclose([x.expected_against for x in b.bands], np.bincount(own, two.mu)[1:], rtol=1e-7)
    assert_allclose([x.expected for x in b.bands], np.bincount(own, one.mu)[1:], rtol=1e-7)
    assert list(a.levels) == ["educ", "rating", "religious"]  # banded columns first
    levels = one.frame.assign(mu2=two.mu)
    want_lv = levels.groupby(levels["religious"].map(level_text))["mu2"].sum()
    got_lv = {lv.level: lv.expected_against for lv in a.levels["religious"]}
    assert_allclose([got_lv[k] for k in want_lv.index], want_lv.to_numpy(), rtol=SUM_RTOL)


def test_second_figures_are_its_own_assessment(models: dict[str, Any]) -> None:
    """On the same rows, the second model's figures are what assessing it alone gives, and
    swapping the two swaps them (the same scan, read from the other side)."""
    common = "SELECT * FROM fair_hold WHERE age IS NOT NULL"
    db = str(models["db"])
    a = indb.assess("children", on=common, db=db, against="children_b")
    alone = indb.assess("children_b", on=common, db=db)
    swapped = indb.assess("children_b", on=common, db=db, against="children")
    for key in ("expected", "deviance", "gini", "gini_normalized", "deviance_explained"):
        assert_allclose(getattr(a.against, key), getattr(alone, key), rtol=1e-12, err_msg=key)
        assert_allclose(getattr(swapped.against, key), getattr(a, key), rtol=1e-12, err_msg=key)
    # the double-lift table read from the other side: the same bands in reverse, up to the
    # band a tie group on a boundary goes to
    fwd = [(r.rows, r.expected, r.expected_against) for r in a.ratio_bands]
    back = [(r.rows, r.expected_against, r.expected) for r in swapped.ratio_bands][::-1]
    assert sum(r for r, _, _ in fwd) == sum(r for r, _, _ in back) == a.rows
    assert_allclose(
        sum(e for _, e, _ in fwd), sum(e for _, e, _ in back), rtol=1e-12
    )  # fmt: skip


def test_binomial_challenger_gini_is_its_auc(models: dict[str, Any]) -> None:
    one, two = _pair(models, "had", "had_b")
    a = _assess(models, "had", against="had_b", bands=5)
    y = one.y
    # scikit-learn's AUC of each model's predictions (ties counted half)
    auc1, auc2 = roc_auc_score(y, one.mu), roc_auc_score(y, two.mu)
    assert_allclose(a.gini_normalized, 2 * auc1 - 1, rtol=1e-9)
    assert_allclose(a.against.gini_normalized, 2 * auc2 - 1, rtol=1e-9)
    assert_allclose(a.against.gini, (1 - y.mean()) * (2 * auc2 - 1), rtol=1e-9)
    assert a.against.link == "probit"
    dev2 = CHALLENGERS["had_b"].family.deviance(y, two.mu)
    assert_allclose(a.against.deviance, dev2, rtol=SUM_RTOL)
    band = midpoint_bands(np.log(two.score) - np.log(one.score), np.ones(len(y)), 5)
    assert [r.rows for r in a.ratio_bands] == np.bincount(band)[1:].tolist()
    assert_allclose([r.actual for r in a.ratio_bands], np.bincount(band, y)[1:], rtol=1e-12)
    assert_allclose(
        [r.expected_against for r in a.ratio_bands], np.bincount(band, two.mu)[1:], rtol=SUM_RTOL
    )


def test_two_versions_of_one_model(models: dict[str, Any], tmp_path: Path) -> None:
    """NAME:K compares versions of one model: a refit on fewer rows against version 1."""
    db = tmp_path / "versions.duckdb"
    shutil.copyfile(models["db"], db)
    indb.fit(
        "SELECT rating, religious, age, children, years FROM fair_train WHERE age < 40",
        "children",
        "poisson",
        offset="ln(years)",
        db=str(db),
        name="children",
        promote=True,
    )
    a = indb.assess("children", on="fair_hold", db=str(db), against="children:1")
    first = indb.assess("children", on="fair_hold", db=str(db), version=1)
    assert (a.version, a.against.version) == (2, 1)
    assert_allclose(a.against.deviance, first.deviance, rtol=1e-12)
    assert_allclose(a.against.gini, first.gini, rtol=1e-12)


# -- the command line -----------------------------------------------------------------------------


def _run(*args: Any) -> Result:
    return CliRunner().invoke(main, [str(a) for a in args])


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_cli_text_and_json(models: dict[str, Any]) -> None:
    db = models["db"]
    before = _digest(db)
    args = ["assess", "children", "--db", db, "--on", "fair_hold", "--against", "children_b"]
    out = _run(*args, "--json")
    assert out.exit_code == 0, out.stderr
    doc = json.loads(out.stdout)
    a = _assess(models, "children", against="children_b")
    assert {"deviance", "gini", "expected"} <= set(doc["against"])
    for key in ("deviance", "gini", "expected", "gini_normalized", "mean_deviance"):
        assert_allclose(doc["against"][key], getattr(a.against, key), rtol=1e-12)
    assert set(doc["ratio_bands"][0]) == {
        "band", "rows", "weight", "exposure", "actual", "expected", "expected_against",
        "ratio_low", "ratio_high",
    }  # fmt: skip
    assert (
        "expected_against" in doc["bands"][0] and "expected_against" in doc["levels"]["rating"][0]
    )
    text = _run(*args)
    assert text.exit_code == 0 and text.stderr == ""
    lines = text.stdout.splitlines()
    assert any(ln.startswith("Against children_b v1 (poisson family, log link") for ln in lines)
    assert any(ln.startswith("Double lift: 10 bands of equal exposure") for ln in lines)
    assert sum("A/E against" in ln for ln in lines) >= 4  # double lift, bands, two levels
    # without --against the layout keeps its columns
    single = json.loads(
        _run("assess", "children", "--db", db, "--on", "fair_hold", "--json").stdout
    )
    assert "against" not in single and "expected_against" not in single["bands"][0]
    assert _digest(db) == before  # nothing written


BAD = [
    (["--against", "had"], 2, "their families differ ('poisson' and 'binomial')"),
    (["--against", "affairs_p"], 2, "their responses differ ('children' and 'affairs')"),
    (["--against", "children_w"], 2, "their weight expressions differ (None and 'wt')"),
    (["--against", "children_b:0"], 2, "against must be a model name, or NAME:K"),
    (["--against", "children_b:x"], 2, "against must be a model name, or NAME:K"),
    (["--against", "nosuch"], 7, "no model named 'nosuch' in the registry"),
    (["--against", "children_b:9"], 7, "model 'children_b' has no version 9"),
    (
        ["--against", "children_b", "--on", "SELECT * EXCLUDE (educ) FROM fair_hold"],
        2,
        "has no column 'educ' (a numeric predictor of model 'children_b')",
    ),
]


@pytest.mark.parametrize(("args", "code", "message"), BAD, ids=[m for _, _, m in BAD])
def test_cli_bad_input(models: dict[str, Any], args: list[str], code: int, message: str) -> None:
    db = models["db"]
    before = _digest(db)
    on = [] if "--on" in args else ["--on", "fair_hold"]
    for record in ([], ["--record"]):
        out = _run("assess", "children", "--db", db, *on, *args, *record)
        assert out.exit_code == code, (out.stdout, out.stderr)
        assert out.stdout == ""
        lines = out.stderr.splitlines()
        assert len(lines) == 1 and lines[0].startswith("indb: error: ") and message in lines[0]
    assert _digest(db) == before  # nothing written, --record or not


def test_python_bad_input(models: dict[str, Any]) -> None:
    with pytest.raises(SpecError, match="against must be text"):
        _assess(models, "children", against=["children_b"])
    with pytest.raises(SpecError, match="record must be true or false"):
        _assess(models, "children", record="yes")


def test_record_keeps_the_figures(models: dict[str, Any], tmp_path: Path) -> None:
    """--record writes one row per version judged (naming the other), which `versions` and
    `show` list; the figures are those the assessment printed."""
    db = tmp_path / "recorded.duckdb"
    shutil.copyfile(models["db"], db)
    out = _run(
        "assess", "children", "--db", db, "--on", "fair_hold", "--against", "children_b",
        "--record", "--json",
    )  # fmt: skip
    assert out.exit_code == 0, out.stderr
    doc = json.loads(out.stdout)
    single = _run("assess", "children", "--db", db, "--on", "fair_hold", "--record", "--json")
    assert single.exit_code == 0
    listed = json.loads(_run("versions", "children", "--db", db, "--json").stdout)
    rows = listed["assessments"]
    assert [(r["version"], r["purpose"], r["compared_model"]) for r in rows] == [
        (1, "assess", "children_b"),
        (1, "assess", None),
    ]
    assert rows[0]["source"] == "fair_hold" and rows[0]["n_used"] == doc["rows"]
    for key in ("deviance", "gini", "expected", "gini_normalized", "deviance_explained"):
        assert_allclose(rows[0][key], doc[key], rtol=1e-15)
    other = json.loads(_run("versions", "children_b", "--db", db, "--json").stdout)["assessments"]
    assert len(other) == 1 and (other[0]["compared_model"], other[0]["compared_version"]) == (
        "children",
        1,
    )
    assert_allclose(other[0]["deviance"], doc["against"]["deviance"], rtol=1e-15)
    assert other[0]["assessed_at"] == rows[0]["assessed_at"]
    with duckdb.connect(str(db), read_only=True) as con:
        stored = con.execute(
            "SELECT figures_json FROM indb_registry.version_assessment "
            "WHERE model_name = 'children' AND compared_model IS NOT NULL"
        ).fetchone()[0]
    assert json.loads(stored)["ratio_bands"] == doc["ratio_bands"]
    text = _run("versions", "children", "--db", db).stdout
    assert "Assessments, oldest first" in text and "children_b v1" in text
    shown = _run("show", "children", "--db", db)
    assert shown.exit_code == 0 and "Assessments, oldest first" in shown.stdout
    assert json.loads(_run("show", "children", "--db", db, "--json").stdout)["assessments"]
    # a model never judged lists none
    assert json.loads(_run("versions", "had", "--db", db, "--json").stdout)["assessments"] == []
