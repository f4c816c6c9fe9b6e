"""k-fold cross-validation of a lambda path (indb.crossval).

Data: scikit-learn's shipped diabetes data (Efron et al. 2004, ``load_diabetes``), with a row
id from -100 up, so that the fold rule meets negative values.

Oracles (test-only, outside the project):
* scikit-learn ``ElasticNet(alpha=lambda, l1_ratio=a)``: indb's objective for unweighted
  gaussian data, (1/(2n)) ||y - Xb||^2 + alpha [a ||b||_1 + (1-a)/2 ||b||^2], each fit on
  the rows outside one fold; each of its answers checked against the KKT conditions of that
  objective (tests/test_penalty.py ``kkt_residual``, numpy from the data), a second route.
* scikit-learn ``PoissonRegressor(alpha=lambda)``: (1/(2n)) sum d + (alpha/2) ||b||^2, the
  intercept unpenalised (indb's Poisson ridge, a = 0), ``newton-cholesky`` at tol 1e-14,
  checked by the KKT conditions too.
* The folds: assigned by the test's own SQL ``((id % 5) + 5) % 5`` run in DuckDB, and by
  Python's ``%`` (non-negative for a positive modulus) as a second route.
* The held-out deviance is computed with numpy from its definition: the unit deviance
  (gaussian (y - mu)^2; Poisson 2 [y ln(y/mu) - (y - mu)]) summed over the fold's rows,
  divided by the fold's row count (unit weights).
* The chosen lambdas are recomputed from the per-fold table: mean, standard error
  sd(ddof=1)/sqrt(K), least mean, largest lambda within one standard error (common practice).
"""

from __future__ import annotations

import json

import duckdb
import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from sklearn.linear_model import ElasticNet, PoissonRegressor
from test_penalty import _claims_frame, _cli, _con, _design, _diabetes, kkt_residual

import indb
from indb.errors import SpecError
from indb.registry_append import open_registry

TIGHT = {"tol": 1e-13, "max_iter": 200}
K = 5


def _frame() -> tuple[np.ndarray, np.ndarray, pd.DataFrame]:
    x, y, frame = _diabetes()
    frame["id"] = np.arange(len(y)) - 100
    return x, y, frame


def _sql_folds(con: duckdb.DuckDBPyConnection) -> np.ndarray:
    """Each row's fold by the test's own SQL (ordered as the frame: by id)."""
    rows = con.execute(f"SELECT (((id % {K}) + {K}) % {K}) AS k FROM d ORDER BY id").fetchall()
    return np.array([r[0] for r in rows])


def _chosen(cv: list[dict]) -> tuple[float, float]:
    """(min rule, one_se rule) recomputed from the per-fold table."""
    per = np.array([r["per_fold"] for r in cv])
    mean = per.mean(axis=1)
    se = per.std(axis=1, ddof=1) / np.sqrt(per.shape[1])
    best = int(np.argmin(mean))
    one_se = int(np.flatnonzero(mean <= mean[best] + se[best])[0])
    lams = [r["penalty"] for r in cv]
    assert_allclose([r["mean_deviance"] for r in cv], mean, rtol=1e-12)
    assert_allclose([r["se"] for r in cv], se, rtol=1e-12)
    return lams[best], lams[one_se]


def test_gaussian_elastic_net_folds_match_scikit_learn_refits() -> None:
    x, y, frame = _frame()
    con = _con(frame)
    folds = _sql_folds(con)
    assert (folds == frame["id"].to_numpy() % K).all()  # Python's % as a second route
    a = 0.5
    got = indb.fit(
        "d", "y", db=con, path=6, path_ratio=0.01, l1_share=a, folds=K, fold_by="id",
        exclude=["id"], cv_rule="min", **TIGHT,
    )  # fmt: skip
    assert got.chosen_rule == "min" and len(got.cv) == 6
    # gaussian identity: one scan of each fold's rows gives every fold model at every
    # lambda exactly (no IRLS scan on the folds' training rows), and the path on all rows
    # needs no scan past the held-at-0 fit's (measured: 4 fit scans with the refit's)
    phases = [r.phase for r in got.iteration_log]
    assert phases.count("cv") == 0 and phases.count("cv_score") == K
    assert phases.count("fit") <= 5
    xd = np.column_stack([np.ones(len(y)), x])
    for j, row in enumerate(got.cv):
        lam = row["penalty"]
        assert lam == got.penalty_path[j]["penalty"]
        for k in range(K):
            train, held = folds != k, folds == k
            ref = ElasticNet(alpha=lam, l1_ratio=a, tol=1e-14, max_iter=100_000)
            ref.fit(x[train], y[train])
            b = np.r_[ref.intercept_, ref.coef_]
            # the oracle checked by the KKT conditions on its own training rows
            f = np.r_[0.0, np.ones(10)]
            assert kkt_residual(xd[train], y[train], b, lam, a, f, family="gaussian") < 1e-7
            want = np.mean((y[held] - xd[held] @ b) ** 2)
            assert_allclose(row["per_fold"][k], want, rtol=1e-6)
    best, one_se = _chosen(got.to_dict()["cv"])
    assert got.chosen_penalty == best
    # the reported model: the fit on all rows at the chosen lambda
    assert_allclose(got.penalty["penalty"], best, rtol=0)
    ref = ElasticNet(alpha=best, l1_ratio=a, tol=1e-14, max_iter=100_000).fit(x, y)
    want = np.r_[ref.intercept_, ref.coef_]
    assert_allclose(got.estimates, want, rtol=0, atol=1e-6 * np.abs(want).max())
    rule = indb.fit(
        "d", "y", db=con, path=6, path_ratio=0.01, l1_share=a, folds=K, fold_by="id",
        exclude=["id"], **TIGHT,
    )  # fmt: skip
    assert rule.chosen_rule == "one_se" and rule.chosen_penalty == one_se
    assert one_se >= best


