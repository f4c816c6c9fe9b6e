"""The diagnostics view NAME_diagnostics (issue 15, item 4) on DuckDB.

Oracle: statsmodels (test-only) GLM results and its influence object on datasets shipped in
statsmodels and scikit-learn (``tests/diagnostics_cases.py``, which also says where the view's
conventions differ from statsmodels' and how the oracle converts). Every case is checked twice:

* against statsmodels' own fit (both converged far below ``FULL_RTOL``);
* against statsmodels at indb's coefficients and dispersion (``SAME_BETA_RTOL``: the
  formulas themselves; indb's dispersion is Pearson's at the coefficients its last scan
  read, one solved step, taken with no scan, before the reported ones, so it is given to
  the oracle rather than recomputed at the reported coefficients);

and the oracle is checked in turn: its hat-matrix diagonal against the squared row norms of Q
in a QR decomposition of W^(1/2) X written out with numpy, its Cook's distance against the
formula from its own residuals, dispersion and leverage.
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
from click.testing import CliRunner
from diagnostics_cases import (
    CASE,
    CASES,
    COLUMNS,
    FULL_RTOL,
    SAME_BETA_RTOL,
    DiagCase,
    first_copies,
    leverage_by_qr,
    oracle,
    sm_model,
)
from numpy.testing import assert_allclose

import indb
from indb import colpairs
from indb.cli import main
from indb.errors import DeploymentWarning, RegistryError, SpecError
from indb.results import STORED_COVARIANCE_MAX_TERMS


def database(tmp_path: Path, frame: pd.DataFrame, table: str = "data") -> str:
    path = str(tmp_path / "diag.duckdb")
    con = duckdb.connect(path)
    con.register("frame", frame)
    con.execute(f'CREATE OR REPLACE TABLE "{table}" AS SELECT * FROM frame')
    con.close()
    return path


def read(path: str, sql: str) -> pd.DataFrame:
    con = duckdb.connect(path, read_only=True)
    try:
        return con.execute(sql).df()
    finally:
        con.close()


def fit_case(case: DiagCase, path: str, **kw: Any) -> indb.FitResult:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeploymentWarning)
        return indb.fit("data", db=path, tol=1e-13, **case.fit_kwargs, **kw)


def view_rows(path: str, view: str = "m_diagnostics") -> pd.DataFrame:
    return read(path, f'SELECT * FROM "{view}" ORDER BY row_id')


def compare(got: pd.DataFrame, want: dict[str, np.ndarray], rtol: float) -> None:
    for column in COLUMNS:
        ref = want[column]
        # relative to the column's size: a residual of 1e-9 next to ones of 1 is 0 to 1e-9
        assert_allclose(
            got[column].to_numpy(float),
            ref,
            rtol=rtol,
            atol=rtol * float(np.max(np.abs(ref))),
            err_msg=column,
        )


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_view_matches_statsmodels_row_by_row(case: DiagCase, tmp_path: Path) -> None:
    frame = case.frame()
    path = database(tmp_path, frame)
    res = fit_case(case, path, name="m", diagnostics=True)
    assert res.deployment["diagnostics_view"] == "m_diagnostics"
    got = view_rows(path)
    assert list(got.columns) == [*frame.columns, *COLUMNS]
    pd.testing.assert_frame_equal(
        got[list(frame.columns)], frame, check_dtype=False, check_exact=True
    )
    model = sm_model(case, frame, res)
    rows = first_copies(case, frame)
    full = oracle(case, model)
    compare(got, {k: v[rows] for k, v in full.items() if k in COLUMNS}, FULL_RTOL)
    at_ours = oracle(case, model, res.estimates, res.dispersion)
    compare(got, {k: v[rows] for k, v in at_ours.items() if k in COLUMNS}, SAME_BETA_RTOL)
    # the oracle checked: its leverage is the hat matrix's diagonal written out with numpy
    # (QR), its Cook's distance the studentized Pearson residual's formula, k = columns
    qr = leverage_by_qr(model, res.estimates, case.observed)
    assert_allclose(at_ours["leverage"], qr, rtol=1e-10, atol=1e-14)
    h, k = at_ours["leverage"], model.exog.shape[1]
    cooks = at_ours["resid_pearson"] ** 2 / at_ours["scale"] / (1 - h) ** 2 * h / k
    assert_allclose(at_ours["cooks_distance"], cooks, rtol=1e-12)
    # the leverages sum to the number of estimated coefficients (trace of the hat matrix)
    copies = case.repeat(frame) if case.repeat is not None else 1
    assert float(np.sum(got["leverage"] * copies)) == pytest.approx(len(res.terms), rel=1e-9)


def test_more_than_150_coefficients_from_the_registry(tmp_path: Path) -> None:
    # statsmodels.datasets.modechoice: 210 travellers as a factor, 214 coefficients. The
    # registry keeps no covariance past 150 (intervals are refused there), but keeps (X'WX)^-1
    # where a row's leverage reads it, so a promotion rebuilds the view from storage alone.
    case = CASE["gamma-log-214-coefficients-modechoice"]
    frame = case.frame()
    path = database(tmp_path, frame)
    res = fit_case(case, path, name="m", diagnostics=True)
    assert len(res.terms) == 214 > STORED_COVARIANCE_MAX_TERMS
    with pytest.raises(SpecError, match="at most 150 coefficients"):
        fit_case(case, path, name="m", intervals=True)
    reg = indb.api.registry(path, read_only=True)
    try:
        stored = reg.load("m", 1)
        assert stored.covariance is None and stored.inverse_entries is not None
        # the pairs a row can use: the 209 traveller levels each with itself and with the
        # intercept, invt and the 3 mode levels; those 5 among themselves, less the 3 pairs
        # of two mode levels (no row has two modes): 209 + 209 * 5 + (15 - 3), where the
        # whole matrix has 214 * 215 / 2 = 23,005
        assert len(stored.inverse_entries.values) == 209 + 209 * 5 + 12
    finally:
        reg.engine.close()
    first = view_rows(path)
    indb.fit("data", db=path, family="gamma", link="log", response="gc", name="m",
             predictors=["invt", "mode"], promote=True, tol=1e-13)  # fmt: skip
    assert not np.allclose(view_rows(path)["leverage"], first["leverage"])  # version 2's
    promote(path, "m", 1)  # from storage: the same view as the fit wrote
    again = view_rows(path)
    assert_allclose(again[COLUMNS].to_numpy(float), first[COLUMNS].to_numpy(float), rtol=1e-12)
    model = sm_model(case, frame, res)
    compare(again, oracle(case, model, res.estimates, res.dispersion), SAME_BETA_RTOL)


def promote(path: str, name: str, version: int, **kw: Any) -> None:
    reg = indb.api.registry(path)
    try:
        reg.promote(name, version, **kw)
    finally:
        reg.engine.close()


def model_row(path: str, name: str) -> dict[str, Any]:
    reg = indb.api.registry(path, read_only=True)
    try:
        return reg.model(name)
    finally:
        reg.engine.close()


def test_the_sql_grows_with_the_levels_not_their_square(tmp_path: Path) -> None:
    # One lookup table per set of factors a pair of columns meets on: here {mode} and {person}
    # and {mode, person}; the rendered view is far smaller than p^2 = 45,796 products.
    case = CASE["gamma-log-214-coefficients-modechoice"]
    path = database(tmp_path, case.frame())
    fit_case(case, path, name="m", diagnostics=True)
    sql = read(path, "SELECT sql FROM duckdb_views() WHERE view_name = 'm_diagnostics'")["sql"][0]
    assert sql.count("VALUES") == 3
    assert len(sql) < 45_796 * 20


def test_rows_the_fit_did_not_use_get_null(tmp_path: Path) -> None:
    case = CASE["gamma-log-firm-grunfeld"]
    frame = case.frame()
    extra = pd.DataFrame(
        {
            "row_id": [1000, 1001, 1002],
            "invest": [100.0, None, 100.0],
            "value": [None, 1000.0, 1000.0],
            "capital": [50.0, 50.0, 50.0],
            "firm": ["IBM", "IBM", None],
        }
    )
    path = database(tmp_path, pd.concat([frame, extra], ignore_index=True))
    res = fit_case(case, path, name="m", diagnostics=True)
    assert res.n_excluded == 3
    got = view_rows(path)
    assert got.loc[got["row_id"] >= 1000, COLUMNS].isna().all().all()
    used = got[got["row_id"] < 1000].reset_index(drop=True)
    compare(
        used,
        oracle(case, sm_model(case, frame, res), res.estimates, res.dispersion),
        SAME_BETA_RTOL,
    )


def test_levels_with_quotes_backslashes_and_unicode(tmp_path: Path) -> None:
    # statsmodels.datasets.grunfeld with two firm names rewritten: the lookup tables' level
    # literals must match the rows' levels on the text the fit saw
    base = CASE["gamma-log-firm-grunfeld"]
    names = {"General Electric": "Gen. 'Electric' \\ Co.", "US Steel": 'U.S. "Steel" Über'}
    frame = base.frame().assign(firm=lambda f: f["firm"].replace(names))
    case = DiagCase("quoted", lambda: frame, base.fit_kwargs, base.family, observed=False)
    path = database(tmp_path, frame)
    res = fit_case(case, path, name="m", diagnostics=True)
    assert {"firm=Gen. 'Electric' \\ Co.", 'firm=U.S. "Steel" Über'} <= set(res.terms)
    compare(
        view_rows(path),
        oracle(case, sm_model(case, frame, res), res.estimates, res.dispersion),
        SAME_BETA_RTOL,
    )


def test_weights_and_response_far_from_one(tmp_path: Path) -> None:
    # The fit divides prior weights near 1e6 and a response near 1e9 by powers of two
    # internally (design.Scaling); the stored (X'WX)^-1 is mapped back to the source's scale
    frame = CASE["gamma-log-firm-grunfeld"].frame()
    frame = frame.assign(invest=frame["invest"] * 1e9, w=1e6 * (1 + frame["row_id"] % 3))
    case = DiagCase(
        "gamma-log-scaled",
        lambda: frame,
        {**CASE["gamma-log-firm-grunfeld"].fit_kwargs, "weight": "w"},
        CASE["gamma-log-firm-grunfeld"].family,
        observed=False,
        var_weights=lambda f: f["w"].to_numpy(float),
    )
    path = database(tmp_path, frame)
    res = fit_case(case, path, name="m", diagnostics=True)
    compare(
        view_rows(path),
        oracle(case, sm_model(case, frame, res), res.estimates, res.dispersion),
        1e-8,
    )


def test_gaussian_response_rescaled_and_shifted(tmp_path: Path) -> None:
    # A Gaussian identity response near 1e13 with a spread near 1e12 is centred and divided by
    # a power of two inside the fit (the coefficients scale with it, coef_factor); the stored
    # (X'WX)^-1 is the source's all the same
    base = CASE["gaussian-sex-by-bmi-diabetes"]
    frame = base.frame().assign(target=lambda f: 1e13 + 1e10 * f["target"])
    case = DiagCase("gaussian-big", lambda: frame, base.fit_kwargs, base.family)
    path = database(tmp_path, frame)
    res = fit_case(case, path, name="m", diagnostics=True)
    compare(
        view_rows(path),
        oracle(case, sm_model(case, frame, res), res.estimates, res.dispersion),
        1e-8,
    )


# -- deployment ---------------------------------------------------------------------------------


def objects(path: str) -> list[str]:
    return sorted(read(path, "SELECT table_name FROM information_schema.tables")["table_name"])


def test_created_moved_and_dropped_with_the_scoring_view(tmp_path: Path) -> None:
    case = CASE["gamma-log-firm-grunfeld"]
    frame = case.frame()
    path = database(tmp_path, frame)
    r1 = fit_case(case, path, name="m", diagnostics=True)
    assert {"m", "m_diagnostics"} <= set(objects(path))
    # a refit keeps the model's setting (None): the view follows the live version
    kw = {**case.fit_kwargs, "predictors": ["value", "firm"]}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeploymentWarning)
        r2 = indb.fit("data", db=path, tol=1e-13, name="m", promote=True, **kw)
    assert r2.deployment["diagnostics_view"] == "m_diagnostics"
    v2 = view_rows(path)
    assert "capital" in v2.columns  # the source's columns, whatever the model reads
    promote(path, "m", 1)  # roll-back: the view serves version 1's residuals again
    back = view_rows(path)
    compare(
        back, oracle(case, sm_model(case, frame, r1), r1.estimates, r1.dispersion), SAME_BETA_RTOL
    )
    assert model_row(path, "m")["diagnostics"] is True
    # moved to another schema: the old objects go in the same transaction
    promote(path, "m", 2, view_schema="elsewhere")
    where = read(
        path,
        "SELECT table_schema FROM information_schema.tables "
        "WHERE table_name IN ('m', 'm_diagnostics') ORDER BY table_name",
    )
    assert where["table_schema"].tolist() == ["elsewhere", "elsewhere"]
    moved = read(path, 'SELECT * FROM elsewhere."m_diagnostics" ORDER BY row_id')
    assert_allclose(moved["leverage"], v2["leverage"], rtol=0)
    # switched off: dropped, and the registry says so
    with pytest.warns(DeploymentWarning, match="diagnostics=False was not applied"):
        held = indb.fit("data", db=path, tol=1e-13, name="m", diagnostics=False, **case.fit_kwargs)
    assert not held.deployment["promoted"] and "m_diagnostics" in objects(path)
    r3 = fit_case(case, path, name="m", diagnostics=False, promote=True)
    assert "diagnostics_view" not in r3.deployment
    tables = read(path, "SELECT table_schema, table_name FROM information_schema.tables")
    assert "m_diagnostics" not in tables["table_name"].tolist()
    assert read(path, "SELECT diagnostics FROM indb_registry.model")["diagnostics"].tolist() == [
        False
    ]


def test_without_name_is_an_input_error(tmp_path: Path) -> None:
    path = database(tmp_path, CASE["gamma-inverse-scotland"].frame())
    out = CliRunner().invoke(
        main,
        [
            "fit",
            "data",
            "--db",
            path,
            "--response",
            "YES",
            "--family",
            "gamma",
            "--diagnostics",
        ],  # fmt: skip
    )
    assert out.exit_code == 2
    assert out.output.strip().splitlines() == [
        "indb: error: --diagnostics applies only when the model is written back; add --name "
        "NAME (and --db PATH)"
    ]
    with pytest.raises(SpecError, match="diagnostics=True .* needs the model written back"):
        indb.fit("data", "YES", "gamma", db=path, diagnostics=True)


def test_cli_json_and_spec_file(tmp_path: Path) -> None:
    frame = CASE["gamma-inverse-scotland"].frame()
    path = database(tmp_path, frame)
    out = CliRunner().invoke(
        main,
        [
            "fit",
            "data",
            "--db",
            path,
            "--response",
            "YES",
            "--family",
            "gamma",
            "--exclude",
            "row_id",
            "--name",
            "yes",
            "--diagnostics",
            "--json",
        ],  # fmt: skip
    )
    assert out.exit_code == 0, out.output
    assert json.loads(out.output)["deployment"]["diagnostics_view"] == "yes_diagnostics"
    text = CliRunner().invoke(
        main,
        [
            "fit",
            "data",
            "--db",
            path,
            "--response",
            "YES",
            "--family",
            "gamma",
            "--exclude",
            "row_id",
            "--name",
            "yes",
            "--new-version",
        ],  # fmt: skip
    )
    assert "residuals and influence in view yes_diagnostics" in text.output
    spec = tmp_path / "yes.toml"
    spec.write_text(
        f'[model]\nsource = "data"\nresponse = "YES"\nfamily = "gamma"\nexclude = ["row_id"]\n'
        f'[deploy]\nname = "spec_m"\ndiagnostics = true\n[engine]\ndb = "{path}"\n'
    )
    run = CliRunner().invoke(main, ["run", str(spec)])
    assert run.exit_code == 0, run.output
    assert len(read(path, "SELECT * FROM spec_m_diagnostics")) == len(frame)


def registry_rows(path: str) -> int:
    con = duckdb.connect(path, read_only=True)
    try:
        tables = con.execute(
            "SELECT count(*) FROM information_schema.tables WHERE table_schema = 'indb_registry'"
        ).fetchone()[0]
        if not tables:
            return 0
        return con.execute("SELECT count(*) FROM indb_registry.model_version").fetchone()[0]
    finally:
        con.close()


def test_a_foreign_view_of_that_name_is_never_replaced(tmp_path: Path) -> None:
    case = CASE["gamma-inverse-scotland"]
    path = database(tmp_path, case.frame())
    con = duckdb.connect(path)
    con.execute("CREATE VIEW m_diagnostics AS SELECT 42 AS answer")
    con.close()
    with pytest.raises(RegistryError, match="view 'm_diagnostics'.*nothing was written"):
        fit_case(case, path, name="m", diagnostics=True)
    assert registry_rows(path) == 0
    assert read(path, "SELECT * FROM m_diagnostics")["answer"].tolist() == [42]
    fit_case(case, path, name="m")  # without diagnostics the name is not needed
    with pytest.raises(RegistryError, match="view 'm_diagnostics'"):
        fit_case(case, path, name="m", diagnostics=True)
    assert registry_rows(path) == 1


def test_a_source_column_named_like_a_diagnostic_is_refused(tmp_path: Path) -> None:
    case = CASE["gamma-inverse-scotland"]
    path = database(tmp_path, case.frame().assign(leverage=1.0))
    with pytest.raises(SpecError, match=r"already has column\(s\) \['leverage'\]"):
        fit_case(case, path, name="m", diagnostics=True)
    assert registry_rows(path) == 0


def test_too_many_pairs_is_refused_before_anything_is_written(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # two crossed factors of many levels need (X'WX)^-1 at every pair of their levels; past
    # colpairs.MAX_PAIRS the view is refused with the reason (here the limit is lowered)
    case = CASE["gamma-log-firm-grunfeld"]
    path = database(tmp_path, case.frame())
    monkeypatch.setattr(colpairs, "MAX_PAIRS", 20)
    with pytest.raises(SpecError, match="more than 20 pairs of design columns"):
        fit_case(case, path, name="m", diagnostics=True)
    assert registry_rows(path) == 0
    out = CliRunner().invoke(
        main,
        [
            "fit",
            "data",
            "--db",
            path,
            "--response",
            "invest",
            "--family",
            "gamma",
            "--link",
            "log",
            "--exclude",
            "row_id",
            "--name",
            "m",
            "--diagnostics",
        ],  # fmt: skip
    )
    assert out.exit_code == 2 and "more than 20 pairs" in out.output
    assert registry_rows(path) == 0


def test_promoting_a_version_without_what_the_view_needs_drops_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    case = CASE["gamma-log-firm-grunfeld"]
    path = database(tmp_path, case.frame())
    monkeypatch.setattr(colpairs, "MAX_PAIRS", 20)
    fit_case(case, path, name="m")  # version 1 keeps no inverse entries
    monkeypatch.undo()
    fit_case(case, path, name="m", diagnostics=True, new_version=True)
    assert "m_diagnostics" in objects(path)
    with pytest.warns(DeploymentWarning, match="live without its diagnostics view"):
        promote(path, "m", 1)  # a roll-back is never blocked by the view
    assert model_row(path, "m")["diagnostics"] is False
    assert "m_diagnostics" not in objects(path)


def test_a_registry_from_before_the_diagnostics_column(tmp_path: Path) -> None:
    case = CASE["gamma-inverse-scotland"]
    path = database(tmp_path, case.frame())
    fit_case(case, path, name="m")
    con = duckdb.connect(path)
    con.execute("ALTER TABLE indb_registry.model DROP COLUMN diagnostics")  # 0.2.0's layout
    con.close()
    fit_case(case, path, name="m", diagnostics=True)
    assert read(path, "SELECT diagnostics FROM indb_registry.model")["diagnostics"].tolist() == [
        True
    ]
    assert "m_diagnostics" in objects(path)
