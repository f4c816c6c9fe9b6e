"""``indb assess`` and ``indb.assess`` on DuckDB (issue 14, items 1 and 2): a stored model
judged on holdout rows, against outside oracles.

Data and oracle: ``tests/assess_cases.py`` (statsmodels' fair survey and STAR98 data sets;
statsmodels GLM fitted on the training rows, checked against indb's coefficients, its
holdout predictions summed with pandas). Each check names its oracle:

* deviance: statsmodels' ``family.deviance`` on the oracle's predictions (with its
  ``var_weights`` / ``freq_weights``); mean deviance: scikit-learn's
  ``mean_poisson_deviance`` / ``mean_gamma_deviance`` (``sample_weight``);
* deviance explained: the deviance of statsmodels' intercept-only GLM on the holdout rows
  (offset and weights included);
* Gini of a 0/1 response: scikit-learn's ``roc_auc_score`` through gini = (1 - mean y)
  (2 AUC - 1) and gini_normalized = 2 AUC - 1 (ties counted half on both sides); other
  responses: the Lorenz curve written out with pandas (``assess_cases.lorenz_gini``);
* bands and the Hosmer-Lemeshow statistic: the grouping written out with numpy
  (``assess_cases.midpoint_bands``: equal weight, a tie group whole in the band of its
  midpoint) and the formula of Hosmer and Lemeshow, *Applied Logistic Regression*, with
  scipy's chi-squared tail for the p-value.
"""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from assess_cases import (
    CASES,
    COEF_RTOL,
    SM_FIT,
    SUM_RTOL,
    Case,
    Oracle,
    design,
    estimates,
    fair_count_frames,
    fair_frames,
    hosmer_lemeshow,
    lorenz_gini,
    midpoint_bands,
    oracle,
    predictors,
    star_frames,
)
from click.testing import CliRunner, Result
from numpy.testing import assert_allclose
from reference_cases import level_text
from scipy import stats
from sklearn.metrics import mean_gamma_deviance, mean_poisson_deviance, roc_auc_score

import indb
from indb.assessment import CAUTION, AssessResult
from indb.cli import main
from indb.errors import RegistryError, SpecError

TABLES = {
    "fair": fair_frames,
    "fair_counts": fair_count_frames,
    "star": star_frames,
}


