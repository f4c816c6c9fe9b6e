"""The table of issue 11's reproductions and its oracle (shared by the DuckDB, PostgreSQL
and Spark tests of where scoring views read from and live).

``pol(id, age INT, region TEXT, exposure DOUBLE, claims INT)``: 5,000 rows drawn from a seeded
Poisson model with exposure (invented, as in the issue). Oracle: statsmodels GLM (test-only),
Poisson with offset ln(exposure); its predicted means do not depend on how the region dummies
are coded, so they compare with indb's whatever its reference level.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import statsmodels.api as sm

ROWS = 5_000


def pol_frame(rows: int = ROWS, seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    age = rng.integers(18, 80, rows).astype(np.int32)
    region = rng.choice(["north", "south", "east", "west"], rows)
    exposure = rng.uniform(0.1, 1.0, rows)
    effect = pd.Series(region).map({"north": 0.0, "south": 0.3, "east": -0.2, "west": 0.1})
    mu = exposure * np.exp(-1.5 + 0.01 * age + effect.to_numpy())
    return pd.DataFrame(
        {
            "id": np.arange(rows, dtype=np.int64),
            "age": age,
            "region": region,
            "exposure": exposure,
            "claims": rng.poisson(mu).astype(np.int32),
        }
    )


def oracle_means(frame: pd.DataFrame, predictors: list[str]) -> np.ndarray:
    """statsmodels Poisson GLM of claims on ``predictors`` with offset ln(exposure)."""
    x = pd.DataFrame({"const": np.ones(len(frame))}, index=frame.index)
    for p in predictors:
        if frame[p].dtype == object or str(frame[p].dtype).startswith(("str", "string")):
            dummies = pd.get_dummies(frame[p], prefix=p, drop_first=True, dtype=float)
            x = x.join(dummies)
        else:
            x[p] = frame[p].astype(float)
    offset = np.log(frame["exposure"].to_numpy())
    fit = sm.GLM(frame["claims"].astype(float), x, family=sm.families.Poisson(), offset=offset)
    return np.asarray(fit.fit(tol=1e-13).predict(x, offset=offset))
