"""Robust and cluster-robust fits with their outside references, shared by
``test_covariance.py`` and ``engines/test_covariance_engines.py``.

Every case uses a dataset shipped inside statsmodels (``statsmodels.datasets``; nothing is
downloaded). Three references, from the most to the least independent:

* :func:`numpy_sandwich`: the sandwich written out here with numpy from a fit's means (its
  own variance and link derivatives, not statsmodels'): bread the inverse of the observed
  information, meat the rows' (HC0) or clusters' (with G/(G-1)(N-1)/(N-K)) score outer
  products;
* :func:`statsmodels_fit`: statsmodels 0.15 GLM fitted with ``cov_type="HC0"`` or
  ``cov_type="cluster"`` (``groups=``), to a tight tolerance (test-only oracle); the tests
  check it against :func:`numpy_sandwich` first;
* :func:`statsmodels_at`: statsmodels' own sandwich functions
  (``statsmodels.stats.sandwich_covariance.cov_white_simple`` / ``cov_cluster`` on the
  model's ``score_obs`` and ``hessian``) at given coefficients, indb's: the covariance
  computation itself, free of how far either fit converged.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import statsmodels.api as sm
import statsmodels.stats.sandwich_covariance as sw
from reference_cases import _sm_data, design_matrix, fair_rated, grunfeld, scotland, star98
from scipy import stats

F = sm.families
L = sm.families.links
SM_FIT = {"tol_criterion": "params", "atol": 1e-14, "rtol": 1e-13, "maxiter": 2000}

Frame = pd.DataFrame
Column = Callable[[Frame], np.ndarray]


@dataclass(frozen=True)
class CovCase:
    """One fit with a covariance kind, as indb and statsmodels are given it.

    ``fit`` are the keyword arguments of :func:`indb.fit` besides source and db;
    ``family`` builds the statsmodels family; ``groups`` the cluster of each row (cluster
    kind); ``family_key`` / ``link_key`` name the variance and link of
    :func:`numpy_sandwich`."""

    id: str
    dataset: str
    load: Callable[[], Frame]
    fit: Mapping[str, Any]
    family: Callable[[], Any]
    family_key: str
    link_key: str
    offset: Column | None = None
    var_weights: Column | None = None
    freq_weights: Column | None = None
    trials: Column | None = None
    groups: Column | None = None
    theta: float | None = None
    notes: str = ""
    #: IRLS tolerance: tight enough for 1e-8 (gamma with a log link converges linearly)
    tol: float = 1e-12
    categorical: tuple[str, ...] = field(default=())

    @property
    def kind(self) -> str:
        return str(self.fit["covariance"])

    @property
    def estimated_dispersion(self) -> bool:
        return self.family_key in ("gaussian", "gamma")


def grunfeld_years() -> Frame:
    # statsmodels.datasets.grunfeld: investment of 11 US firms 1935-54 (220 rows), with year
    return grunfeld().assign(year=_sm_data("grunfeld")["year"].astype(int))


def fair_occupation() -> Frame:
    # statsmodels.datasets.fair (6366 respondents) as reference_cases.fair_rated, plus the
    # occupation code (1-6) as a cluster
    return fair_rated().assign(occupation=_sm_data("fair")["occupation"].astype(int))


def star98_trials() -> Frame:
    # statsmodels.datasets.star98: 303 California school districts, NABOVE of
    # NABOVE + NBELOW pupils above the national median
    d = star98()
    return d.assign(ntotal=d["NABOVE"] + d["NBELOW"])


def _groups(*columns: str) -> Column:
    return lambda df: pd.factorize(df[list(columns)].astype(str).agg("-".join, axis=1))[0]


def _ln(column: str) -> Column:
    return lambda df: np.log(df[column].to_numpy(dtype=float))


def _col(column: str) -> Column:
    return lambda df: df[column].to_numpy(dtype=float)


FAIR = "statsmodels.datasets.fair"
GRUNFELD = "statsmodels.datasets.grunfeld"

CASES: list[CovCase] = [
    CovCase(
        "gaussian-grunfeld-robust",
        GRUNFELD,
        grunfeld,
        {"response": "invest", "family": "gaussian", "predictors": ["value", "capital"],
         "covariance": "robust"},
        F.Gaussian, "gaussian", "identity",
    ),
    CovCase(
        "gaussian-grunfeld-firm-effects-cluster-firm",
        GRUNFELD,
        grunfeld,
        {"response": "invest", "family": "gaussian", "predictors": ["value", "capital", "firm"],
         "covariance": "cluster", "cluster": "firm"},
        F.Gaussian, "gaussian", "identity",
        groups=_groups("firm"),
        notes="every cluster inside one factor cell",
    ),
    CovCase(
        "gaussian-grunfeld-firm-effects-cluster-year",
        GRUNFELD,
        grunfeld_years,
        {"response": "invest", "family": "gaussian", "predictors": ["value", "capital", "firm"],
         "covariance": "cluster", "cluster": "year"},
        F.Gaussian, "gaussian", "identity",
        groups=_groups("year"),
        notes="every cluster across all 11 cells: the cell pairs of the cluster scan",
    ),
    CovCase(
        "poisson-fair-offset-robust",
        FAIR,
        fair_rated,
        {"response": "children", "family": "poisson",
         "predictors": ["rating", "religious", "age", "educ"], "offset": "ln(years)",
         "covariance": "robust"},
        F.Poisson, "poisson", "log",
        offset=_ln("years"),
        notes="log link: the last scans switch from the log-link scan to the IRLS scan",
    ),
    CovCase(
        "poisson-fair-offset-cluster-expression",
        FAIR,
        fair_rated,
        {"response": "children", "family": "poisson", "predictors": ["rating", "age", "educ"],
         "offset": "ln(years)", "covariance": "cluster",
         "cluster": "rating || '-' || religious"},
        F.Poisson, "poisson", "log",
        offset=_ln("years"),
        groups=_groups("rating", "religious"),
        notes="the cluster is an expression of two columns",
    ),
    CovCase(
        "poisson-fair-offset-folded-robust",
        FAIR,
        fair_rated,
        {"response": "children", "family": "poisson", "predictors": ["rating", "religious"],
         "offset": "ln(years)", "covariance": "robust", "compress": "always"},
        F.Poisson, "poisson", "log",
        offset=_ln("years"),
        notes="compressed route: the meat from the folded rows' sums of f pw^2 (y - mu)^2",
    ),
    CovCase(
        "poisson-fair-offset-folded-cluster",
        FAIR,
        fair_occupation,
        {"response": "children", "family": "poisson", "predictors": ["rating", "religious"],
         "offset": "ln(years)", "covariance": "cluster", "cluster": "occupation",
         "compress": "always"},
        F.Poisson, "poisson", "log",
        offset=_ln("years"),
        groups=_groups("occupation"),
        notes="compressed route: the cluster's column is a key of the fold",
    ),
    CovCase(
        "poisson-fair-frequency-weights-cluster",
        FAIR,
        fair_occupation,
        {"response": "children", "family": "poisson", "predictors": ["rating", "age"],
         "frequency_weight": "wt", "covariance": "cluster", "cluster": "religious"},
        F.Poisson, "poisson", "log",
        freq_weights=_col("wt"),
        groups=_groups("religious"),
        notes="statsmodels warns its cluster covariance is 'not fully supported' with "
        "frequency weights; what it computes (each row's score times f, N = rows) is the "
        "formula numpy_sandwich writes out",
    ),
    CovCase(
        "binomial-fair-logit-prior-weight-robust",
        FAIR,
        fair_rated,
        {"response": "had", "family": "binomial", "predictors": ["rating", "religious", "age"],
         "weight": "wt", "covariance": "robust"},
        F.Binomial, "binomial", "logit",
        var_weights=_col("wt"),
    ),
    CovCase(
        "binomial-fair-probit-cluster",
        FAIR,
        fair_occupation,
        {"response": "had", "family": "binomial", "link": "probit",
         "predictors": ["rating", "age"], "covariance": "cluster", "cluster": "occupation"},
        lambda: F.Binomial(L.Probit()), "binomial", "probit",
        groups=_groups("occupation"),
        notes="non-canonical link: the bread is the observed information",
    ),
    CovCase(
        "binomial-star98-trials-robust",
        "statsmodels.datasets.star98",
        star98_trials,
        {"response": "NABOVE", "family": "binomial", "trials": "ntotal",
         "predictors": ["LOWINC", "PERASIAN", "PERBLACK", "PTRATIO"], "covariance": "robust"},
        F.Binomial, "binomial", "logit",
        trials=_col("ntotal"),
    ),
    CovCase(
        "gamma-scotland-inverse-robust",
        "statsmodels.datasets.scotland",
        scotland,
        {"response": "YES", "family": "gamma",
         "predictors": ["COUTAX", "UNEMPF", "MOR", "ACT", "GDP", "AGE"], "covariance": "robust"},
        F.Gamma, "gamma", "inverse",
        notes="estimated dispersion, canonical link",
    ),
    CovCase(
        "gamma-fair-log-cluster",
        FAIR,
        fair_rated,
        {"response": "years", "family": "gamma", "link": "log", "predictors": ["rating", "age"],
         "covariance": "cluster", "cluster": "religious"},
        lambda: F.Gamma(L.Log()), "gamma", "log",
        groups=_groups("religious"),
        notes="estimated dispersion, non-canonical link",
        tol=1e-14,
    ),
    CovCase(
        "negative-binomial-randhie-fixed-theta-robust",
        "statsmodels.datasets.randhie",
        lambda: _sm_data("randhie"),
        {"response": "mdvis", "family": "negative_binomial", "theta": 1.3,
         "predictors": ["lncoins", "idp", "lpi", "physlm", "disea"], "covariance": "robust"},
        lambda: F.NegativeBinomial(alpha=1.0 / 1.3), "negative_binomial", "log",
        theta=1.3,
        notes="log is not the negative binomial's canonical link",
    ),
]  # fmt: skip

CASES_BY_ID = {c.id: c for c in CASES}


# -- the design and the statsmodels model ------------------------------------------------------


def design(case: CovCase, frame: Frame) -> pd.DataFrame:
    """The design with indb's term names (reference_cases.design_matrix)."""
    cols = [c for c in case.fit["predictors"]]
    return design_matrix(frame, cols, categorical=case.categorical)


