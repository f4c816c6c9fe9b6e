"""Penalised fits (elastic net) and the lambda path.

Oracles (test-only, outside the project):
* scikit-learn ``ElasticNet(alpha=lambda, l1_ratio=a)``: the same objective as indb's for
  unweighted gaussian data, (1/(2n)) ||y - Xb||^2 + alpha [a ||b||_1 + (1-a)/2 ||b||^2], on
  the diabetes data shipped with scikit-learn (Efron et al. 2004, ``load_diabetes``).
* scikit-learn ``PoissonRegressor`` / ``GammaRegressor`` / ``TweedieRegressor(alpha=lambda)``:
  (1/(2n)) sum d + (alpha/2) ||b||^2, intercept unpenalised (ridge, a = 0), run with the
  ``newton-cholesky`` solver at tol 1e-14.
* The KKT conditions of the objective, computed with numpy from the data (a definition, not
  a program): the gradient of the smooth part plus lambda f_j (a s_j + (1-a) b_j) is 0 for
  every coefficient, s_j = sign(b_j) where b_j != 0 and any value in [-1, 1] where b_j = 0.
  Each scikit-learn answer is also checked against them, so the oracle itself is verified
  by a second route.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.linear_model import ElasticNet, GammaRegressor, PoissonRegressor, TweedieRegressor

import indb
from indb.errors import SpecError

TIGHT = {"tol": 1e-14, "max_iter": 100}


def _con(frame: pd.DataFrame, name: str = "d") -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    con.register("frame", frame)
    con.execute(f"CREATE TABLE {name} AS SELECT * FROM frame")
    return con


def _diabetes() -> tuple[np.ndarray, np.ndarray, pd.DataFrame]:
    x, y = load_diabetes(return_X_y=True)
    frame = pd.DataFrame(x, columns=[f"x{i}" for i in range(x.shape[1])])
    frame["y"] = y
    return x, y, frame


def _design(result: indb.FitResult, frame: pd.DataFrame) -> np.ndarray:
    """The fit's design matrix rebuilt with numpy from its coefficient table (main effects)."""
    cols = []
    for c in result.coefficients:
        col = np.ones(len(frame))
        # a product over the term's columns: a level's indicator or a numeric value
        for name, level in zip(c.columns, c.levels, strict=True):
            if level is not None:
                col = col * (frame[name].astype(str) == level).to_numpy(float)
            else:
                col = col * frame[name].to_numpy(float)
        cols.append(col)
    return np.column_stack(cols)


def kkt_residual(
    x: np.ndarray,
    y: np.ndarray,
    b: np.ndarray,
    lam: float,
    a: float,
    factor: np.ndarray,
    *,
    family: str,
    w: np.ndarray | None = None,
    offset: np.ndarray | None = None,
    scale: np.ndarray | None = None,
) -> float:
    """The largest violation of the KKT conditions of
    (1/(2W)) sum w d + lam sum f_j [a |b_j s_j| + (1-a)/2 (b_j s_j)^2] (canonical link; s_j
    the column's penalised scale), relative to the gradient's size."""
    w = np.ones(len(y)) if w is None else w
    s = np.ones(len(b)) if scale is None else scale
    eta = x @ b + (0.0 if offset is None else offset)
    mu = {"gaussian": eta, "poisson": np.exp(eta), "binomial": 1 / (1 + np.exp(-eta))}[family]
    # d/db (1/2) d(y, mu) = -(y - mu) x for the canonical links (McCullagh & Nelder 2.5)
    grad = -(x.T @ (w * (y - mu))) / w.sum()
    l1 = lam * a * factor * s
    l2 = lam * (1 - a) * factor * s * s
    smooth = grad + l2 * b
    nz = b != 0
    out = np.where(nz, np.abs(smooth + l1 * np.sign(b)), np.maximum(np.abs(smooth) - l1, 0))
    return float(out.max() / max(np.abs(grad).max(), np.abs(l1).max(), 1e-300))


