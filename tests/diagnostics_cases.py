"""Models for the diagnostics view and their oracle (shared by the DuckDB and engine tests).

Every case is a dataset shipped inside statsmodels (``statsmodels.datasets``, nothing is
downloaded) and a model indb fits with ``diagnostics=True``. The oracle is statsmodels
(test-only): a GLM on the treatment-coded design of ``reference_cases.design_matrix`` (built
from the data, not from indb's design), its ``resid_response``, ``resid_pearson``,
``resid_deviance``, ``resid_working`` and ``get_influence()``'s ``hat_matrix_diag`` and
``cooks_distance``. Where statsmodels' conventions differ from the view's definitions (see
``indb/diagnostics.py``) the oracle converts, and says so:

* grouped binomial data: statsmodels multiplies the response residual by the trials and the
  working residual by the trials twice (its own source asks whether the second is right);
  the view keeps both on the proportion scale of ``fitted``, so the oracle divides;
* a non-canonical link: the view's leverage uses the expected information, as IRLS does,
  which is ``get_influence(observed=False)``;
* frequency weights: the view gives each row the values of one of the rows it stands for,
  which is statsmodels on the data with each row written out that many times.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import statsmodels.api as sm
import statsmodels.datasets as smd
from reference_cases import design_matrix
from statsmodels.genmod.families import links
from statsmodels.genmod.generalized_linear_model import GLMResults

from indb.results import FitResult

COLUMNS = [
    "fitted",
    "resid_response",
    "resid_pearson",
    "resid_deviance",
    "resid_working",
    "leverage",
    "cooks_distance",
]
# statsmodels converges to 1e-13 (params); indb to tol 1e-13 (relative deviance change), which
# leaves estimates some 1e-8 apart: residuals near 0 are compared on the scale of the column
FULL_RTOL = 1e-6
# the same formulas at the same coefficients: only rounding separates them
SAME_BETA_RTOL = 1e-9
SM_FIT = {"tol_criterion": "params", "atol": 1e-14, "rtol": 1e-13, "maxiter": 2000}


def _sm(name: str) -> pd.DataFrame:
    return getattr(smd, name).load_pandas().data.reset_index(drop=True)


def fair_children() -> pd.DataFrame:
    # statsmodels.datasets.fair (6366 respondents): number of children, years married as
    # exposure, marriage rating and religiousness as text levels, a prior weight derived from
    # the occupation code (1 + code mod 3)
    d = _sm("fair")
    return pd.DataFrame(
        {
            "row_id": np.arange(len(d), dtype=np.int64),
            "children": d["children"].round().astype(np.int64),
            "years": d["yrs_married"].astype(float),
            "rating": d["rate_marriage"].astype(int).astype(str),
            "religious": d["religious"].astype(int).astype(str),
            "age": d["age"].astype(float),
            "educ": d["educ"].astype(float),
            "wt": 1.0 + (d["occupation"] % 3),
        }
    )


def fair_affair() -> pd.DataFrame:
    # statsmodels.datasets.fair: any extramarital affair (0/1), integer-coded ratings
    d = _sm("fair")
    return pd.DataFrame(
        {
            "row_id": np.arange(len(d), dtype=np.int64),
            "had_affair": (d["affairs"] > 0).astype(np.int64),
            "rate_marriage": d["rate_marriage"].astype(np.int64),
            "religious": d["religious"].astype(np.int64),
            "age": d["age"].astype(float),
        }
    )


def fair_counts() -> pd.DataFrame:
    # statsmodels.datasets.fair collapsed to one row per (rate_marriage, religious, had_affair)
    # with the number of respondents as a frequency weight (40 rows standing for 6366)
    f = fair_affair()
    out = (
        f.groupby(["had_affair", "rate_marriage", "religious"])
        .size()
        .rename("respondents")
        .reset_index()
    )
    return out.assign(row_id=np.arange(len(out), dtype=np.int64))


def star98() -> pd.DataFrame:
    # statsmodels.datasets.star98: 303 California school districts, NABOVE of NABOVE + NBELOW
    # pupils above the national median in maths
    # (lower-case names: the trials expression is written unquoted, which PostgreSQL folds)
    d = _sm("star98")[["NABOVE", "NBELOW", "LOWINC", "PERASIAN", "PERBLACK", "PERHISP"]]
    return d.rename(columns=str.lower).assign(row_id=np.arange(len(d), dtype=np.int64))


def grunfeld() -> pd.DataFrame:
    # statsmodels.datasets.grunfeld: investment of 11 US firms 1935-54 (220 rows)
    d = _sm("grunfeld")
    return pd.DataFrame(
        {
            "row_id": np.arange(len(d), dtype=np.int64),
            "invest": d["invest"].astype(float),
            "value": d["value"].astype(float),
            "capital": d["capital"].astype(float),
            "firm": d["firm"].astype(str),
        }
    )


def scotland() -> pd.DataFrame:
    # statsmodels.datasets.scotland: 1997 referendum, % YES in 32 council areas
    d = _sm("scotland")
    return d[["YES", "COUTAX", "UNEMPF", "MOR"]].assign(row_id=np.arange(len(d), dtype=np.int64))


def diabetes() -> pd.DataFrame:
    # sklearn.datasets.load_diabetes(scaled=False): 442 patients; sex (1/2) as a level
    from sklearn.datasets import load_diabetes

    d = load_diabetes(as_frame=True, scaled=False).frame
    return pd.DataFrame(
        {
            "row_id": np.arange(len(d), dtype=np.int64),
            "target": d["target"].astype(float),
            "bmi": d["bmi"].astype(float),
            "bp": d["bp"].astype(float),
            "s5": d["s5"].astype(float),
            "sex": d["sex"].astype(np.int64),
        }
    )


def modechoice() -> pd.DataFrame:
    # statsmodels.datasets.modechoice: 210 travellers x 4 travel modes (840 rows); the
    # generalized cost of each mode by mode, in-vehicle time and traveller (210 levels)
    d = _sm("modechoice")
    return pd.DataFrame(
        {
            "row_id": np.arange(len(d), dtype=np.int64),
            "gc": d["gc"].astype(float),
            "invt": d["invt"].astype(float),
            "mode": d["mode"].astype(int).astype(str),
            "person": d["individual"].astype(int).astype(str),
        }
    )


@dataclass(frozen=True)
class DiagCase:
    """One model: data, indb's fit arguments and the matching statsmodels GLM."""

    id: str
    frame: Callable[[], pd.DataFrame]
    fit_kwargs: dict[str, Any]
    family: Callable[[], Any]
    #: statsmodels' get_influence(observed=...): True only where the link is canonical
    observed: bool = True
    offset: Callable[[pd.DataFrame], np.ndarray] | None = None
    var_weights: Callable[[pd.DataFrame], np.ndarray] | None = None
    #: grouped binomial: (successes, trials)
    trials: Callable[[pd.DataFrame], tuple[np.ndarray, np.ndarray]] | None = None
    #: frequency weights: statsmodels fits the rows written out that many times
    repeat: Callable[[pd.DataFrame], np.ndarray] | None = None
    notes: str = ""
    options: dict[str, Any] = field(default_factory=dict)