def model(case: CovCase, frame: Frame) -> Any:
    y = frame[case.fit["response"]].to_numpy(dtype=float)
    extra: dict[str, Any] = {}
    if case.trials is not None:
        n = case.trials(frame)
        y = np.column_stack([y, n - y])
    for key, fn in (
        ("offset", case.offset),
        ("var_weights", case.var_weights),
        ("freq_weights", case.freq_weights),
    ):
        if fn is not None:
            extra[key] = fn(frame)
    with warnings.catch_warnings():
        # the inverse link's domain warning: the cases' fitted means are all positive
        warnings.simplefilter("ignore", sm.tools.sm_exceptions.DomainWarning)
        return sm.GLM(y, design(case, frame).to_numpy(), family=case.family(), **extra)


def _cov_args(case: CovCase, frame: Frame) -> dict[str, Any]:
    if case.kind == "robust":
        return {"cov_type": "HC0"}
    return {"cov_type": "cluster", "cov_kwds": {"groups": case.groups(frame)}}


def statsmodels_fit(case: CovCase, frame: Frame) -> dict[str, Any]:
    """statsmodels' fit with the case's covariance: estimates, covariance, standard errors,
    Wald statistics, p-values and 95% limits, with t on its df (``use_t``) where the
    dispersion is estimated, as indb refers them."""
    with warnings.catch_warnings():
        # "cov_type not fully supported with freq_weights / var_weights": see the cases' notes
        warnings.simplefilter("ignore")
        res = model(case, frame).fit(
            **SM_FIT, **_cov_args(case, frame), use_t=case.estimated_dispersion
        )
    assert res.converged
    return {
        "params": np.asarray(res.params),
        "cov": np.asarray(res.cov_params()),
        "bse": np.asarray(res.bse),
        "wald": np.asarray(res.tvalues),
        "p": np.asarray(res.pvalues),
        "ci": np.asarray(res.conf_int(alpha=0.05)),
        "mu": np.asarray(res.mu),
        # the t's df: with cov_type="cluster" statsmodels keeps df_resid and refers t to
        # df_resid_inference = G - 1 (its df_correction)
        "df": float(getattr(res, "df_resid_inference", None) or res.df_resid),
    }


