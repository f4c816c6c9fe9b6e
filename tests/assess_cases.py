"""Models and holdout rows for the assessment tests (``tests/test_assess.py`` on DuckDB and
``tests/engines/test_assess_engines.py`` on PostgreSQL and Spark), and their oracles.

Data shipped inside statsmodels (nothing downloaded):

* ``statsmodels.datasets.fair`` (6,366 respondents, ``reference_cases.fair_rated``): even
  rows train, odd rows are the holdout. Models: ``children`` (Poisson, offset ln(years),
  ratings as text levels and age), ``had`` (binomial 0/1, the same predictors), ``educ``
  (gamma, log link, prior weight ``wt``) and ``had_counts`` (binomial on the rows collapsed
  to one per rating x religious x outcome, frequency weight ``respondents``).
* ``statsmodels.datasets.star98`` (303 school districts): ``above`` (binomial with trials,
  NABOVE of NABOVE + NBELOW pupils), even districts train, odd ones are the holdout.
* second models for ``--against`` (``CHALLENGERS``): ``children_b`` (Poisson, the offset,
  rating and education) and ``had_b`` (binomial with a probit link, the same predictors).
* ``statsmodels.datasets.randhie`` (RAND Health Insurance Experiment, 20,190 person-years):
  medical visits as a Poisson response for the holdout gates of a scheduled refit; even rows
  train, odd rows are the holdout, and :func:`drifted` makes the training rows lose the
  visits of 70% of the rows with an individual deductible (``idp = 1``).

Oracle: statsmodels GLM (test-only) fitted on the training rows with indb's design (the
term names of the result), at a tight tolerance; its coefficients are checked against
indb's before its predictions on the holdout are summed with pandas. The holdout's mean is
computed column by column (not by a matrix product), so rows with one design row get
bitwise one mean, the tie groups the definitions need.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import statsmodels.api as sm
from numpy.testing import assert_allclose
from reference_cases import fair_rated, level_text, star98

from indb.results import FitResult

# statsmodels IRLS to a relative change of 1e-13 in the coefficients; indb at tol 1e-12
# (relative deviance change): both far below the 1e-7 at which the coefficients are compared
SM_FIT = {"tol_criterion": "params", "atol": 1e-14, "rtol": 1e-13, "maxiter": 500}
COEF_RTOL = 1e-7
#: the assessment's sums against pandas sums of the oracle's predictions: the predictions
#: agree to about the coefficients' agreement (1e-8 relative)
SUM_RTOL = 1e-7
PREDICTORS = ["rating", "religious", "age"]


def fair_frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    """(train, holdout) of the fair survey; the holdout gains two rows of a rating ('9')
    no training row has and three rows with a NULL age."""
    d = fair_rated().reset_index(drop=True)
    train, hold = d.iloc[0::2].reset_index(drop=True), d.iloc[1::2].reset_index(drop=True)
    unseen = hold.iloc[:2].assign(rating="9")
    hold = pd.concat([hold, unseen], ignore_index=True)
    hold["age"] = hold["age"].astype(object)
    hold.loc[[3, 10, 17], "age"] = None
    hold["age"] = hold["age"].astype(float)
    hold.insert(0, "row_id", np.arange(len(hold), dtype=np.int64))
    return train, hold


def fair_count_frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    """The fair survey's halves collapsed to one row per rating x religious x outcome, with
    the number of respondents as a frequency weight."""
    train, hold = fair_frames()

    def collapse(f: pd.DataFrame) -> pd.DataFrame:
        return f.groupby(["rating", "religious", "had"]).size().rename("respondents").reset_index()

    return collapse(train), collapse(hold[hold["rating"] != "9"])


def star_frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    d = star98().reset_index(drop=True)
    d = pd.DataFrame(
        {
            "above": d["NABOVE"].astype(float),
            "pupils": (d["NABOVE"] + d["NBELOW"]).astype(float),
            **{c.lower(): d[c].astype(float) for c in ["LOWINC", "PERASIAN", "PERHISP"]},
        }
    )
    return d.iloc[0::2].reset_index(drop=True), d.iloc[1::2].reset_index(drop=True)


@dataclass(frozen=True)
class Case:
    """One model: how indb fits it, and the columns its oracle reads."""

    name: str
    table: str
    fit: dict[str, Any]
    family: Any  # statsmodels family
    offset: str | None = None  # column whose log is the offset
    weight: str | None = None  # prior weight column
    trials: str | None = None
    freq: str | None = None


CASES = {
    "children": Case(
        "children",
        "fair",
        {"response": "children", "family": "poisson", "offset": "ln(years)"},
        sm.families.Poisson(),
        offset="years",
    ),
    "had": Case("had", "fair", {"response": "had", "family": "binomial"}, sm.families.Binomial()),
    "educ": Case(
        "educ",
        "fair",
        {"response": "educ", "family": "gamma", "link": "log", "weight": "wt"},
        sm.families.Gamma(sm.families.links.Log()),
        weight="wt",
    ),
    "had_counts": Case(
        "had_counts",
        "fair_counts",
        {"response": "had", "family": "binomial", "frequency_weight": "respondents"},
        sm.families.Binomial(),
        freq="respondents",
    ),
    "above": Case(
        "above",
        "star",
        {"response": "above", "family": "binomial", "trials": "pupils"},
        sm.families.Binomial(),
        trials="pupils",
    ),
}


#: the second models of a comparison (``--against``): other predictors than the first's
#: (no age, which has NULLs in the holdout), a probit link for the binomial one
CHALLENGERS = {
    "children_b": Case(
        "children_b",
        "fair",
        {"response": "children", "family": "poisson", "offset": "ln(years)"},
        sm.families.Poisson(),
        offset="years",
    ),
    "had_b": Case(
        "had_b",
        "fair",
        {"response": "had", "family": "binomial", "link": "probit"},
        sm.families.Binomial(sm.families.links.Probit()),
    ),
}
PREDICTORS_B = ["rating", "educ"]


def predictors(case: Case) -> list[str]:
    if case.table == "star":
        return ["lowinc", "perasian", "perhisp"]
    return ["rating", "religious"] if case.table == "fair_counts" else PREDICTORS


def design(frame: pd.DataFrame, res: FitResult) -> pd.DataFrame:
    """indb's design (its terms) on ``frame``: 1, a numeric column, or a level indicator
    (a level the model does not have is all zeros: the reference level)."""
    cols = {}
    for c in res.coefficients:
        if not c.columns:
            cols[c.term] = np.ones(len(frame))
        elif c.levels[0] is None:
            cols[c.term] = frame[c.columns[0]].to_numpy(dtype=float)
        else:
            text = frame[c.columns[0]].map(level_text)
            cols[c.term] = (text == c.levels[0]).to_numpy(dtype=float)
    return pd.DataFrame(cols, index=frame.index)


def estimates(res: FitResult) -> list[float]:
    """indb's estimates in design order (read from the coefficient table, whatever the
    result's convenience properties are called)."""
    return [c.estimate for c in res.coefficients]


