"""``indb.assess`` on DuckDB, PostgreSQL and Spark: the same figures on every engine.

The models of ``tests/assess_cases.py`` are fitted once on DuckDB and recorded in each
engine's registry (``indb.deploy``: the stored offset is read in the dialect it was written
in, as for scoring); each engine then judges them on its own copy of the holdout rows. The
figures must agree with DuckDB's to rounding (sums in another order), and with the outside
oracle of ``tests/test_assess.py`` (statsmodels' predictions summed with pandas; scikit-learn's
AUC for the Gini of a 0/1 response).
"""

from __future__ import annotations

import sys
import uuid
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pytest
from engine_support import Loader, record_spread
from numpy.testing import assert_allclose

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # tests/: assess_cases

from assess_cases import (  # noqa: E402
    CASES,
    CHALLENGERS,
    PREDICTORS_B,
    SUM_RTOL,
    drifted,
    fair_frames,
    midpoint_bands,
    oracle,
    predictors,
    randhie_frames,
    star_frames,
    visits_oracle,
)
from sklearn.metrics import roc_auc_score  # noqa: E402

import indb  # noqa: E402
from indb.assessment import AssessResult  # noqa: E402
from indb.errors import SpecError  # noqa: E402
from indb.registry_append import open_registry  # noqa: E402
from indb.retrain import EXIT_HELD, RetrainOutcome, retrain  # noqa: E402
from indb.specfile import Gates, SpecFile  # noqa: E402

#: sums over thousands of rows in another order (and PostgreSQL's exact numeric sums) agree
#: to a few ulps per row; the band a tie group falls in is decided on exact cumulative sums
SAME_RTOL = 1e-11
TOTALS = ("weight", "exposure", "actual", "expected", "deviance", "null_deviance", "gini")


@pytest.fixture(scope="module")
def fitted() -> dict[str, Any]:
    """The models fitted on an in-memory DuckDB, and the training and holdout frames."""
    frames = {"fair": fair_frames(), "star": star_frames()}
    con = duckdb.connect()
    for table, (train, _) in frames.items():
        con.register("frame", train)
        con.execute(f'CREATE TABLE "{table}_train" AS SELECT * FROM frame')
        con.unregister("frame")
    results = {}
    for name in ("children", "had", "above"):
        case = CASES[name]
        extra = [case.fit["response"], *(c for c in (case.offset, case.trials) if c)]
        results[name] = indb.fit(
            f"SELECT {', '.join([*predictors(case), *extra])} FROM {case.table}_train",
            db=con,
            tol=1e-12,
            **case.fit,
        )
    # the second model of a comparison: other predictors, the same family and offset
    results["children_b"] = indb.fit(
        f"SELECT {', '.join(PREDICTORS_B)}, children, years FROM fair_train",
        db=con,
        tol=1e-12,
        **CHALLENGERS["children_b"].fit,
    )
    con.close()
    return {"frames": frames, "results": results}


def _assess_on(loader: Loader, fitted: dict[str, Any], name: str, **kw: Any) -> AssessResult:
    """Record the DuckDB fit in the engine's registry and judge it on the engine's holdout."""
    case = CASES[name]
    tag = uuid.uuid4().hex[:8]
    table = loader.load(f"{case.table}_hold_{tag}", fitted["frames"][case.table][1])
    schema, model = f"reg_{tag}", f"{name}_{tag}"
    indb.deploy(
        fitted["results"][name],
        model,
        db=loader.engine,
        registry_schema=schema,
        score_source=table,
    )
    return indb.assess(model, on=table, db=loader.engine, registry_schema=schema, **kw)


def _same(loader: Loader, a: AssessResult, ref: AssessResult, case: str) -> None:
    assert (a.rows, a.rows_read, a.excluded, a.rows_unseen) == (
        ref.rows,
        ref.rows_read,
        ref.excluded,
        ref.rows_unseen,
    )
    for key in (*TOTALS, "gini_normalized"):
        got, want = getattr(a, key), getattr(ref, key)
        assert_allclose(got, want, rtol=SAME_RTOL, err_msg=key)
        record_spread(loader.name, f"assess {key}", abs(got - want) / abs(want), case)
    assert [(b.band, b.rows) for b in a.bands] == [(b.band, b.rows) for b in ref.bands]
    assert_allclose([b.expected for b in a.bands], [b.expected for b in ref.bands], rtol=1e-11)
    assert_allclose([b.score_low for b in a.bands], [b.score_low for b in ref.bands], rtol=1e-13)
    assert list(a.levels) == list(ref.levels)
    for column, levels in ref.levels.items():
        got = a.levels[column]
        assert [(lv.level, lv.rows, lv.unseen, lv.band) for lv in got] == [
            (lv.level, lv.rows, lv.unseen, lv.band) for lv in levels
        ], column
        assert_allclose([lv.expected for lv in got], [lv.expected for lv in levels], rtol=1e-11)