def statsmodels_at(case: CovCase, frame: Frame, params: np.ndarray) -> np.ndarray:
    """statsmodels' sandwich at ``params``: its score_obs and observed Hessian through
    cov_white_simple (HC0) or cov_cluster (with its default correction)."""
    m = model(case, frame)
    xu = m.score_obs(params, scale=1.0)
    hinv = np.linalg.inv(m.hessian(params, scale=1.0))
    if case.kind == "robust":
        # HC0 takes frequency weights once per row: score_obs holds f, so divide by sqrt(f)
        # as statsmodels' _get_sandwich_arrays does for a results instance
        xu = xu / np.sqrt(np.asarray(m.freq_weights, dtype=float))[:, None]
        return sw.cov_white_simple((xu, hinv), use_correction=False)
    return sw.cov_cluster((xu, hinv), case.groups(frame), use_correction=True)


# -- the sandwich written out with numpy ------------------------------------------------------

#: V(mu) and dV/dmu (McCullagh & Nelder, table 2.1)
VARIANCES: dict[str, Callable[[np.ndarray, float | None], tuple[np.ndarray, np.ndarray]]] = {
    "gaussian": lambda m, t: (np.ones_like(m), np.zeros_like(m)),
    "poisson": lambda m, t: (m, np.ones_like(m)),
    "binomial": lambda m, t: (m * (1 - m), 1 - 2 * m),
    "gamma": lambda m, t: (m**2, 2 * m),
    "negative_binomial": lambda m, t: (m + m**2 / t, 1 + 2 * m / t),
}