def test_poisson_ridge_folds_match_scikit_learn_and_indb_refits() -> None:
    x, y, frame = _frame()
    con = _con(frame)
    folds = _sql_folds(con)
    got = indb.fit(
        "d", "y", "poisson", db=con, path=4, path_ratio=0.01, folds=K, fold_by="id",
        exclude=["id"], **TIGHT,
    )  # fmt: skip
    xd = np.column_stack([np.ones(len(y)), x])
    for j, row in enumerate(got.cv):
        lam = row["penalty"]
        for k in range(K):
            train, held = folds != k, folds == k
            ref = PoissonRegressor(alpha=lam, solver="newton-cholesky", tol=1e-14, max_iter=1000)
            ref.fit(x[train], y[train])
            b = np.r_[ref.intercept_, ref.coef_]
            f = np.r_[0.0, np.ones(10)]
            assert kkt_residual(xd[train], y[train], b, lam, 0.0, f, family="poisson") < 1e-7
            mu = np.exp(xd[held] @ b)
            yh = y[held]
            want = np.mean(2 * (yh * np.log(yh / mu) - (yh - mu)))
            assert_allclose(row["per_fold"][k], want, rtol=1e-6)
        if j == 2:  # indb itself on the filtered rows (the same folds by the test's SQL)
            mine = indb.fit(
                "SELECT * FROM d WHERE ((id % 5) + 5) % 5 <> 1", "y", "poisson", db=con,
                penalty=lam, exclude=["id"], **TIGHT,
            )  # fmt: skip
            mu = np.exp(xd[folds == 1] @ mine.estimates)
            yh = y[folds == 1]
            want = np.mean(2 * (yh * np.log(yh / mu) - (yh - mu)))
            assert_allclose(row["per_fold"][1], want, rtol=1e-8)
    best, one_se = _chosen(got.to_dict()["cv"])
    assert got.chosen_penalty == one_se and got.penalty["penalty"] == one_se


def test_poisson_elastic_net_with_offset_weights_levels_matches_indb_refits() -> None:
    # an offset, frequency weights and a categorical column with a quoted level; the oracle
    # is indb's own fit on the fold's training rows (its elastic net is checked against the
    # KKT conditions in tests/test_penalty.py), scored with numpy on the fold's rows
    frame = _claims_frame()
    frame["id"] = np.arange(len(frame)) * 7 - 900
    con = _con(frame)
    kw = {
        "offset": "ln(expo)",
        "frequency_weight": "fw",
        "predictors": ["x0", "x2", "x3", "x8", "region"],
        "l1_share": 0.7,
        **TIGHT,
    }
    got = indb.fit("d", "claims", "poisson", db=con, path=5, folds=4, fold_by="id", **kw)
    folds = np.array(
        [r[0] for r in con.execute("SELECT ((id % 4) + 4) % 4 FROM d ORDER BY id").fetchall()]
    )
    y, fw = frame["claims"].to_numpy(float), frame["fw"].to_numpy()
    off = np.log(frame["expo"].to_numpy())
    for j in (1, 3):
        lam = got.cv[j]["penalty"]
        for k in (0, 2):
            mine = indb.fit(
                f"SELECT * FROM d WHERE ((id % 4) + 4) % 4 <> {k}", "claims", "poisson",
                db=con, penalty=lam, **kw,
            )  # fmt: skip
            held = folds == k
            mu = np.exp(_design(mine, frame)[held] @ mine.estimates + off[held])
            yh = y[held]
            unit = 2 * (np.where(yh > 0, yh * np.log(np.where(yh > 0, yh, 1) / mu), 0) - (yh - mu))
            want = np.sum(fw[held] * unit) / np.sum(fw[held])
            assert_allclose(got.cv[j]["per_fold"][k], want, rtol=1e-7)
    assert got.chosen_penalty == _chosen(got.to_dict()["cv"])[1]


