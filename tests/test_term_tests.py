"""Whole-term Wald tests and generalized VIFs (no scan; from the fit's covariance).

Oracles (test-only, outside the project):
* statsmodels ``GLMResults.wald_test_terms`` (formula API, so its terms are patsy's) on
  McCullagh & Nelder's ship damage data (*Generalized Linear Models*, 2nd ed., 1989,
  section 6.3.2; statsmodels' test results ``ships.csv``). A whole term's Wald test does not
  depend on the reference level, so indb's coding need not match patsy's. The oracle is
  checked once more by the quadratic form b' V^-1 b computed with numpy from statsmodels'
  own estimates and covariance.
* statsmodels ``variance_inflation_factor`` on Longley's macroeconomic data (Longley 1967,
  shipped as ``statsmodels.datasets.longley``; famous for its collinearity), for which the
  generalized VIF of a one-column term equals the classical VIF (Fox & Monette 1992).
* For a term of several columns, Fox & Monette's definition det(R11) det(R22) / det(R)
  computed directly with numpy on statsmodels' covariance (the definition, a second route).
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import statsmodels.api as sm
import statsmodels.formula.api as smf
from numpy.testing import assert_allclose
from reference_cases import ships_registry_frame
from statsmodels.stats.outliers_influence import variance_inflation_factor

import indb

SM_FIT = {"tol": 1e-13, "maxiter": 200}


def _con(name: str, frame: pd.DataFrame) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    con.register("frame", frame)
    con.execute(f"CREATE TABLE {name} AS SELECT * FROM frame")
    return con


def test_whole_term_wald_tests_match_statsmodels_on_the_ships() -> None:
    ships = ships_registry_frame()
    con = _con("ships", ships)
    res = indb.fit(
        "ships", "accident", "poisson", db=con, offset="ln(service)", exclude=["row_id"], tol=1e-12
    )
    oracle = smf.glm(
        "accident ~ C(type) + C(built) + C(operated)",
        data=ships,
        family=sm.families.Poisson(),
        offset=np.log(ships["service"]),
    ).fit(**SM_FIT)
    table = oracle.wald_test_terms(skip_single=False, scalar=True).table
    got = {t.term: t for t in res.term_tests}
    assert list(got) == ["type", "built", "operated"]
    for term in ("type", "built", "operated"):
        row = table.loc[f"C({term})"]
        assert got[term].df == int(row["df_constraint"])
        assert_allclose(got[term].wald_chi2, row["statistic"], rtol=1e-7)
        assert_allclose(got[term].p_value, row["pvalue"], rtol=1e-6)
        # the oracle itself: b' V^-1 b from statsmodels' own estimates and covariance
        cols = [c for c in oracle.params.index if c.startswith(f"C({term})")]
        b = oracle.params[cols].to_numpy()
        v = oracle.cov_params().loc[cols, cols].to_numpy()
        assert_allclose(b @ np.linalg.solve(v, b), row["statistic"], rtol=1e-10)
    # the same figures come back from JSON and the text report shows them
    again = indb.FitResult.from_dict(res.to_dict())
    assert again.term_tests == res.term_tests and again.collinearity == res.collinearity
    assert "WHOLE TERMS" in str(res)


def test_generalized_vif_is_the_classical_vif_for_numeric_columns() -> None:
    longley = sm.datasets.longley.load_pandas().data
    con = _con("longley", longley)
    res = indb.fit("longley", "TOTEMP", "gaussian", db=con, tol=1e-12)
    exog = sm.add_constant(longley.drop(columns="TOTEMP"))
    for i, name in enumerate(exog.columns):
        if name == "const":
            continue
        entry = next(c for c in res.collinearity if c.term == name)
        assert entry.df == 1
        assert_allclose(entry.gvif, variance_inflation_factor(exog.to_numpy(), i), rtol=1e-6)
        assert_allclose(entry.gvif_scaled, np.sqrt(entry.gvif), rtol=1e-12)
    assert max(c.gvif for c in res.collinearity) > 1000  # Longley is famously collinear


def test_generalized_vif_of_a_categorical_term_follows_the_definition() -> None:
    # statsmodels.datasets.fair (6,366 marriages) with religiousness as a 4-level category
    fair = sm.datasets.fair.load_pandas().data
    fair = fair.assign(religious=fair["religious"].map(lambda r: f"r{int(r)}"))
    fair = fair[["children", "age", "yrs_married", "religious", "educ"]]
    con = _con("fair", fair)
    res = indb.fit("fair", "children", "poisson", db=con, tol=1e-12, reference={"religious": "r1"})
    x = pd.get_dummies(fair[["age", "yrs_married", "religious", "educ"]], drop_first=True)
    oracle = sm.GLM(fair["children"], sm.add_constant(x.astype(float)), sm.families.Poisson())
    v = oracle.fit(**SM_FIT).cov_params().to_numpy()[1:, 1:]
    r = v / np.sqrt(np.outer(np.diag(v), np.diag(v)))
    names = list(x.columns)
    blocks = {
        "age": [names.index("age")],
        "yrs_married": [names.index("yrs_married")],
        "religious": [i for i, n in enumerate(names) if n.startswith("religious_")],
        "educ": [names.index("educ")],
    }
    for term, idx in blocks.items():
        rest = [i for i in range(len(names)) if i not in idx]
        want = (
            np.linalg.det(r[np.ix_(idx, idx)])
            * np.linalg.det(r[np.ix_(rest, rest)])
            / np.linalg.det(r)
        )
        entry = next(c for c in res.collinearity if c.term == term)
        assert entry.df == len(idx)
        assert_allclose(entry.gvif, want, rtol=1e-6)
        assert_allclose(entry.gvif_scaled, want ** (1 / (2 * len(idx))), rtol=1e-6)


def test_chi_square_tail_past_the_smallest_double_keeps_its_power_of_ten() -> None:
    # Oracle: mpmath (arbitrary precision; a test dependency) for the chi-square tail
    # gammainc(df/2, chi2/2, inf, regularized=True); scipy underflows to 0 there.
    import mpmath

    from indb.report import _chi2_p

    for chi2, df in ((1873.51, 1), (2500.0, 11), (5000.0, 3)):
        exact = mpmath.gammainc(df / 2, chi2 / 2, mpmath.inf, regularized=True)
        text = _chi2_p(0.0, chi2, df)
        mantissa, power = text.split("e")
        assert int(power) == int(mpmath.floor(mpmath.log10(exact)))
        assert abs(float(mantissa) - float(exact / mpmath.mpf(10) ** int(power))) <= 0.051