#: dmu/deta and d^2mu/deta^2 as functions of eta
LINKS: dict[str, Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]] = {
    "identity": lambda e: (np.ones_like(e), np.zeros_like(e)),
    "log": lambda e: (np.exp(e), np.exp(e)),
    "logit": lambda e: (
        stats.logistic.pdf(e),
        stats.logistic.pdf(e) * (1 - 2 * stats.logistic.cdf(e)),
    ),
    "probit": lambda e: (stats.norm.pdf(e), -e * stats.norm.pdf(e)),
    "inverse": lambda e: (-1 / e**2, 2 / e**3),
}

INVERSES: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "identity": lambda e: e,
    "log": np.exp,
    "logit": stats.logistic.cdf,
    "probit": stats.norm.cdf,
    "inverse": lambda e: 1 / e,
}


def numpy_sandwich(case: CovCase, frame: Frame, params: np.ndarray) -> np.ndarray:
    """The case's sandwich at ``params``, from first principles: the score of row i is
    u_i x_i with u = pw (y - mu) mu' / V (the dispersion cancels between bread and meat);
    the bread is the inverse of sum(f w_o x x'), w_o = pw mu'^2 / V (1 + (y - mu)
    (V'/V - mu''/mu'^2)); the meat sum(f u^2 x x') (robust) or sum_g S_g S_g' with
    S_g = sum over g's rows of f u x, times G/(G-1) (N-1)/(N-K) (cluster; N rows, K
    coefficients)."""
    x = design(case, frame).to_numpy()
    y = frame[case.fit["response"]].to_numpy(dtype=float)
    pw = np.ones(len(frame))
    if case.trials is not None:
        n = case.trials(frame)
        y, pw = y / n, pw * n
    if case.var_weights is not None:
        pw = pw * case.var_weights(frame)
    f = case.freq_weights(frame) if case.freq_weights is not None else np.ones(len(frame))
    eta = x @ params + (case.offset(frame) if case.offset is not None else 0.0)
    mu = INVERSES[case.link_key](eta)
    d1, d2 = LINKS[case.link_key](eta)
    v, dv = VARIANCES[case.family_key](mu, case.theta)
    u = pw * (y - mu) * d1 / v
    w_o = pw * d1**2 / v * (1 + (y - mu) * (dv / v - d2 / d1**2))
    bread = np.linalg.inv(x.T @ (x * (f * w_o)[:, None]))
    if case.kind == "robust":
        meat = x.T @ (x * (f * u * u)[:, None])
        factor = 1.0
    else:
        g = case.groups(frame)
        scores = np.zeros((g.max() + 1, x.shape[1]))
        np.add.at(scores, g, x * (f * u)[:, None])
        meat = scores.T @ scores
        clusters, rows, k = len(np.unique(g)), len(frame), x.shape[1]
        factor = clusters / (clusters - 1) * (rows - 1) / (rows - k)
    return factor * bread @ meat @ bread


def covariance_gap(got: np.ndarray, want: np.ndarray) -> float:
    """Largest |got - want| relative to sqrt(want_ii want_jj)."""
    d = np.sqrt(np.diag(want))
    return float(np.max(np.abs(got - want) / np.outer(d, d)))