def test_cv_table_reads_back_from_the_registry_and_json(tmp_path) -> None:
    _, _, frame = _frame()
    db = str(tmp_path / "m.duckdb")
    con = duckdb.connect(db)
    con.register("frame", frame)
    con.execute("CREATE TABLE d AS SELECT * FROM frame")
    con.close()
    got = indb.fit(
        "d", "y", db=db, path=4, folds=3, fold_by="id", exclude=["id"], name="cvm",
    )  # fmt: skip
    engine = indb.connect(db)
    try:
        stored = open_registry(engine).load("cvm", 1)
    finally:
        engine.close()
    assert stored.cv == got.cv and stored.chosen_penalty == got.chosen_penalty
    assert stored.chosen_rule == "one_se"
    assert stored.spec["folds"] == 3 and stored.spec["fold_by"] == "id"
    out = json.loads(json.dumps(got.to_dict()))
    assert set(out["cv"][0]) == {"penalty", "mean_deviance", "se", "per_fold"}
    assert len(out["cv"][0]["per_fold"]) == 3


def test_cli_folds_json_and_text(tmp_path) -> None:
    _, _, frame = _frame()
    src = str(tmp_path / "d.parquet")
    frame.to_parquet(src)
    base = ["fit", src, "--response", "y", "--family", "gaussian", "--exclude", "id", "--path", "4"]
    out = _cli(*base, "--folds", "3", "--fold-by", "id", "--cv-rule", "min", "--json")
    assert out.exit_code == 0, out.stderr
    got = json.loads(out.stdout)
    best, _ = _chosen(got["cv"])
    assert got["chosen_rule"] == "min" and got["chosen_penalty"] == best
    text = _cli(*base, "--folds", "3", "--fold-by", "id", "-q")
    assert text.exit_code == 0, text.stderr
    assert "3-fold cross-validation" in text.stdout and "<- chosen" in text.stdout


# -- bad input ---------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kw", "words"),
    [
        ({"path": 4, "folds": 1, "fold_by": "id"}, "folds must be a whole number >= 2"),
        ({"folds": 3, "fold_by": "id"}, "cross-validates the lambdas of a path"),
        ({"penalty": 0.1, "folds": 3, "fold_by": "id"}, "instead of penalty=0.1"),
        ({"path": 4, "folds": 3}, "folds=3 needs fold_by"),
        ({"path": 4, "fold_by": "id"}, "fold_by='id' is read only with folds=K"),
        ({"path": 4, "folds": 3, "fold_by": "nosuch"}, "nosuch"),
        ({"path": 4, "folds": 3, "fold_by": "x0"}, "has type DOUBLE"),
        ({"path": 4, "folds": 3, "fold_by": "CASE WHEN id < 0 THEN NULL ELSE id END"},
         "is NULL on 100 kept rows"),
        ({"path": 4, "folds": 3, "fold_by": "id * 3"}, "fold 1 of 3 is empty"),
        ({"path": 4, "folds": 3, "fold_by": "id", "compress": "always"}, "loses each row's fold"),
        ({"path": 4, "penalty_for": {"nosuch": 0.0}}, "penalty_for names 'nosuch'"),
    ],
)  # fmt: skip
def test_bad_cv_input_is_refused(kw, words) -> None:
    _, _, frame = _frame()
    con = _con(frame)
    with pytest.raises(SpecError) as err:
        indb.fit("d", "y", db=con, exclude=["id"], **kw)
    assert words in str(err.value) and "\n" not in str(err.value)


@pytest.mark.parametrize(
    ("args", "words"),
    [
        (["--path", "4", "--folds", "1", "--fold-by", "id"], "folds must be a whole number"),
        (["--folds", "3", "--fold-by", "id"], "cross-validates the lambdas of a path"),
        (["--path", "4", "--folds", "3", "--fold-by", "id * 3"], "fold 1 of 3 is empty"),
        (["--path", "4", "--folds", "3", "--fold-by", "nullif(id, 5)"], "is NULL on 1 kept"),
        (["--path", "4", "--folds", "3", "--fold-by", "zz"], "zz"),
    ],
)
def test_cli_bad_cv_input_is_one_line_exit_2_and_writes_nothing(tmp_path, args, words) -> None:
    _, _, frame = _frame()
    db = tmp_path / "m.duckdb"
    con = duckdb.connect(str(db))
    con.register("frame", frame)
    con.execute("CREATE TABLE d AS SELECT * FROM frame")
    con.close()
    base = ["fit", "d", "--db", str(db), "--response", "y", "--family", "gaussian"]
    out = _cli(*base, "--exclude", "id", "--name", "cvm", *args)
    assert out.exit_code == 2, (out.stdout, out.stderr)
    lines = [ln for ln in out.stderr.splitlines() if ln.startswith("indb: error:")]
    assert len(lines) == 1 and words in lines[0] and "Traceback" not in out.stderr
    con = duckdb.connect(str(db), read_only=True)
    try:
        rows = con.execute("SELECT table_name FROM information_schema.tables").fetchall()
        tables = {r[0] for r in rows}
    finally:
        con.close()
    assert tables == {"d"}  # no registry, no view