CASES = [
    DiagCase(
        "poisson-offset-weights-fair",
        fair_children,
        {
            "response": "children",
            "family": "poisson",
            "offset": "ln(years)",
            "weight": "wt",
            "predictors": ["rating", "religious", "age", "educ"],
        },
        lambda: sm.families.Poisson(),
        offset=lambda f: np.log(f["years"].to_numpy()),
        var_weights=lambda f: f["wt"].to_numpy(float),
    ),
    DiagCase(
        "binomial-cat-by-cat-fair",
        fair_affair,
        {
            "response": "had_affair",
            "family": "binomial",
            "predictors": ["rate_marriage", "religious", "age"],
            "categorical": ["rate_marriage", "religious"],
            "interactions": [("rate_marriage", "religious")],
        },
        lambda: sm.families.Binomial(),
    ),
    DiagCase(
        "binomial-grouped-cloglog-star98",
        star98,
        {
            "response": "nabove",
            "family": "binomial",
            "link": "cloglog",
            "trials": "nabove + nbelow",
            "predictors": ["lowinc", "perasian", "perblack", "perhisp"],
        },
        lambda: sm.families.Binomial(links.CLogLog()),
        observed=False,
        trials=lambda f: (
            f["nabove"].to_numpy(float),
            (f["nabove"] + f["nbelow"]).to_numpy(float),
        ),
    ),
    DiagCase(
        "binomial-frequency-weights-fair",
        fair_counts,
        {
            "response": "had_affair",
            "family": "binomial",
            "frequency_weight": "respondents",
            "predictors": ["rate_marriage", "religious"],
            "categorical": ["rate_marriage", "religious"],
            "reference": {"rate_marriage": "5", "religious": "3"},
        },
        lambda: sm.families.Binomial(),
        repeat=lambda f: f["respondents"].to_numpy(np.int64),
    ),
    DiagCase(
        "gamma-log-firm-grunfeld",
        grunfeld,
        {
            "response": "invest",
            "family": "gamma",
            "link": "log",
            "predictors": ["value", "capital", "firm"],
        },
        lambda: sm.families.Gamma(links.Log()),
        observed=False,
    ),
    DiagCase(
        "gamma-inverse-scotland",
        scotland,
        {"response": "YES", "family": "gamma", "predictors": ["COUTAX", "UNEMPF", "MOR"]},
        lambda: sm.families.Gamma(),
    ),
    DiagCase(
        "gaussian-sex-by-bmi-diabetes",
        diabetes,
        {
            "response": "target",
            "family": "gaussian",
            "predictors": ["bmi", "bp", "s5", "sex"],
            "categorical": ["sex"],
            "interactions": [("bmi", "sex")],
        },
        lambda: sm.families.Gaussian(),
    ),
    DiagCase(
        "gamma-log-214-coefficients-modechoice",
        modechoice,
        {
            "response": "gc",
            "family": "gamma",
            "link": "log",
            "predictors": ["invt", "mode", "person"],
            "max_levels": 1000,
        },
        lambda: sm.families.Gamma(links.Log()),
        observed=False,
        notes="214 coefficients: past the 150 a registry version keeps the covariance for",
    ),
]
CASE = {c.id: c for c in CASES}