# -- gaussian: scikit-learn's ElasticNet -------------------------------------------------


@pytest.mark.parametrize(("lam", "a"), [(0.1, 0.5), (0.02, 1.0), (0.5, 0.0), (1.0, 0.9)])
def test_gaussian_elastic_net_matches_scikit_learn(lam: float, a: float) -> None:
    x, y, frame = _diabetes()
    got = indb.fit("d", "y", "gaussian", db=_con(frame), penalty=lam, l1_share=a, **TIGHT)
    # scikit-learn ElasticNet: same objective for unweighted data (module docstring)
    ref = ElasticNet(alpha=lam, l1_ratio=a, tol=1e-15, max_iter=10**6).fit(x, y)
    want = np.r_[ref.intercept_, ref.coef_]
    xd = np.column_stack([np.ones(len(y)), x])
    factor = np.r_[0.0, np.ones(x.shape[1])]
    # the oracle verified by the KKT conditions (second route)
    assert kkt_residual(xd, y, want, lam, a, factor, family="gaussian") < 1e-9
    assert_allclose(got.estimates, want, rtol=0, atol=1e-6 * np.abs(want).max())
    assert kkt_residual(xd, y, got.estimates, lam, a, factor, family="gaussian") < 1e-8
    # item 4: no standard errors, tests or intervals for penalised estimates
    assert np.isnan(got.std_errors).all()
    assert all(np.isnan(c.p_two_sided) and np.isnan(c.lower_bound) for c in got.coefficients)
    assert got.term_tests == () and got.collinearity == () and got.covariance is None
    assert "not reported" in got.penalty["note"] and "not reported" in str(got)


def test_gaussian_elastic_net_with_prior_weights_matches_scikit_learn() -> None:
    # scikit-learn ElasticNet with sample_weight: (1/(2 sum w)) sum w (y - Xb)^2 + penalty,
    # indb's objective with prior weights w
    x, y, frame = _diabetes()
    w = np.random.default_rng(3).uniform(0.2, 3.0, len(y))
    frame["w"] = w
    lam, a = 0.05, 0.5
    got = indb.fit(
        "d", "y", db=_con(frame), weight="w", penalty=lam, l1_share=a, exclude=["w"], **TIGHT
    )
    ref = ElasticNet(alpha=lam, l1_ratio=a, tol=1e-15, max_iter=10**6).fit(x, y, sample_weight=w)
    want = np.r_[ref.intercept_, ref.coef_]
    xd = np.column_stack([np.ones(len(y)), x])
    f = np.r_[0.0, np.ones(10)]
    assert kkt_residual(xd, y, want, lam, a, f, family="gaussian", w=w) < 1e-9  # the oracle
    assert_allclose(got.estimates, want, rtol=0, atol=1e-6 * np.abs(want).max())


def test_interaction_terms_are_penalised_each_on_its_own() -> None:
    # KKT conditions with the design rebuilt in numpy: x2 x region dummies and x0 x x8
    frame = _claims_frame()
    lam, a = 0.03, 0.5
    got = indb.fit(
        "d",
        "claims",
        "poisson",
        db=_con(frame),
        offset="ln(expo)",
        predictors=["x0", "x2", "x8", "region"],
        interactions=[["x2", "region"], ["x0", "x8"]],
        penalty=lam,
        l1_share=a,
        **TIGHT,
    )
    assert any(len(c.columns) == 2 for c in got.coefficients)
    xd = _design(got, frame)
    f = np.r_[0.0, np.ones(xd.shape[1] - 1)]
    y = frame["claims"].to_numpy(float)
    off = np.log(frame["expo"].to_numpy())
    assert kkt_residual(xd, y, got.estimates, lam, a, f, family="poisson", offset=off) < 1e-7