def weights(case: Case, frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(frequency weight, prior weight incl. trials) per row."""
    n = len(frame)
    fw = frame[case.freq].to_numpy(float) if case.freq else np.ones(n)
    pw = frame[case.weight].to_numpy(float) if case.weight else np.ones(n)
    if case.trials:
        pw = pw * frame[case.trials].to_numpy(float)
    return fw, pw


def response(case: Case, frame: pd.DataFrame) -> np.ndarray:
    y = frame[case.fit["response"]].to_numpy(float)
    return y / frame[case.trials].to_numpy(float) if case.trials else y


def offset(case: Case, frame: pd.DataFrame) -> np.ndarray:
    return np.log(frame[case.offset].to_numpy(float)) if case.offset else np.zeros(len(frame))


@dataclass(frozen=True)
class Oracle:
    """statsmodels' fit on the training rows and its predictions on the holdout rows."""

    params: pd.Series
    frame: pd.DataFrame  # the holdout rows the assessment uses (no NULL in a model input)
    y: np.ndarray
    fw: np.ndarray
    pw: np.ndarray
    mu: np.ndarray
    score: np.ndarray  # the mean without the offset
    exposure: np.ndarray


def oracle(case: Case, res: FitResult, train: pd.DataFrame, hold: pd.DataFrame) -> Oracle:
    x = design(train, res)
    fw, pw = weights(case, train)
    fit = sm.GLM(
        response(case, train),
        x,
        family=case.family,
        offset=offset(case, train),
        var_weights=pw,
        freq_weights=fw,
    ).fit(**SM_FIT)
    assert fit.converged
    used = hold.dropna(subset=predictors(case)).reset_index(drop=True)
    xh = design(used, res)
    eta = np.zeros(len(used))
    for term in xh.columns:  # column by column: one design row, one mean, bit for bit
        eta = eta + xh[term].to_numpy() * fit.params[term]
    inv = case.family.link.inverse
    off = offset(case, used)
    hfw, hpw = weights(case, used)
    mu = inv(eta + off)
    exposure = hfw * np.exp(off) if case.offset else hfw * hpw
    return Oracle(fit.params, used, response(case, used), hfw, hpw, mu, inv(eta), exposure)


def lorenz_gini(key: np.ndarray, exposure: np.ndarray, actual: np.ndarray) -> float:
    """1 - 2 x the area under the Lorenz curve of ``actual`` against ``exposure`` with the
    rows in ascending ``key``, rows of one key value taken together (trapezoids)."""
    frame = pd.DataFrame({"k": key, "x": exposure, "y": actual}).groupby("k", sort=True).sum()
    cx = np.concatenate([[0.0], np.cumsum(frame["x"].to_numpy())]) / frame["x"].sum()
    cy = np.concatenate([[0.0], np.cumsum(frame["y"].to_numpy())]) / frame["y"].sum()
    area = float(np.sum(np.diff(cx) * (cy[1:] + cy[:-1]) / 2.0))
    return 1.0 - 2.0 * area


def midpoint_bands(key: np.ndarray, weight: np.ndarray, n: int) -> np.ndarray:
    """Band (1..n) of every row: rows of one key value form a group that goes whole to the
    band holding the midpoint of its weight, bands of equal weight in ascending key order
    (the grouping the assessment documents)."""
    groups = pd.DataFrame({"k": key, "w": weight}).groupby("k", sort=True)["w"].sum()
    cum = np.cumsum(groups.to_numpy())
    mid = cum - groups.to_numpy() / 2.0
    band = np.minimum(n, np.floor(n * mid / cum[-1]) + 1).astype(int)
    return pd.Series(band, index=groups.index).reindex(key).to_numpy()


def hosmer_lemeshow(
    p: np.ndarray, y: np.ndarray, weight: np.ndarray, n: int = 10
) -> tuple[float, int]:
    """The Hosmer-Lemeshow statistic (Hosmer and Lemeshow, *Applied Logistic Regression*:
    sum over groups of (O - E)^2 / (E (1 - E / n_g))) written out directly, with the groups
    of :func:`midpoint_bands` along the predicted probability: (statistic, df = G - 2)."""
    band = midpoint_bands(p, weight, n)
    stat, groups = 0.0, 0
    for b in np.unique(band):
        m = band == b
        ng, o, e = weight[m].sum(), (weight * y)[m].sum(), (weight * p)[m].sum()
        if ng > 0 and e * (1 - e / ng) > 0:
            stat += (o - e) ** 2 / (e * (1 - e / ng))
            groups += 1
    return stat, groups - 2


def finite(values: Sequence[float]) -> list[float]:
    return [v for v in values if v is not None and math.isfinite(v)]


# -- randhie: holdout gates of a scheduled refit ------------------------------------------------


def randhie_frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    """(train, holdout) of statsmodels' randhie: even and odd rows, with a ``row_id``."""
    import statsmodels.datasets as smd

    d = smd.randhie.load_pandas().data.reset_index(drop=True)
    d = d.astype({"idp": int, "hlthg": int, "hlthp": int, "mdvis": float})
    d.insert(0, "row_id", np.arange(len(d), dtype=np.int64))
    train, hold = d[d.row_id % 2 == 0], d[d.row_id % 2 == 1]
    return train.reset_index(drop=True), hold.reset_index(drop=True)


def drifted(train: pd.DataFrame) -> pd.DataFrame:
    """The training rows after a feed lost the visits of 70% of the idp = 1 rows."""
    out = train.copy()
    out.loc[(out.idp == 1) & (out.row_id % 10 < 7), "mdvis"] = 0.0
    return out


def visits_oracle(train: pd.DataFrame, hold: pd.DataFrame, res: FitResult) -> dict[str, Any]:
    """statsmodels' Poisson GLM on ``train`` with indb's design (its coefficients checked
    against indb's): in-sample deviance per row, and on the holdout the deviance (its
    ``family.deviance``), the Gini (the Lorenz curve written out) and A/E per idp level."""
    x = design(train, res)
    fit = sm.GLM(train["mdvis"], x, family=sm.families.Poisson()).fit(**SM_FIT)
    assert_allclose(fit.params[res.terms], estimates(res), rtol=COEF_RTOL)
    xh = design(hold, res)
    mu = np.exp(xh.to_numpy() @ fit.params[xh.columns].to_numpy())
    y = hold["mdvis"].to_numpy()
    by_idp = pd.DataFrame({"idp": hold["idp"], "y": y, "mu": mu}).groupby("idp").sum()
    return {
        "per_row": fit.deviance / len(train),
        "deviance": sm.families.Poisson().deviance(y, mu),
        "gini": lorenz_gini(mu, np.ones(len(y)), y),
        "ae_idp": (by_idp["y"] / by_idp["mu"]).to_dict(),
    }
