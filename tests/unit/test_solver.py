"""Unit tests for the numpy/scipy step of a fit: the normal equations (indb.normal_eq) and
the inference and theta helpers of indb.solver, on small matrices built here.

Oracles: numpy.linalg (solve, inv, cond, lstsq) and scipy.stats / scipy.optimize, each
checked on its own before use (a residual, or a derivative at the optimum), as named beside
each test.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize, sparse, stats

from indb import normal_eq, solver


def _gram(x: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
    w = np.ones(len(x)) if w is None else w
    return x.T @ (x * w[:, None])


def _design_with_levels(rng: np.random.Generator, n: int, levels: int) -> np.ndarray:
    """Intercept, two numeric columns, then the indicators of a factor's non-reference levels
    (a diagonal block of X'WX: no row has two levels), then one more numeric column."""
    level = rng.integers(0, levels + 1, size=n)
    ind = (level[:, None] == np.arange(1, levels + 1)[None, :]).astype(float)
    num = rng.normal(size=(n, 3))
    return np.column_stack([np.ones(n), num[:, :2], ind, num[:, 2]])


@pytest.mark.parametrize("levels", [1, 7, 60])
def test_solve_matches_numpy_on_a_design_with_a_diagonal_block(levels: int) -> None:
    rng = np.random.default_rng(levels)
    x = _design_with_levels(rng, 2_000, levels)
    w = rng.uniform(0.2, 3.0, size=len(x))
    z = rng.normal(size=len(x))
    a, g = _gram(x, w), x.T @ (w * z)
    # oracle: numpy's dense solve; its own residual checked first (a tighter tolerance)
    want = np.linalg.solve(a, g)
    assert np.linalg.norm(a @ want - g) <= 1e-10 * np.linalg.norm(g)
    sol = normal_eq.solve(sparse.csr_array(a), g)
    assert not sol.aliased.any()
    assert_allclose(sol.beta, want, rtol=1e-9, atol=1e-12)
    # the run eliminated by its Schur complement is the factor's indicators (a single
    # column is no run: it goes with the dense rest)
    s, e = normal_eq.diagonal_run(normal_eq.as_sparse(a))
    assert (s, e) == ((3, 3 + levels) if levels > 1 else (0, 0))


def test_inverse_pieces_match_numpy_inverse() -> None:
    rng = np.random.default_rng(3)
    x = _design_with_levels(rng, 3_000, 25)
    a = _gram(x, rng.uniform(0.5, 2.0, size=len(x)))
    inv = normal_eq.solve(sparse.csr_array(a), np.ones(a.shape[0])).inv_info
    # oracle: numpy's inverse, checked by A @ inv(A) = I to 1e-10
    want = np.linalg.inv(a)
    assert np.abs(a @ want - np.eye(len(a))).max() < 1e-10
    assert_allclose(inv.diagonal(), np.diag(want), rtol=1e-9)
    assert_allclose(inv.dense(), want, rtol=1e-8, atol=1e-14)
    idx = np.array([0, 2, 5, 20, len(a) - 1])
    assert_allclose(inv.block(idx), want[np.ix_(idx, idx)], rtol=1e-8, atol=1e-14)


def test_aliased_columns_are_set_aside_in_design_order() -> None:
    rng = np.random.default_rng(4)
    x = _design_with_levels(rng, 1_500, 5)
    # a copy of column 1 scaled, and a sum of the last level and a numeric column: both are
    # combinations of earlier columns, so they (not the earlier ones) are set aside
    x = np.column_stack([x, 3.0 * x[:, 1], x[:, 7] + x[:, 8]])
    y = rng.normal(size=len(x))
    a, g = _gram(x), x.T @ y
    sol = normal_eq.solve(sparse.csr_array(a), g)
    assert np.flatnonzero(sol.aliased).tolist() == [x.shape[1] - 2, x.shape[1] - 1]
    assert (sol.beta[sol.aliased] == 0).all()
    # oracle: least squares on the kept columns (numpy lstsq; its normal-equation residual
    # checked), the same fit as dropping the aliased columns by hand
    kept = ~sol.aliased
    want, *_ = np.linalg.lstsq(x[:, kept], y, rcond=None)
    assert np.linalg.norm(x[:, kept].T @ (y - x[:, kept] @ want)) < 1e-8
    assert_allclose(sol.beta[kept], want, rtol=1e-8, atol=1e-12)
    # the inverse is zero on aliased rows and columns
    assert (sol.inv_info.diagonal()[sol.aliased] == 0).all()


def test_condition_number_matches_numpy_on_the_correlation_scaled_matrix() -> None:
    rng = np.random.default_rng(5)
    x = _design_with_levels(rng, 1_000, 10)
    x[:, 2] = x[:, 1] + 0.01 * rng.normal(size=len(x))  # near-collinear pair
    a = _gram(x)
    sol = normal_eq.solve(sparse.csr_array(a), np.zeros(len(a)))
    d = np.sqrt(np.diag(a))
    # oracle: numpy's 2-norm condition number of D^-1/2 A D^-1/2 (symmetric positive definite)
    want = np.linalg.cond(a / np.outer(d, d))
    assert_allclose(normal_eq.condition_number(a, sol), want, rtol=1e-8)
    assert want > 1e3  # the near-collinear pair shows


@pytest.mark.parametrize("df", [None, 7.0])
def test_wald_statistics_follow_scipy_distributions(df: float | None) -> None:
    beta = np.array([0.5, -1.2, 0.0, 3.0])
    var = np.array([0.04, 0.25, 1.0, 1.0])
    aliased = np.array([False, False, False, True])
    cov = np.diag(var)
    inf = solver.wald(beta, var, aliased, df, 0.95, cov)
    se = np.sqrt(var[:3])
    stat = beta[:3] / se
    # oracle: scipy.stats norm / t (two-sided p-values, central intervals)
    dist = stats.norm if df is None else stats.t(df)
    assert_allclose(inf.std_error[:3], se)
    assert_allclose(inf.wald[:3], stat)
    assert_allclose(inf.p_two_sided[:3], 2 * dist.sf(np.abs(stat)))
    q = dist.ppf(0.975)
    assert_allclose(inf.lower_bound[:3], beta[:3] - q * se)
    assert_allclose(inf.upper_bound[:3], beta[:3] + q * se)
    # an aliased coefficient has no estimate, no standard error, and NaN covariance entries
    assert math.isnan(inf.estimate[3]) and math.isnan(inf.std_error[3])
    assert np.isnan(inf.covariance[3]).all() and np.isnan(inf.covariance[:, 3]).all()
    assert inf.covariance[0, 0] == var[0]


def test_step_in_se_and_relative_change() -> None:
    a = np.diag([4.0, 1.0, 0.25])
    sol = normal_eq.solve(sparse.csr_array(a), np.zeros(3))
    # variances phi / diag = 2 * (0.25, 1, 4): standard errors sqrt(0.5), sqrt(2), sqrt(8)
    old, new = np.zeros(3), np.array([1.0, 1.0, 1.0])
    assert_allclose(solver.step_in_se(old, new, sol.inv_info, 2.0), 1 / math.sqrt(0.5))
    # the deviance convergence measure |new - old| / (|new| + 0.1)
    assert solver.relative_change(10.0, 11.0) == pytest.approx(1.0 / 10.1)
    assert solver.relative_change(0.0, 0.0) == 0.0


def _nb_sums(y: np.ndarray, mu: np.ndarray, theta: float) -> tuple[float, float]:
    """The theta scan's sums a and b (indb.plan.irls_scan.theta_query's definitions) in numpy."""
    tm = theta + mu
    a = float(np.sum(np.log(tm) + (y + theta) / tm))
    b = float(np.sum(1.0 / tm + (mu - y) / tm**2))
    return a, b


def test_theta_steps_converge_to_scipys_maximum_likelihood() -> None:
    rng = np.random.default_rng(6)
    n = 4_000
    mu = np.exp(rng.normal(0.5, 0.6, size=n))
    true_theta = 2.5
    y = rng.negative_binomial(true_theta, true_theta / (true_theta + mu)).astype(float)
    hy, hc = np.unique(y, return_counts=True)
    hc = hc.astype(float)
    theta = 1.0
    for _ in range(60):
        a, b = _nb_sums(y, mu, theta)
        new = solver.theta_step(theta, hy, hc, float(n), a, b)
        done = abs(new - theta) < 1e-12 * theta
        theta = new
        if done:
            break

    def nll(log_t: float) -> float:
        t = math.exp(log_t)
        return -float(stats.nbinom.logpmf(y, t, t / (t + mu)).sum())

    # oracle: scipy's bounded scalar minimiser on the negative binomial log-likelihood in
    # log theta, checked by a central-difference derivative that is ~0 at its optimum
    opt = optimize.minimize_scalar(nll, bounds=(-5, 8), method="bounded", options={"xatol": 1e-10})
    h = 1e-5
    assert abs(nll(opt.x + h) - nll(opt.x - h)) / (2 * h) < 1e-2
    assert theta == pytest.approx(math.exp(opt.x), rel=1e-5)
    assert theta == pytest.approx(true_theta, rel=0.2)  # and near the simulated value


# -- the tail of a linearly converging fit (solver.tail_factor) --------------------------------


def _info(p: int) -> solver.InverseInfo:
    """(X'WX)^-1 of a well-conditioned random design (its diagonal scales the steps)."""
    x = np.random.default_rng(3).normal(size=(50, p))
    return solver.solve(sparse.csr_array(_gram(x)), np.zeros(p)).inv_info


def test_tail_factor_sums_a_geometric_tail() -> None:
    # steps r^k v: after the step r^k v the steps left add up to r^(k+1) v / (1 - r)
    # (a geometric series, exact), so the factor 1 / (1 - r) lands on the limit
    v = np.array([0.3, -1.2, 0.7])
    for r in (0.5, 0.2, -0.4, 0.9):
        prev, step = r**5 * v, r**6 * v
        factor = solver.tail_factor(step, prev, _info(3))
        limit = sum(r**k * v for k in range(6, 400))
        assert_allclose(factor * step, limit, rtol=1e-12)


def test_tail_factor_takes_the_step_alone_when_the_rate_is_unclear() -> None:
    info = _info(3)
    step = np.array([1e-5, 2e-5, -1e-5])
    assert solver.tail_factor(step, None, info) == 1.0  # no earlier step
    # steps along different lines (not the tail of one linear iteration)
    assert solver.tail_factor(step, np.array([2e-5, -1e-5, 3e-5]), info) == 1.0
    # a rate above 0.9 (or growing steps): the extrapolation would be far from one step
    assert solver.tail_factor(step, step / 0.95, info) == 1.0
    assert solver.tail_factor(step, step / 2.0, info) == 1.0
    # Newton's quadratic convergence: the rate is ~0, the factor ~1
    assert_allclose(solver.tail_factor(step, step * 1e6, info), 1.0, rtol=1e-5)