def test_standardize_penalises_columns_of_weighted_sd_one() -> None:
    # scikit-learn ElasticNet on columns scaled to SD 1 (population SD: unit weights), its
    # coefficients divided by the SDs: the original-scale estimates of --standardize
    x, y, frame = _diabetes()
    x = x * np.array([1, 10, 100, 1, 1, 0.1, 1, 1000, 1, 1])
    frame[[f"x{i}" for i in range(10)]] = x
    lam, a = 0.3, 0.7
    got = indb.fit("d", "y", db=_con(frame), penalty=lam, l1_share=a, standardize=True, **TIGHT)
    sd = x.std(axis=0)
    ref = ElasticNet(alpha=lam, l1_ratio=a, tol=1e-15, max_iter=10**6).fit((x - x.mean(0)) / sd, y)
    want = ref.coef_ / sd
    assert_allclose(got.estimates[1:], want, rtol=0, atol=1e-6 * np.abs(want).max())


# -- ridge for Poisson, gamma, Tweedie: scikit-learn's GLM regressors -------------------------


@pytest.mark.parametrize(
    ("family", "power", "model"),
    [
        ("poisson", None, PoissonRegressor),
        ("gamma", None, GammaRegressor),
        ("tweedie", 1.5, TweedieRegressor),
    ],
)
def test_log_link_ridge_matches_scikit_learn(family, power, model) -> None:
    x, y, frame = _diabetes()
    lam = 0.01
    kw = {"power": power} if power else {}
    # scikit-learn's regressors use the log link (indb's gamma default is the inverse)
    got = indb.fit("d", "y", family, "log", db=_con(frame), penalty=lam, **kw, **TIGHT)
    # scikit-learn: (1/(2n)) sum d + (alpha/2) ||b||^2, the intercept unpenalised
    sk_kw = {"power": power, "link": "log"} if power else {}
    ref = model(alpha=lam, solver="newton-cholesky", tol=1e-14, max_iter=1000, **sk_kw).fit(x, y)
    want = np.r_[ref.intercept_, ref.coef_]
    assert_allclose(got.estimates, want, rtol=0, atol=1e-6 * np.abs(want).max())
    if family == "poisson":  # the oracle by its KKT conditions (canonical link only here)
        xd = np.column_stack([np.ones(len(y)), x])
        f = np.r_[0.0, np.ones(10)]
        assert kkt_residual(xd, y, want, lam, 0.0, f, family="poisson") < 1e-8


# -- Poisson and logistic elastic net: the KKT conditions ----------------------------------