@pytest.fixture(scope="module")
def models(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """A DuckDB file with the training and holdout tables and every case's model in its
    registry (fitted by indb at tol 1e-12)."""
    db = tmp_path_factory.mktemp("assess") / "models.duckdb"
    frames = {name: load() for name, load in TABLES.items()}
    with duckdb.connect(str(db)) as con:
        for name, (train, hold) in frames.items():
            for suffix, frame in (("train", train), ("hold", hold)):
                con.register("frame", frame)
                con.execute(f'CREATE TABLE "{name}_{suffix}" AS SELECT * FROM frame')
                con.unregister("frame")
    results = {}
    for case in CASES.values():
        results[case.name] = indb.fit(
            f"SELECT {', '.join([*predictors(case), *_extra(case)])} FROM {case.table}_train",
            db=str(db),
            name=case.name,
            tol=1e-12,
            **case.fit,
        )
    return {"db": db, "frames": frames, "results": results}


def _extra(case: Case) -> list[str]:
    cols = [case.fit["response"]]
    cols += [c for c in (case.offset, case.weight, case.trials, case.freq) if c]
    return cols


def _oracle(models: dict[str, Any], name: str) -> Oracle:
    case = CASES[name]
    train, hold = models["frames"][case.table]
    res = models["results"][name]
    orc = oracle(case, res, train, hold)
    # the oracle itself: statsmodels' coefficients against indb's (same likelihood equations,
    # both converged far below this)
    assert_allclose([orc.params[t] for t in res.terms], estimates(res), rtol=COEF_RTOL, atol=1e-10)
    return orc


def _assess(models: dict[str, Any], name: str, **kw: Any) -> AssessResult:
    table = CASES[name].table
    return indb.assess(name, on=f"{table}_hold", db=str(models["db"]), **kw)


def _null_deviance(case: Case, orc: Oracle) -> float:
    """statsmodels' intercept-only GLM on the holdout rows, offset and weights included."""
    off = np.log(orc.frame[case.offset].to_numpy(float)) if case.offset else None
    fit = sm.GLM(
        orc.y,
        np.ones((len(orc.y), 1)),
        family=case.family,
        offset=off,
        var_weights=orc.pw,
        freq_weights=orc.fw,
    ).fit(**SM_FIT)
    return float(fit.deviance)


def _check_totals(a: AssessResult, case: Case, orc: Oracle) -> None:
    w = orc.fw * orc.pw
    # pandas sums of statsmodels' predictions
    assert a.rows == len(orc.frame)
    assert_allclose(a.weight, w.sum(), rtol=1e-12)
    assert_allclose(a.exposure, orc.exposure.sum(), rtol=1e-12)
    assert_allclose(a.actual, (w * orc.y).sum(), rtol=1e-12)
    assert_allclose(a.expected, (w * orc.mu).sum(), rtol=SUM_RTOL)
    # statsmodels' own deviance formula, with its weights
    dev = case.family.deviance(orc.y, orc.mu, var_weights=orc.pw, freq_weights=orc.fw)
    assert_allclose(a.deviance, dev, rtol=SUM_RTOL)
    assert_allclose(a.mean_deviance, dev / w.sum(), rtol=SUM_RTOL)
    d0 = _null_deviance(case, orc)
    assert_allclose(a.null_deviance, d0, rtol=SUM_RTOL)
    assert_allclose(a.deviance_explained, 1.0 - dev / d0, rtol=1e-6)


def _check_bands(a: AssessResult, orc: Oracle, n: int = 10) -> None:
    """The score's bands against the grouping written out with numpy."""
    w = orc.fw * orc.pw
    band = midpoint_bands(orc.score, orc.exposure, n)
    frame = pd.DataFrame(
        {"band": band, "rows": 1, "ex": orc.exposure, "ac": w * orc.y, "ep": w * orc.mu}
    )
    want = frame.groupby("band").sum()
    got = pd.DataFrame([b.__dict__ for b in a.bands]).set_index("band")
    assert list(got.index) == list(want.index)
    assert got["rows"].tolist() == want["rows"].tolist()
    assert_allclose(got["exposure"], want["ex"], rtol=1e-12)
    assert_allclose(got["actual"], want["ac"], rtol=1e-12)
    assert_allclose(got["expected"], want["ep"], rtol=SUM_RTOL)
    lows = pd.Series(orc.score).groupby(band).min()
    assert_allclose(got["score_low"], lows.to_numpy(), rtol=1e-7)


# -- the models ---------------------------------------------------------------------------------


def test_poisson_with_offset(models: dict[str, Any]) -> None:
    case, orc = CASES["children"], _oracle(models, "children")
    a = _assess(models, "children", by=["religious"])
    _, hold = models["frames"]["fair"]
    assert a.rows_read == len(hold) and a.rows_excluded == 3
    assert a.excluded == {"NULL in age": 3}  # counted and reported, never dropped silently
    assert a.scans == 3  # check, order and band scans
    _check_totals(a, case, orc)
    # scikit-learn's mean Poisson deviance (unit weights here)
    assert_allclose(a.mean_deviance, mean_poisson_deviance(orc.y, orc.mu), rtol=SUM_RTOL)
    # exposure = exp(offset): the Lorenz curve and the best ordering written out
    assert_allclose(a.gini, lorenz_gini(orc.score, orc.exposure, orc.y), rtol=1e-7)
    best = lorenz_gini(orc.y / orc.exposure, orc.exposure, orc.y)
    assert_allclose(a.gini_normalized, a.gini / best, rtol=1e-7)
    _check_bands(a, orc)
    # by level: the model's categorical predictors and the --by column, pandas sums
    assert list(a.levels) == ["rating", "religious"]
    frame = orc.frame.assign(mu=orc.mu, ex=orc.exposure, n=1)
    for column in ("rating", "religious"):
        want = frame.groupby(frame[column].map(level_text)).agg(
            rows=("n", "sum"), ex=("ex", "sum"), ac=("children", "sum"), ep=("mu", "sum")
        )
        got = pd.DataFrame([lv.__dict__ for lv in a.levels[column]]).set_index("level")
        assert got.index.tolist() == want.index.tolist()
        assert got["rows"].tolist() == want["rows"].tolist()
        assert_allclose(got["exposure"], want["ex"], rtol=1e-12)
        assert_allclose(got["actual"], want["ac"], rtol=1e-12)
        assert_allclose(got["expected"], want["ep"], rtol=SUM_RTOL)
    unseen = {lv.level: lv.unseen for lv in a.levels["rating"]}
    assert unseen == {"1": False, "2": False, "3": False, "4": False, "5": False, "9": True}
    assert not any(lv.unseen for lv in a.levels["religious"])  # every level seen
    assert a.rows_unseen == 2


def test_binomial_gini_is_the_auc(models: dict[str, Any]) -> None:
    case, orc = CASES["had"], _oracle(models, "had")
    a = _assess(models, "had")
    _check_totals(a, case, orc)
    # scikit-learn: gini = (1 - mean y)(2 AUC - 1), gini_normalized = 2 AUC - 1 for a 0/1
    # response with unit weights (ties counted half in both: the fair data have many)
    assert len(np.unique(orc.score)) < len(orc.score) / 10
    auc = roc_auc_score(orc.y, orc.mu)
    assert_allclose(a.gini, (1.0 - orc.y.mean()) * (2.0 * auc - 1.0), rtol=1e-9)
    assert_allclose(a.gini_normalized, 2.0 * auc - 1.0, rtol=1e-9)
    _check_bands(a, orc)
    # without an offset the calibration bands are the score's (exposure = weight)
    assert [(c.band, c.rows) for c in a.calibration] == [(b.band, b.rows) for b in a.bands]
    for c in a.calibration:
        assert_allclose(c.predicted, c.expected / c.weight, rtol=1e-15)
        assert_allclose(c.observed, c.actual / c.weight, rtol=1e-15)
    # Hosmer-Lemeshow written out with numpy over the same grouping; scipy's tail
    stat, df = hosmer_lemeshow(orc.mu, orc.y, orc.fw * orc.pw)
    hl = a.hosmer_lemeshow
    assert hl.df == df == 8
    assert_allclose(hl.statistic, stat, rtol=1e-6)
    assert_allclose(hl.p_value, stats.chi2.sf(stat, df), rtol=1e-5)


def test_binomial_with_trials(models: dict[str, Any]) -> None:
    case, orc = CASES["above"], _oracle(models, "above")
    a = _assess(models, "above", bands=5)
    # actual: successes; expected: trials x probability (statsmodels' predictions)
    assert_allclose(a.actual, models["frames"]["star"][1]["above"].sum(), rtol=1e-12)
    _check_totals(a, case, orc)
    _check_bands(a, orc, n=5)
    stat, df = hosmer_lemeshow(orc.mu, orc.y, orc.pw, n=5)
    assert a.hosmer_lemeshow.df == df == 3
    assert_allclose(a.hosmer_lemeshow.statistic, stat, rtol=1e-6)
    # continuous predictors: no ties, so 2 AUC - 1 is the pair count of the areas
    assert len(np.unique(orc.score)) == len(orc.score)


def test_gamma_with_prior_weights(models: dict[str, Any]) -> None:
    case, orc = CASES["educ"], _oracle(models, "educ")
    a = _assess(models, "educ")
    _check_totals(a, case, orc)
    # scikit-learn's weighted mean gamma deviance
    assert_allclose(
        a.mean_deviance, mean_gamma_deviance(orc.y, orc.mu, sample_weight=orc.pw), rtol=SUM_RTOL
    )
    # no offset: exposure is the prior weight
    assert_allclose(a.exposure, orc.pw.sum(), rtol=1e-12)
    assert_allclose(a.gini, lorenz_gini(orc.score, orc.pw, orc.pw * orc.y), rtol=1e-7)
    assert a.calibration is None and a.hosmer_lemeshow is None


def test_frequency_weights(models: dict[str, Any]) -> None:
    case, orc = CASES["had_counts"], _oracle(models, "had_counts")
    a = _assess(models, "had_counts")
    _check_totals(a, case, orc)
    # a frequency weight counts rows: scikit-learn's AUC with the same sample weights
    auc = roc_auc_score(orc.y, orc.mu, sample_weight=orc.fw)
    mean = (orc.fw * orc.y).sum() / orc.fw.sum()
    assert_allclose(a.gini, (1.0 - mean) * (2.0 * auc - 1.0), rtol=1e-9)
    assert_allclose(a.gini_normalized, 2.0 * auc - 1.0, rtol=1e-9)


def test_numeric_by_column_in_bands(models: dict[str, Any]) -> None:
    orc = _oracle(models, "children")
    a = _assess(models, "children", by=["educ", "religious"], bands=4)
    got = a.levels["educ"]
    band = midpoint_bands(orc.frame["educ"].to_numpy(float), orc.exposure, 4)
    frame = pd.DataFrame({"band": band, "ex": orc.exposure, "ac": orc.y, "ep": orc.mu, "n": 1})
    want = frame.groupby("band").sum()
    assert [lv.band for lv in got] == want.index.tolist()
    assert [lv.rows for lv in got] == want["n"].tolist()
    assert_allclose([lv.exposure for lv in got], want["ex"], rtol=1e-12)
    assert_allclose([lv.expected for lv in got], want["ep"], rtol=SUM_RTOL)
    edu = orc.frame["educ"].to_numpy(float)
    assert [lv.low for lv in got] == [edu[band == b].min() for b in want.index]
    assert [lv.high for lv in got] == [edu[band == b].max() for b in want.index]
    # a NULL in a column outside the model is a level of its own, not an exclusion
    a2 = indb.assess(
        "children",
        on="SELECT * REPLACE (CASE WHEN row_id % 7 = 0 THEN NULL ELSE educ END AS educ) "
        "FROM fair_hold",
        db=str(models["db"]),
        by=["educ"],
    )
    assert a2.rows == a.rows
    nulls = [lv for lv in a2.levels["educ"] if lv.level is None]
    assert len(nulls) == 1 and nulls[0].band is None
    assert sum(lv.rows for lv in a2.levels["educ"]) == a.rows


def test_offset_without_closed_form_is_iterated(models: dict[str, Any]) -> None:
    """A negative binomial with an offset: its constant-rate model has no closed form and is
    fitted by IRLS over null scans. Oracle: statsmodels' intercept-only GLM with the same
    theta (alpha = 1 / theta)."""
    db = str(models["db"])
    train, hold = models["frames"]["fair"]
    res = indb.fit(
        "SELECT rating, religious, age, children, years FROM fair_train",
        "children",
        "negative_binomial",
        theta=2.0,
        offset="ln(years)",
        db=db,
        name="children_nb",
        # the coefficients settle to about sqrt(tol) standard errors: 1e-12 leaves 5e-7 of
        # one here, 1e-14 leaves 2e-8 (measured), inside the comparison's 1e-7
        tol=1e-14,
    )
    family = sm.families.NegativeBinomial(alpha=0.5)
    case = Case("children_nb", "fair", {"response": "children"}, family, offset="years")
    orc = oracle(case, res, train, hold)
    assert_allclose([orc.params[t] for t in res.terms], estimates(res), rtol=COEF_RTOL)
    a = indb.assess("children_nb", on="fair_hold", db=db)
    assert a.scans > 3
    _check_totals(a, case, orc)


def test_rows_without_a_valid_mean_are_counted(models: dict[str, Any]) -> None:
    """A holdout row whose age puts eta beyond the log link's range gets no mean: it is set
    aside and reported, and the constant-rate model is refitted on the rows used."""
    res = models["results"]["educ"]
    sign = 1.0 if res.coef("age").estimate > 0 else -1.0
    on = (
        f"SELECT * FROM fair_hold UNION ALL "
        f"SELECT * REPLACE ({sign * 1e9} AS age) FROM fair_hold WHERE row_id = 0"
    )
    a = indb.assess("educ", on=on, db=str(models["db"]))
    base = _assess(models, "educ")
    assert a.excluded == {"NULL in age": 3, "no valid mean": 1}
    assert a.rows == base.rows and a.rows_read == base.rows_read + 1
    assert a.scans == 4  # the mean of the rows used, scanned once more
    assert_allclose(a.null_deviance, base.null_deviance, rtol=1e-12)
    assert_allclose(a.deviance, base.deviance, rtol=1e-12)


# -- the command line ---------------------------------------------------------------------------


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _run(*args: Any) -> Result:
    return CliRunner().invoke(main, [str(a) for a in args])


def test_cli_text_and_json(models: dict[str, Any]) -> None:
    db = models["db"]
    before = _digest(db)
    args = ["assess", "children", "--db", db, "--on", "fair_hold", "--by", "religious"]
    out = _run(*args, "--json")
    assert out.exit_code == 0, out.stderr
    doc = json.loads(out.stdout)
    a = _assess(models, "children", by=["religious"])
    for key in ("rows", "weight", "actual", "expected", "deviance", "mean_deviance", "gini"):
        assert_allclose(doc[key], getattr(a, key), rtol=1e-12)
    assert doc["excluded"] == {"NULL in age": 3}
    assert set(doc["bands"][0]) == {
        "band", "rows", "weight", "exposure", "actual", "expected", "score_low", "score_high"
    }  # fmt: skip
    assert set(doc["levels"]["rating"][0]) == {
        "level", "rows", "weight", "exposure", "actual", "expected", "unseen"
    }  # fmt: skip
    text = _run(*args)
    assert text.exit_code == 0 and text.stderr == ""
    lines = text.stdout.splitlines()
    assert lines[0] == "Model children, version 1, judged on fair_hold"
    assert any(ln.startswith("rows used") and "3 set aside: NULL in age 3" in ln for ln in lines)
    assert any(ln.startswith("9 *") for ln in lines)  # the unseen rating, marked
    assert "*" not in text.stdout.replace("9 *", "").replace("* not a level", "")
    assert "Hosmer" not in text.stdout  # a Poisson model has no calibration table
    # the closing caution (wrapped)
    assert " ".join(lines[-2:]) == CAUTION
    hl = _run("assess", "had", "--db", db, "--on", "fair_hold", "--bands", "8")
    assert hl.exit_code == 0
    assert "Hosmer-Lemeshow chi-square" in hl.stdout and ", 6 df," in hl.stdout
    assert _digest(db) == before  # nothing written: the file is opened read-only


BAD = [
    (
        ["children", "--on", "SELECT rating, religious, age, years FROM fair_hold"],
        2,
        "has no column 'children' (the response of model 'children')",
    ),
    (
        ["children", "--on", "SELECT rating, children, age, years FROM fair_hold"],
        2,
        "has no column 'religious' (a categorical predictor of model 'children')",
    ),
    (["nosuch", "--on", "fair_hold"], 7, "no model named 'nosuch' in the registry"),
    (["children", "--on", "fair_hold", "--version", "9"], 7, "model 'children' has no version 9"),
    (
        ["educ", "--on", "SELECT * REPLACE (0.0 AS wt) FROM fair_hold"],
        2,
        "have zero exposure (sum of weight x trials is 0)",
    ),
    (
        ["had_counts", "--on", "SELECT * REPLACE (0 AS respondents) FROM fair_counts_hold"],
        2,
        "have zero exposure",
    ),
    (
        ["children", "--on", "SELECT * REPLACE (NULL::DOUBLE AS age) FROM fair_hold"],
        2,
        "has a NULL in a column the model reads (NULL counts: {'age': 3185})",
    ),
    (
        ["children", "--on", "SELECT * FROM fair_hold WHERE false"],
        2,
        "has no rows: nothing to assess",
    ),
    (
        ["children", "--on", "SELECT * REPLACE (-1 AS children) FROM fair_hold"],
        2,
        "family 'poisson' needs a response >= 0",
    ),
    (["children", "--on", "no_such_table"], 2, "cannot read the source 'no_such_table'"),
    (["children", "--on", "fair_hold", "--by", "nope"], 2, "by column 'nope' is not in"),
    (["children", "--on", "fair_hold", "--bands", "1"], 2, "--bands"),
]


@pytest.mark.parametrize(("args", "code", "message"), BAD, ids=[m for _, _, m in BAD])
def test_cli_bad_input(models: dict[str, Any], args: list[str], code: int, message: str) -> None:
    db = models["db"]
    before = _digest(db)
    out = _run("assess", *args, "--db", db)
    assert out.exit_code == code, (out.stdout, out.stderr)
    assert out.stdout == ""
    lines = out.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("indb: error: ") and message in lines[0]
    as_json = _run("assess", *args, "--db", db, "--json")
    assert as_json.exit_code == code
    doc = json.loads(as_json.stdout)
    assert doc["exit_code"] == code and message in doc["error"]
    assert _digest(db) == before  # nothing written


def test_python_bad_input(models: dict[str, Any]) -> None:
    db = str(models["db"])
    with pytest.raises(SpecError, match="bands must be a whole number from 2 to 1,000; got 1"):
        indb.assess("children", on="fair_hold", db=db, bands=1)
    with pytest.raises(SpecError, match="by column 'religious' is given twice"):
        indb.assess("children", on="fair_hold", db=db, by=["religious", "religious"])
    with pytest.raises(SpecError, match="give db= the database"):
        indb.assess("children", on="fair_hold", db=None)
    with pytest.raises(SpecError, match="by must be a list of column names"):
        indb.assess("children", on="fair_hold", db=db, by="religious")
    with pytest.raises(RegistryError, match="no model named 'nosuch'"):
        indb.assess("nosuch", on="fair_hold", db=db)
    with pytest.raises(SpecError, match="predictor column 'age' .* has type VARCHAR"):
        indb.assess("children", on="SELECT * REPLACE (age::VARCHAR AS age) FROM fair_hold", db=db)


def test_nan_and_infinite_inputs_are_refused(models: dict[str, Any]) -> None:
    # the fit's own rules: a NaN predictor or a zero exposure under ln() is an input error
    db = str(models["db"])
    with pytest.raises(SpecError, match=r"offset expression 'ln\(years\)' is NaN or infinite"):
        indb.assess("children", on="SELECT * REPLACE (0.0 AS years) FROM fair_hold", db=db)
    with pytest.raises(SpecError, match="predictor column 'age' is NaN or infinite in 1 of"):
        indb.assess(
            "children",
            on="SELECT * REPLACE (CASE WHEN row_id = 5 THEN 'NaN'::DOUBLE ELSE age END AS age) "
            "FROM fair_hold",
            db=db,
        )


def test_assess_text_has_no_borrowed_layout(models: dict[str, Any]) -> None:
    text = indb.assess("had", on="fair_hold", db=str(models["db"]))
    from indb.assess_report import assess_text

    out = assess_text(text)
    # our own words: no significance stars, no section rules of a statistics package
    assert "***" not in out and "===" not in out and "Results" not in out
    assert math.isfinite(text.gini) and 0 < text.gini_normalized < 1


def test_binomial_with_offset_calibrates_on_the_mean(models: dict[str, Any]) -> None:
    """With an offset the predicted probability and the score differ: the calibration bands
    follow the probability (equal weight), the lift bands the score; the constant-rate model
    (logit, offset) has no closed form and is iterated. Oracles: statsmodels (the fit, its
    predictions, its intercept-only GLM with the offset) and the grouping written out."""
    db = str(models["db"])
    train, hold = models["frames"]["fair"]
    res = indb.fit(
        "SELECT rating, religious, had, years FROM fair_train",
        "had",
        "binomial",
        offset="years / 10",
        db=db,
        name="had_offset",
        tol=1e-14,
    )
    case = Case("had_offset", "fair", {"response": "had"}, sm.families.Binomial())
    fit = sm.GLM(
        train["had"].to_numpy(float),
        design(train, res),
        family=case.family,
        offset=train["years"].to_numpy(float) / 10,
    ).fit(**SM_FIT)
    assert_allclose([fit.params[t] for t in res.terms], estimates(res), rtol=COEF_RTOL)
    eta = np.zeros(len(hold))
    xh = design(hold, res)
    for term in xh.columns:
        eta = eta + xh[term].to_numpy() * fit.params[term]
    off = hold["years"].to_numpy(float) / 10
    mu, score = case.family.link.inverse(eta + off), case.family.link.inverse(eta)
    y = hold["had"].to_numpy(float)
    a = indb.assess("had_offset", on="fair_hold", db=db, bands=6)
    assert a.rows == len(hold) and a.scans > 3
    assert_allclose(a.expected, mu.sum(), rtol=SUM_RTOL)
    assert_allclose(a.deviance, case.family.deviance(y, mu), rtol=SUM_RTOL)
    null = sm.GLM(y, np.ones((len(y), 1)), family=case.family, offset=off).fit(**SM_FIT)
    assert_allclose(a.null_deviance, null.deviance, rtol=SUM_RTOL)
    # the lift bands along the score (exposure = weight: no log link), the calibration
    # bands along the probability
    lift = midpoint_bands(score, np.ones(len(y)), 6)
    assert [b.rows for b in a.bands] == np.bincount(lift)[1:].tolist()
    cal = midpoint_bands(mu, np.ones(len(y)), 6)
    assert [c.rows for c in a.calibration] == np.bincount(cal)[1:].tolist()
    assert_allclose([c.actual for c in a.calibration], np.bincount(cal, y)[1:], rtol=1e-12)
    stat, df = hosmer_lemeshow(mu, y, np.ones(len(y)), n=6)
    assert a.hosmer_lemeshow.df == df == 4
    assert_allclose(a.hosmer_lemeshow.statistic, stat, rtol=1e-6)


def test_quotes_and_unicode_in_names_and_levels(tmp_path: Path) -> None:
    """Column names and levels with quotes, a semicolon and non-ASCII letters reach the SQL
    only as quoted identifiers and literals; zero prior weights count as rows with no
    weight. Oracle: statsmodels' predictions summed with pandas."""
    rng = np.random.default_rng(14)
    n = 600
    region = rng.choice(["it's", 'say "hi"', "Zürich; DROP TABLE t"], n)
    size = rng.uniform(1.0, 3.0, n)
    effect = pd.Series(region).map({"it's": 0.0, 'say "hi"': 0.4, "Zürich; DROP TABLE t": -0.3})
    y = rng.poisson(np.exp(0.2 + 0.3 * size + effect.to_numpy())).astype(float)
    w = np.where(np.arange(n) % 10 == 0, 0.0, 1.0 + (np.arange(n) % 3))
    frame = pd.DataFrame({'ré"gion': region, "größe": size, "y": y, "w w": w, "by'col": region})
    train, hold = frame.iloc[0::2], frame.iloc[1::2].reset_index(drop=True)
    db = tmp_path / "hostile.duckdb"
    with duckdb.connect(str(db)) as con:
        for name, part in (("train", train), ("hold", hold)):
            con.register("frame", part)
            con.execute(f"CREATE TABLE {name} AS SELECT * FROM frame")
            con.unregister("frame")
    res = indb.fit(
        'SELECT "ré""gion", "größe", y, "w w" FROM train',
        "y",
        "poisson",
        weight='"w w"',
        db=str(db),
        name="hostile",
        tol=1e-12,
    )
    a = indb.assess("hostile", on="hold", db=str(db), by=["by'col"])
    fit = sm.GLM(
        train["y"], design(train, res), family=sm.families.Poisson(), var_weights=train["w w"]
    ).fit(**SM_FIT)
    assert_allclose([fit.params[t] for t in res.terms], estimates(res), rtol=COEF_RTOL)
    mu = np.asarray(fit.predict(design(hold, res)))
    hw = hold["w w"].to_numpy()
    assert a.rows == len(hold) and a.rows_excluded == 0
    assert_allclose(a.weight, hw.sum(), rtol=1e-12)
    assert_allclose(a.expected, (hw * mu).sum(), rtol=SUM_RTOL)
    want = pd.DataFrame({"lv": hold["by'col"], "ep": hw * mu, "n": 1}).groupby("lv").sum()
    for column in ('ré"gion', "by'col"):
        got = {lv.level: lv for lv in a.levels[column]}
        assert sorted(got) == sorted(want.index)
        for level, row in want.iterrows():
            assert got[level].rows == row["n"]
            assert_allclose(got[level].expected, row["ep"], rtol=SUM_RTOL)
