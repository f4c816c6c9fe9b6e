"""The issue-11 reproduction shared by the scoring tests on DuckDB and on the other engines.

A table ``pol(id, age INT, region TEXT, exposure DOUBLE, claims INT)`` of 5,000 rows drawn
with a fixed seed (plus the responses of other families from the same rows), rows to score
that exercise every way a numeric input can fail, the treatment-coded design statsmodels
fits, and the documented rule for which rows get a mean. Also the special doubles (NaN,
+/-inf, +/-0, NULL) on which the ``Ieee*`` nodes are checked against numpy on every engine.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
from numpy.testing import assert_allclose, assert_array_equal
from sqlglot import exp

from indb import sqlexpr as S
from indb.results import FitResult

ROWS = 5_000
LEVELS = ("east", "north", "south")


def pol_frame(seed: int = 11) -> pd.DataFrame:
    """The reproduction's table: Poisson claims on exposure, age and region."""
    rng = np.random.default_rng(seed)
    age = rng.integers(18, 80, ROWS)
    region = rng.choice(LEVELS, ROWS)
    exposure = rng.uniform(0.05, 1.0, ROWS)
    effect = pd.Series(region).map({"east": 0.0, "north": 0.3, "south": -0.2}).to_numpy()
    rate = np.exp(-1.5 + 0.02 * (age - 45) + effect)
    claims = rng.poisson(exposure * rate)
    return pd.DataFrame(
        {
            "id": np.arange(ROWS),
            "age": age.astype(np.int32),
            "region": region,
            "exposure": exposure,
            "claims": claims.astype(np.int32),
            # other families' responses, from the same rows
            "any_claim": (claims > 0).astype(np.int32),
            "amount": rng.gamma(2.0, 500.0 / (1.0 + 0.01 * age)),
        }
    )


def scoring_rows(age_up: float, age_down: float) -> pd.DataFrame:
    """Rows to score: three ordinary ones, then every way a numeric input can fail.

    ``age_up`` / ``age_down`` are finite ages that push eta far up or down (their sign is the
    fitted age slope's)."""
    nan, inf = float("nan"), float("inf")
    rows = [
        (1, 30.0, "east", 0.5),
        (2, 55.0, "north", 1.0),
        (3, 70.0, "south", 0.25),
        (10, None, "east", 0.5),  # NULL age
        (11, nan, "east", 0.5),  # NaN age
        (12, inf, "north", 0.5),
        (13, -inf, "south", 0.5),
        (14, 40.0, "east", -1.0),  # ln(negative exposure) = NaN
        (15, 40.0, "east", 0.0),  # ln(0) = -inf
        (16, 40.0, "north", None),  # NULL exposure
        (17, 40.0, "north", nan),
        (18, 40.0, "west", 0.5),  # unseen level: the reference level's contribution
        (19, 40.0, None, 0.5),  # NULL level: likewise
        (20, None, "west", 0.5),  # unseen level and NULL age: flagged twice
        (21, age_up, "east", 0.5),  # finite, but eta far above 700 for the log link
        (22, age_down, "east", 0.5),  # eta far below 0
    ]
    # object columns keep None (NULL) apart from NaN
    return pd.DataFrame(rows, columns=["id", "age", "region", "exposure"], dtype=object)


def design(frame: pd.DataFrame, res: FitResult) -> pd.DataFrame:
    """indb's treatment-coded design; an unseen or NULL level is all zeros (the reference)."""
    cols: dict[str, Any] = {}
    for c in res.coefficients:
        if not c.columns:
            cols[c.term] = np.ones(len(frame))
        elif c.levels[0] is not None:
            cols[c.term] = (frame[c.columns[0]] == c.levels[0]).astype(float).to_numpy()
        else:
            cols[c.term] = pd.to_numeric(frame[c.columns[0]], errors="coerce").to_numpy(float)
    return pd.DataFrame(cols, index=frame.index)


def link_valid(link: str, eta: np.ndarray) -> np.ndarray:
    """The documented rule: a mean for a finite eta inside the link's range (log: eta <= 700,
    where exp still fits a double; sqrt: eta > 0; inverse: eta != 0)."""
    ok = np.isfinite(eta)
    with np.errstate(invalid="ignore"):
        if link == "log":
            ok &= eta <= 700.0
        elif link == "sqrt":
            ok &= eta > 0.0
        elif link == "inverse":
            ok &= eta != 0.0
    return ok


# -- special doubles: IEEE-754 results as numpy (and C) give them ---------------------------

NAN, INF = float("nan"), float("inf")
SPECIAL = [2.5, 1.0, -1.0, 0.0, -0.0, -1.5, -8.0, 3.0, -3.0, INF, -INF, NAN, None]


def lit(v: float | None) -> exp.Expression:
    if v is None:
        return S.cast(exp.Null(), "DOUBLE")
    if math.isnan(v):
        return S.double_const("NaN")
    if math.isinf(v):
        return S.double_const("Infinity" if v > 0 else "-Infinity")
    return S.as_double(S.num(v))


def numpy_ref(fn, *args: float | None) -> float | None:
    if any(a is None for a in args):
        return None
    with np.errstate(all="ignore"):
        return float(fn(*(np.float64(a) for a in args)))


def c_pow(a: np.float64, b: np.float64) -> np.float64:
    """pow as C11 Annex F.10.4.4 (IEEE-754) defines it: numpy's power, except that numpy
    answers NaN for a base of -inf and a non-integer exponent, where C gives +inf (b > 0)
    or +0 (b < 0)."""
    if a == -np.inf and np.isfinite(b) and b != np.floor(b):
        return np.float64(np.inf if b > 0 else 0.0)
    return np.power(a, b)


def same(got: list[object], want: list[float | None]) -> None:
    """Equal as IEEE-754 values: NaN = NaN, NULL only where None, signed infinities, finite
    values to a few ulps (C's and numpy's pow differ in the last bit)."""
    assert [g is None for g in got] == [w is None for w in want], (got, want)
    g = np.array([np.nan if v is None else v for v in got], dtype=float)
    w = np.array([np.nan if v is None else v for v in want], dtype=float)
    assert_array_equal(np.isnan(g), np.isnan(w))
    assert_array_equal(g[np.isinf(w)], w[np.isinf(w)])
    assert_allclose(g, w, rtol=1e-15, atol=0)


def ieee_cases() -> list[tuple[str, list[exp.Expression], list[float | None]]]:
    """(name, expressions over every special value, numpy's answers)."""
    xs = SPECIAL
    pairs = [(a, b) for a in SPECIAL for b in SPECIAL]
    return [
        ("ln", [S.IeeeLn(this=lit(x)) for x in xs], [numpy_ref(np.log, x) for x in xs]),
        ("log10", [S.IeeeLog10(this=lit(x)) for x in xs], [numpy_ref(np.log10, x) for x in xs]),
        ("sqrt", [S.IeeeSqrt(this=lit(x)) for x in xs], [numpy_ref(np.sqrt, x) for x in xs]),
        (
            "exp",
            [S.IeeeExp(this=lit(None if x is None else x * 400)) for x in xs],
            [numpy_ref(lambda v: np.exp(v * 400), x) for x in xs],
        ),
        (
            "pow",
            [S.IeeePow(this=lit(a), expression=lit(b)) for a, b in pairs],
            [numpy_ref(c_pow, a, b) for a, b in pairs],
        ),
        (
            "div",
            [S.IeeeDiv(this=lit(a), expression=lit(b)) for a, b in pairs],
            [numpy_ref(np.divide, a, b) for a, b in pairs],
        ),
    ]