def _claims_frame() -> pd.DataFrame:
    # the diabetes data as a rating table: a count response (y // 10), an exposure offset, a
    # frequency weight and a categorical column with a quoted level (common-practice test shape)
    x, y, frame = _diabetes()
    rng = np.random.default_rng(5)
    out = frame[["x0", "x2", "x3", "x8"]].copy()
    out["claims"] = (y // 25).astype(int)
    out["expo"] = rng.uniform(0.5, 2.0, len(y))
    out["fw"] = rng.integers(1, 4, len(y)).astype(float)
    out["region"] = np.array(["a", "b", "c'q", "d"])[rng.integers(0, 4, len(y))]
    return out


@pytest.mark.parametrize("compress", ["never", "always"])
def test_poisson_elastic_net_satisfies_kkt_with_offset_weights_levels(compress: str) -> None:
    frame = _claims_frame()
    lam, a = 0.05, 0.6
    factors = {"x3": 0.0, "x8": 2.0}
    got = indb.fit(
        "d",
        "claims",
        "poisson",
        db=_con(frame),
        offset="ln(expo)",
        frequency_weight="fw",
        predictors=["x0", "x2", "x3", "x8", "region"],
        penalty=lam,
        l1_share=a,
        penalty_for=factors,
        compress=compress,
        **TIGHT,
    )
    assert got.path.startswith("compressed") == (compress == "always")
    xd = _design(got, frame)
    f = np.array(
        [0.0 if c.term == "intercept" else factors.get(c.columns[0], 1.0) for c in got.coefficients]
    )
    res = kkt_residual(
        xd,
        frame["claims"].to_numpy(float),
        got.estimates,
        lam,
        a,
        f,
        family="poisson",
        w=frame["fw"].to_numpy(),
        offset=np.log(frame["expo"].to_numpy()),
    )
    assert res < 1e-7
    assert got.coef("x3").estimate != 0.0  # unpenalised
    assert (got.estimates == 0).any()  # the lasso part set some to 0 (else the test is weak)


def test_logistic_elastic_net_satisfies_kkt() -> None:
    data = load_breast_cancer()
    x = data.data[:, :8] / data.data[:, :8].std(0)
    frame = pd.DataFrame(x, columns=[f"c{i}" for i in range(8)])
    frame["y"] = data.target.astype(float)
    lam, a = 0.02, 0.5
    got = indb.fit("d", "y", "binomial", db=_con(frame), penalty=lam, l1_share=a, **TIGHT)
    xd = np.column_stack([np.ones(len(frame)), x])
    f = np.r_[0.0, np.ones(8)]
    res = kkt_residual(xd, frame["y"].to_numpy(), got.estimates, lam, a, f, family="binomial")
    assert res < 1e-7
    assert (got.estimates[1:] == 0).any() and (got.estimates[1:] != 0).any()


# -- the path and lambda_max ------------------------------------------------------------------


def test_path_starts_at_lambda_max_and_matches_single_fits() -> None:
    x, y, frame = _diabetes()
    con = _con(frame)
    got = indb.fit("d", "y", db=con, path=6, path_ratio=0.01, l1_share=1.0, **TIGHT)
    path = got.penalty_path
    assert len(path) == 6 and got.penalty["lambda_max"] == path[0]["penalty"]
    lam_max = path[0]["penalty"]
    # lambda_max of the lasso for gaussian data: max |x_j'(y - ybar)| / n (the KKT
    # condition at b = 0; Friedman, Hastie & Tibshirani 2010, section 2.5)
    assert_allclose(lam_max, np.abs((x - x.mean(0)).T @ (y - y.mean())).max() / len(y), rtol=1e-9)
    assert path[0]["nonzero"] == 0 and path[-1]["nonzero"] > 0
    assert [r["penalty"] for r in path] == sorted((r["penalty"] for r in path), reverse=True)
    assert_allclose(path[-1]["penalty"] / lam_max, 0.01, rtol=1e-12)
    # at lambda_max every penalised coefficient is 0; just below it one is not
    at = indb.fit("d", "y", db=con, penalty=lam_max, l1_share=1.0, **TIGHT)
    below = indb.fit("d", "y", db=con, penalty=lam_max * 0.999, l1_share=1.0, **TIGHT)
    assert (at.estimates[1:] == 0).all() and (below.estimates[1:] != 0).sum() >= 1
    # each warm-started step equals a fit from scratch at its lambda
    mid = path[3]
    alone = indb.fit("d", "y", db=con, penalty=mid["penalty"], l1_share=1.0, **TIGHT)
    assert_allclose(
        list(mid["coefficients"].values()),
        alone.estimates,
        atol=1e-7 * np.abs(alone.estimates).max(),
    )
    assert_allclose(got.estimates, list(path[-1]["coefficients"].values()), rtol=1e-12)
    # JSON
    d = got.to_dict()
    assert set(d["penalty_path"][0]) == {"penalty", "deviance", "nonzero", "coefficients"}


def test_poisson_path_costs_few_scans_per_lambda() -> None:
    frame = _claims_frame()
    got = indb.fit(
        "d", "claims", "poisson", db=_con(frame), offset="ln(expo)", path=10, l1_share=0.5
    )
    fit_scans = sum(r.phase == "fit" for r in got.iteration_log)
    # the held-at-0 fit plus about two per lambda, each warm-started from the last scan
    # (measured: 22 scans here; 2 for every lambda but the last on 10^6 benchmark rows)
    assert fit_scans <= 8 + 2.5 * 9
    assert got.penalty_path[0]["nonzero"] == 0


def test_path_deviance_is_the_deviance_at_its_coefficients() -> None:
    # each path entry's deviance against statsmodels' Poisson family deviance (frequency
    # weights) at the entry's own coefficients: a lambda before the last may stop with its
    # solved step added to the scanned coefficients, whose deviance it then reports
    frame = _claims_frame()
    cols = ["x0", "x2", "x3", "x8"]
    kw = {"offset": "ln(expo)", "frequency_weight": "fw", "l1_share": 0.5, "predictors": cols}
    got = indb.fit("d", "claims", "poisson", db=_con(frame), path=8, **kw)
    x, off = frame[cols].to_numpy(float), np.log(frame["expo"].to_numpy())
    y, fw = frame["claims"].to_numpy(float), frame["fw"].to_numpy()
    for row in got.penalty_path:
        b = np.array(list(row["coefficients"].values()))
        want = sm.families.Poisson().deviance(y, np.exp(b[0] + x @ b[1:] + off), freq_weights=fw)
        assert_allclose(row["deviance"], want, rtol=1e-10)


# -- bad input -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kw", "words"),
    [
        ({"penalty": -0.1}, "penalty must be a number >= 0"),
        ({"penalty": 0.1, "l1_share": 1.5}, "l1_share must be in [0, 1]"),
        ({"penalty": 0.1, "l1_share": -0.1}, "l1_share must be in [0, 1]"),
        ({"path": 5, "path_ratio": 2.0}, "path_ratio must be in (0, 1)"),
        ({"penalty": 0.1, "path": 5}, "not both"),
        ({"penalty": 0.1, "penalty_for": {"x1": -1.0}}, "penalty_for 'x1' must be"),
        ({"penalty": 0.1, "penalty_for": {"nosuch": 0.0}}, "penalty_for names 'nosuch'"),
    ],
)
def test_bad_penalty_input_is_refused(kw, words) -> None:
    _, _, frame = _diabetes()
    with pytest.raises(SpecError) as err:
        indb.fit("d", "y", db=_con(frame), **kw)
    assert words in str(err.value)


