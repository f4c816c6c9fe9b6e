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
import pytest
from engine_support import Loader, record_spread
from numpy.testing import assert_allclose

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # tests/: assess_cases

from assess_cases import (  # noqa: E402
    CASES,
    SUM_RTOL,
    fair_frames,
    oracle,
    predictors,
    star_frames,
)
from sklearn.metrics import roc_auc_score  # noqa: E402

import indb  # noqa: E402
from indb.assessment import AssessResult  # noqa: E402
from indb.errors import SpecError  # noqa: E402

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
    """DuckDB's own assessment of the same recorded model (a registry file of its own)."""
    db = tmp_path / f"ref_{name}.duckdb"
    case = CASES[name]
    with duckdb.connect(str(db)) as con:
        con.register("frame", fitted["frames"][case.table][1])
        con.execute("CREATE TABLE hold AS SELECT * FROM frame")
        con.unregister("frame")
    indb.deploy(fitted["results"][name], name, db=str(db), score_source="hold")
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
    assert a.scans == 2


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