def _reference(fitted: dict[str, Any], name: str, tmp_path: Path, **kw: Any) -> AssessResult:
    """DuckDB's own assessment of the same recorded model (a registry file of its own; with
    ``against``, that model recorded too)."""
    db = tmp_path / f"ref_{name}.duckdb"
    case = CASES[name]
    with duckdb.connect(str(db)) as con:
        con.register("frame", fitted["frames"][case.table][1])
        con.execute("CREATE TABLE hold AS SELECT * FROM frame")
        con.unregister("frame")
    for model in (name, *([kw["against"]] if "against" in kw else [])):
        indb.deploy(fitted["results"][model], model, db=str(db), score_source="hold")
    return indb.assess(name, on="hold", db=str(db), **kw)


def test_poisson_with_offset_levels_and_bands(
    loader: Loader, fitted: dict[str, Any], tmp_path: Path
) -> None:
    kw = {"by": ["religious", "educ"], "bands": 8}
    a = _assess_on(loader, fitted, "children", **kw)
    ref = _reference(fitted, "children", tmp_path, **kw)
    _same(loader, a, ref, "children")
    assert a.excluded == {"NULL in age": 3} and a.rows_unseen == 2
    assert [lv.level for lv in a.levels["rating"] if lv.unseen] == ["9"]
    # the outside oracle: statsmodels' predictions summed with pandas
    train, hold = fitted["frames"]["fair"]
    orc = oracle(CASES["children"], fitted["results"]["children"], train, hold)
    assert_allclose(a.expected, orc.mu.sum(), rtol=SUM_RTOL)
    dev = CASES["children"].family.deviance(orc.y, orc.mu)
    assert_allclose(a.deviance, dev, rtol=SUM_RTOL)
    assert a.scans == 3


def test_binomial_auc_and_calibration(
    loader: Loader, fitted: dict[str, Any], tmp_path: Path
) -> None:
    a = _assess_on(loader, fitted, "had")
    ref = _reference(fitted, "had", tmp_path)
    _same(loader, a, ref, "had")
    train, hold = fitted["frames"]["fair"]
    orc = oracle(CASES["had"], fitted["results"]["had"], train, hold)
    # scikit-learn: gini_normalized = 2 AUC - 1 (ties counted half)
    assert_allclose(a.gini_normalized, 2 * roc_auc_score(orc.y, orc.mu) - 1, rtol=1e-9)
    hl, hl_ref = a.hosmer_lemeshow, ref.hosmer_lemeshow
    assert hl.df == hl_ref.df == 8
    assert_allclose(hl.statistic, hl_ref.statistic, rtol=1e-9)
    assert_allclose(
        [c.observed for c in a.calibration], [c.observed for c in ref.calibration], rtol=1e-12
    )


def test_binomial_with_trials(loader: Loader, fitted: dict[str, Any], tmp_path: Path) -> None:
    a = _assess_on(loader, fitted, "above", bands=5)
    ref = _reference(fitted, "above", tmp_path, bands=5)
    _same(loader, a, ref, "above")
    assert_allclose(a.actual, fitted["frames"]["star"][1]["above"].sum(), rtol=1e-12)
    assert a.hosmer_lemeshow.df == 3