# -- command line, spec file, registry ----------------------------------------------------


def _diabetes_parquet(tmp_path) -> str:
    _, _, frame = _diabetes()
    path = tmp_path / "diabetes.parquet"
    frame.to_parquet(path)
    return str(path)


def _cli(*args: str):
    from click.testing import CliRunner

    from indb.cli import main

    return CliRunner().invoke(main, list(args))


def test_cli_penalty_options_and_path_json(tmp_path) -> None:
    import json

    x, y, _ = _diabetes()
    src = _diabetes_parquet(tmp_path)
    out = _cli(
        "fit",
        src,
        "--response",
        "y",
        "--family",
        "gaussian",
        "--penalty",
        "0.1",
        "--l1-share",
        "0.5",
        "--penalty-for",
        "x0=0",
        "--tol",
        "1e-14",
        "--json",
    )
    assert out.exit_code == 0, out.stderr
    got = json.loads(out.stdout)
    est = np.array([c["estimate"] for c in got["coefficients"]])
    xd = np.column_stack([np.ones(len(y)), x])
    f = np.r_[0.0, 0.0, np.ones(9)]  # x0 unpenalised
    # the KKT conditions of the objective (module docstring)
    assert kkt_residual(xd, y, est, 0.1, 0.5, f, family="gaussian") < 1e-8
    assert all(c["std_error"] is None for c in got["coefficients"])
    assert got["spec"]["penalty"] == 0.1 and got["spec"]["penalty_for"] == {"x0": 0.0}
    path = _cli(
        "fit",
        src,
        "--response",
        "y",
        "--family",
        "gaussian",
        "--path",
        "4",
        "--l1-share",
        "1",
        "--json",
    )
    assert path.exit_code == 0, path.stderr
    rows = json.loads(path.stdout)["penalty_path"]
    assert [r["nonzero"] for r in rows][0] == 0 and len(rows) == 4
    text = _cli("fit", src, "--response", "y", "--family", "gaussian", "--penalty", "0.1", "-q")
    assert "PENALTY" in text.stdout and "not reported" in text.stdout