def fit_kwargs(case: DiagCase) -> dict[str, Any]:
    return {k: v for k, v in case.fit_kwargs.items()}


def design(case: DiagCase, frame: pd.DataFrame, res: FitResult) -> pd.DataFrame:
    """The treatment-coded design built from the data (reference_cases.design_matrix), in
    indb's term order (the names must match exactly)."""
    kw = case.fit_kwargs
    x = design_matrix(
        frame,
        kw["predictors"],
        categorical=kw.get("categorical", ()),
        reference={**_references(frame, res), **kw.get("reference", {})},
        interactions=kw.get("interactions", ()),
    )
    assert sorted(x.columns) == sorted(res.terms)
    return x[res.terms]


def _references(frame: pd.DataFrame, res: FitResult) -> dict[str, str]:
    """indb's reference levels as its design records them (the oracle codes the same)."""
    return {f["column"]: f["reference"] for f in res.design.get("factors", [])}


def sm_model(case: DiagCase, frame: pd.DataFrame, res: FitResult) -> Any:
    """statsmodels' GLM of the case (the rows written out when frequency weights say so)."""
    x = design(case, frame, res)
    kwargs: dict[str, Any] = {}
    if case.offset is not None:
        kwargs["offset"] = case.offset(frame)
    if case.var_weights is not None:
        kwargs["var_weights"] = case.var_weights(frame)
    if case.trials is not None:
        successes, trials = case.trials(frame)
        endog: Any = np.column_stack([successes, trials - successes])
    else:
        endog = frame[case.fit_kwargs["response"]].to_numpy(float)
    exog = x.to_numpy(float)
    if case.repeat is not None:
        times = case.repeat(frame)
        exog, endog = np.repeat(exog, times, axis=0), np.repeat(endog, times, axis=0)
        kwargs = {k: np.repeat(v, times) for k, v in kwargs.items()}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' DomainWarning for the inverse link
        return sm.GLM(endog, exog, family=case.family(), **kwargs)


def oracle(
    case: DiagCase, model: Any, params: np.ndarray | None = None, scale: float | None = None
) -> dict[str, np.ndarray]:
    """statsmodels' numbers per row (its own fit, or at ``params`` with the dispersion
    ``scale``), converted to the view's conventions (module notes)."""
    if params is None:
        results = model.fit(**SM_FIT)
    else:
        # statsmodels' results object at given coefficients; the dispersion given, else by
        # its own rule (Pearson's chi-squared over the residual df, or 1) at them
        mu = model.predict(params)
        w = model.hessian_factor(params, scale=1.0, observed=False)
        normalized = np.linalg.pinv((model.exog * w[:, None]).T @ model.exog)
        phi = model.estimate_scale(mu) if scale is None else scale
        results = GLMResults(model, params, normalized, phi)
    infl = results.get_influence(observed=case.observed)
    n_trials = np.asarray(model.n_trials, dtype=float) if case.trials is not None else 1.0
    out = {
        "fitted": np.asarray(results.mu),
        "resid_response": np.asarray(results.resid_response) / n_trials,
        "resid_pearson": np.asarray(results.resid_pearson),
        "resid_deviance": np.asarray(results.resid_deviance),
        "resid_working": np.asarray(results.resid_working) / n_trials**2,
        "leverage": np.asarray(infl.hat_matrix_diag),
        "cooks_distance": np.asarray(infl.cooks_distance[0]),
    }
    out["params"] = np.asarray(results.params)
    out["scale"] = np.asarray(results.scale)
    return out


def first_copies(case: DiagCase, frame: pd.DataFrame) -> np.ndarray:
    """Index of each source row's first copy in the written-out rows (frequency weights)."""
    if case.repeat is None:
        return np.arange(len(frame))
    times = case.repeat(frame)
    return np.concatenate([[0], np.cumsum(times)[:-1]])


def leverage_by_qr(model: Any, params: np.ndarray, observed: bool) -> np.ndarray:
    """The hat matrix's diagonal from the design itself: the squared row norms of Q in
    W^(1/2) X = Q R (an oracle for statsmodels' oracle)."""
    w = model.hessian_factor(params, scale=1.0, observed=observed)
    q, _ = np.linalg.qr(np.sqrt(w)[:, None] * model.exog)
    return np.einsum("ij,ij->i", q, q)