def test_bad_input_is_refused_before_any_deviance(loader: Loader, fitted: dict[str, Any]) -> None:
    """A negative count would make PostgreSQL's ln() raise inside the deviance: the check
    scan refuses it first, with the fit's own message; a missing response, all rows NULL
    and no exposure too."""
    tag = uuid.uuid4().hex[:8]
    table = loader.load(f"fair_bad_{tag}", fitted["frames"]["fair"][1])
    schema, model = f"reg_{tag}", f"children_{tag}"
    engine = loader.engine
    indb.deploy(
        fitted["results"]["children"], model, db=engine, registry_schema=schema, score_source=table
    )

    def run(query: str) -> None:
        indb.assess(model, on=query, db=engine, registry_schema=schema)

    cols = "rating, religious, age, years"
    with pytest.raises(SpecError, match="family 'poisson' needs a response >= 0"):
        run(f"SELECT {cols}, children - 6 AS children FROM {table}")
    with pytest.raises(SpecError, match="has no column 'children' \\(the response of model"):
        run(f"SELECT {cols} FROM {table}")
    with pytest.raises(SpecError, match="rows of the source .* has a NULL in a column"):
        run(f"SELECT rating, religious, CAST(NULL AS DOUBLE) AS age, years, children FROM {table}")
    # no exposure: ln(0) is -inf on every engine (the stored offset's IEEE-754 reading),
    # refused as the fit refuses it, where PostgreSQL's own ln would raise
    with pytest.raises(SpecError, match=r"offset expression 'ln\(years\)' is NaN or infinite"):
        run(f"SELECT rating, religious, age, 0.0 * years AS years, children FROM {table}")


# -- a second model in the same scans (--against) -----------------------------------------------


def test_against_and_double_lift(loader: Loader, fitted: dict[str, Any], tmp_path: Path) -> None:
    """Both models recorded in the engine's registry and judged in the same scans: the same
    figures and double-lift table as on DuckDB, and the double-lift sums of statsmodels'
    predictions of both models (pandas, the grouping of ``assess_cases.midpoint_bands``)."""
    tag = uuid.uuid4().hex[:8]
    hold = fitted["frames"]["fair"][1]
    table = loader.load(f"fair_hold_{tag}", hold)
    schema = f"reg_{tag}"
    for name in ("children", "children_b"):
        indb.deploy(
            fitted["results"][name],
            f"{name}_{tag}",
            db=loader.engine,
            registry_schema=schema,
            score_source=table,
        )
    kw = {"by": ["religious"], "bands": 8}
    a = indb.assess(
        f"children_{tag}",
        on=table,
        db=loader.engine,
        registry_schema=schema,
        against=f"children_b_{tag}",
        record=True,
        **kw,
    )
    ref = _reference(fitted, "children", tmp_path, against="children_b", **kw)
    # --record: a row per version judged, appended on Spark, each naming the other
    reg = open_registry(loader.engine, schema)
    kept = reg.assessments(f"children_{tag}") + reg.assessments(f"children_b_{tag}")
    assert [(r["compared_model"], r["purpose"], r["n_used"]) for r in kept] == [
        (f"children_b_{tag}", "assess", a.rows),
        (f"children_{tag}", "assess", a.rows),
    ]
    assert_allclose([r["deviance"] for r in kept], [a.deviance, a.against.deviance], rtol=1e-15)
    _same(loader, a, ref, "children against")
    assert a.scans == 5
    for key in ("expected", "deviance", "gini", "gini_normalized", "deviance_explained"):
        got, want = getattr(a.against, key), getattr(ref.against, key)
        assert_allclose(got, want, rtol=SAME_RTOL, err_msg=key)
        record_spread(loader.name, f"against {key}", abs(got - want) / abs(want), "children")
    rows = [(r.band, r.rows) for r in a.ratio_bands]
    assert rows == [(r.band, r.rows) for r in ref.ratio_bands]
    for key in ("expected", "expected_against", "actual", "ratio_low", "ratio_high"):
        assert_allclose(
            [getattr(r, key) for r in a.ratio_bands],
            [getattr(r, key) for r in ref.ratio_bands],
            rtol=1e-11,
            err_msg=key,
        )
    # the outside oracle: statsmodels' predictions of both models, summed with pandas
    train = fitted["frames"]["fair"][0]
    one = oracle(CASES["children"], fitted["results"]["children"], train, hold)
    two = oracle(CHALLENGERS["children_b"], fitted["results"]["children_b"], train, hold)
    band = midpoint_bands(np.log(two.score) - np.log(one.score), one.exposure, 8)
    assert [r.rows for r in a.ratio_bands] == np.bincount(band)[1:].tolist()
    assert_allclose(
        [r.expected_against for r in a.ratio_bands], np.bincount(band, two.mu)[1:], rtol=SUM_RTOL
    )
    assert_allclose(
        a.against.deviance, CASES["children"].family.deviance(one.y, two.mu), rtol=SUM_RTOL
    )