@pytest.mark.parametrize(
    ("args", "words"),
    [
        (["--penalty", "-1"], "penalty must be a number >= 0"),
        (["--penalty", "1", "--l1-share", "2"], "l1_share must be in [0, 1]"),
        (["--penalty", "1", "--penalty-for", "zz=0"], "penalty_for names 'zz'"),
        (["--penalty", "1", "--penalty-for", "x1=much"], "--penalty-for expects COLUMN=NUMBER"),
    ],
)
def test_cli_bad_penalty_input_is_one_line_exit_2(tmp_path, args, words) -> None:
    src = _diabetes_parquet(tmp_path)
    out = _cli("fit", src, "--response", "y", "--family", "gaussian", *args)
    assert out.exit_code == 2, (out.stdout, out.stderr)
    lines = [ln for ln in out.stderr.splitlines() if ln.startswith("indb: error:")]
    assert len(lines) == 1 and words in lines[0] and "Traceback" not in out.stderr


def test_spec_file_and_registry_record_the_penalty(tmp_path) -> None:
    import json

    src = _diabetes_parquet(tmp_path)
    db = tmp_path / "m.duckdb"
    spec = tmp_path / "m.toml"
    spec.write_text(
        f'[model]\nsource = "{src}"\nresponse = "y"\nfamily = "gaussian"\npenalty = 0.2\n'
        "l1_share = 0.5\npenalty_for = {{ x1 = 0.0 }}\n".replace("{{", "{").replace("}}", "}")
        + f'[deploy]\nname = "pen"\n[engine]\ndb = "{db}"\n'
    )
    out = _cli("run", "--json", str(spec))
    assert out.exit_code == 0, out.stderr
    stored = indb.api.registry(str(db), read_only=True)
    try:
        loaded = stored.load("pen", 1)
    finally:
        stored.engine.close()
    assert loaded.spec["penalty"] == 0.2 and loaded.spec["l1_share"] == 0.5
    assert loaded.penalty["penalty"] == 0.2 and np.isnan(loaded.std_errors).all()
    direct = indb.fit(src, "y", penalty=0.2, l1_share=0.5, penalty_for={"x1": 0.0})
    assert_allclose(loaded.estimates, direct.estimates, rtol=1e-10)
    assert json.loads(out.stdout)["penalty"]["l1_share"] == 0.5


def test_standardize_with_weights_satisfies_kkt_on_the_weighted_sd_scale() -> None:
    # the KKT conditions with each column's penalty on b_j x sd_j, sd_j its standard
    # deviation weighted by the frequency weights (the definition of --standardize)
    frame = _claims_frame()
    lam, a = 0.02, 0.5
    got = indb.fit(
        "d",
        "claims",
        "poisson",
        db=_con(frame),
        offset="ln(expo)",
        frequency_weight="fw",
        predictors=["x0", "x2", "x3", "x8"],
        penalty=lam,
        l1_share=a,
        standardize=True,
        **TIGHT,
    )
    w = frame["fw"].to_numpy()
    xs = frame[["x0", "x2", "x3", "x8"]].to_numpy()
    mean = w @ xs / w.sum()
    sd = np.sqrt(w @ (xs - mean) ** 2 / w.sum())
    xd = np.column_stack([np.ones(len(frame)), xs])
    res = kkt_residual(
        xd,
        frame["claims"].to_numpy(float),
        got.estimates,
        lam,
        a,
        np.r_[0.0, np.ones(4)],
        family="poisson",
        w=w,
        offset=np.log(frame["expo"].to_numpy()),
        scale=np.r_[1.0, sd],
    )
    assert res < 1e-7


def test_deploying_a_penalised_fit_with_intervals_is_refused(tmp_path) -> None:
    _, _, frame = _diabetes()
    src = tmp_path / "d.parquet"
    frame.to_parquet(src)
    with pytest.raises(SpecError, match="reports none"):
        indb.fit(
            str(src), "y", db=str(tmp_path / "m.duckdb"), penalty=0.1, name="m", intervals=True
        )
    with duckdb.connect(str(tmp_path / "m.duckdb")) as con:  # nothing written
        assert con.execute("SELECT count(*) FROM information_schema.tables").fetchone() == (0,)


def test_path_from_a_sample_start_holds_the_first_fit_at_zero() -> None:
    # a sample start (an unpenalised fit on a sample) must not leak into the held-at-0 fit:
    # the same path as without it (regression: at 10^7 rows lambda_max had 54 non-zero)
    frame = _claims_frame()
    kw = {"offset": "ln(expo)", "path": 5, "l1_share": 0.5, "tol": 1e-12}
    con = _con(frame)
    sampled = indb.fit("d", "claims", "poisson", db=con, sample_start="always", **kw)
    plain = indb.fit("d", "claims", "poisson", db=con, sample_start="never", **kw)
    assert sampled.penalty_path[0]["nonzero"] == 0
    assert any(r.phase == "sample" for r in sampled.iteration_log)
    for a, b in zip(sampled.penalty_path, plain.penalty_path, strict=True):
        assert_allclose(a["penalty"], b["penalty"], rtol=1e-8)
        assert_allclose(
            list(a["coefficients"].values()), list(b["coefficients"].values()), atol=1e-7
        )


def test_standardize_without_intercept_scales_about_zero() -> None:
    # scikit-learn ElasticNet(fit_intercept=False) on columns divided by their root mean
    # square (the spread about 0 a model without intercept measures), coefficients divided back
    x, y, frame = _diabetes()
    x = x + 0.05  # not centred
    frame[[f"x{i}" for i in range(10)]] = x
    lam, a = 0.2, 0.5
    got = indb.fit(
        "d",
        "y",
        db=_con(frame),
        intercept=False,
        penalty=lam,
        l1_share=a,
        standardize=True,
        **TIGHT,
    )
    rms = np.sqrt((x * x).mean(0))
    ref = ElasticNet(alpha=lam, l1_ratio=a, fit_intercept=False, tol=1e-15, max_iter=10**6)
    want = ref.fit(x / rms, y).coef_ / rms
    assert_allclose(got.estimates, want, rtol=0, atol=1e-6 * np.abs(want).max())


@pytest.mark.parametrize("a", [0.0, 1.0])
def test_penalty_follows_the_internal_rescaling_of_response_and_weights(a: float) -> None:
    # The objective's own invariances (algebra, not a program): with y -> s y (s = 2^40)
    # for ridge b(s y) = s b(y)
    # at the same lambda; for the lasso b(s y, s lambda) = s b(y, lambda). Prior weights times
    # 2^30 change nothing (W divides them out). The fit rescales such responses and weights
    # internally (DEVELOPERS.md, Magnitudes), and the penalty must follow.
    x, y, frame = _diabetes()
    s = 2.0**40
    frame["w"] = np.random.default_rng(4).uniform(0.5, 2.0, len(y))
    big = frame.assign(y=frame["y"] * s, w=frame["w"] * 2.0**30)
    lam = 0.05
    kw = {"weight": "w", "exclude": ["w"], "l1_share": a, **TIGHT}
    base = indb.fit("d", "y", db=_con(frame), penalty=lam, **kw)
    scaled = indb.fit("d", "y", db=_con(big), penalty=lam * (s if a > 0 else 1.0), **kw)
    assert_allclose(scaled.estimates / s, base.estimates, rtol=1e-8, atol=1e-9)