# -- holdout gates of a scheduled refit -----------------------------------------------------------

HOLDOUT_GATES = {
    "max_deviance_per_row_increase": 0.0,
    "max_holdout_deviance_increase": 0.01,
    "max_gini_drop": 0.01,
    "max_level_ae_deviation": 0.10,
    "min_level_exposure": 500.0,
}


def _visits_spec(source: str, holdout: str, name: str, schema: str, db: Any) -> SpecFile:
    model = {
        "source": source,
        "response": "mdvis",
        "family": "poisson",
        "exclude": ["row_id", "fmde", "hlthf", "hlthp"],
        "categorical": ["idp", "hlthg"],
        "tol": 1e-12,
    }
    return SpecFile(
        path="visits.toml",
        model=model,
        deploy={"name": name, "registry_schema": schema},
        engine={"db": db},
        gates=Gates(holdout=holdout, holdout_by=["hlthp"], **HOLDOUT_GATES),
    )


def _two_retrains(load: Any, db: Any, tag: str) -> tuple[RetrainOutcome, RetrainOutcome]:
    """A first version on the clean training rows, then a refit on the drifted ones."""
    train, hold = randhie_frames()
    clean, bad, holdout = (
        load(f"visits_{tag}", train),
        load(f"visits_drift_{tag}", drifted(train)),
        load(f"visits_hold_{tag}", hold),
    )
    name, schema = f"doctor_visits_{tag}", f"reg_{tag}"
    first = retrain(_visits_spec(clean, holdout, name, schema, db))
    second = retrain(_visits_spec(bad, holdout, name, schema, db))
    return first, second


def test_holdout_gates_hold_a_drifted_refit(loader: Loader, tmp_path: Path) -> None:
    """The refit on drifted rows improves its in-sample deviance per row and is held by
    the holdout gates (exit 6) on every engine, with DuckDB's figures and statsmodels'."""
    tag = uuid.uuid4().hex[:8]
    first, second = _two_retrains(loader.load, loader.engine, tag)
    ref_db = duckdb.connect(str(tmp_path / "ref.duckdb"))

    def load_ref(table: str, frame: Any) -> str:
        ref_db.register("frame", frame)
        ref_db.execute(f'CREATE TABLE "{table}" AS SELECT * FROM frame')
        ref_db.unregister("frame")
        return table

    ref_first, ref_second = _two_retrains(load_ref, ref_db, tag)
    assert (first.status, second.status, second.exit_code) == ("first", "held", EXIT_HELD)
    assert [(c.gate, c.passed, c.detail) for c in second.checks] == [
        (c.gate, c.passed, c.detail) for c in ref_second.checks
    ]
    failed = {c.gate for c in second.checks if not c.passed}
    assert {"max_holdout_deviance_increase", "max_level_ae_deviation"} <= failed
    assert "max_deviance_per_row_increase" not in failed
    for got, want in zip(second.checks, ref_second.checks, strict=True):
        assert_allclose(got.value, want.value, rtol=1e-9, err_msg=got.gate)
    a, ref = second.holdout, ref_second.holdout
    assert a.scans == 5 and (a.version, a.against.version) == (2, 1)
    for key in ("deviance", "gini", "expected"):
        assert_allclose(getattr(a, key), getattr(ref, key), rtol=SAME_RTOL, err_msg=key)
        assert_allclose(
            getattr(a.against, key), getattr(ref.against, key), rtol=SAME_RTOL, err_msg=key
        )
    # statsmodels on the same training rows: the holdout deviance of both versions
    train, hold = randhie_frames()
    assert_allclose(
        a.against.deviance, visits_oracle(train, hold, first.result)["deviance"], rtol=1e-7
    )
    assert_allclose(
        a.deviance, visits_oracle(drifted(train), hold, second.result)["deviance"], rtol=1e-7
    )
    # the registry keeps each assessment, on every engine (Spark: appended rows)
    reg = open_registry(loader.engine, f"reg_{tag}")
    rows = reg.assessments(f"doctor_visits_{tag}")
    got = {(r["version"], r["compared_version"]) for r in rows}
    assert len(rows) == 3 and got == {(1, None), (1, 2), (2, 1)}
    assert reg.model(f"doctor_visits_{tag}")["live_version"] == 1
