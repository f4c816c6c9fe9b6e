"""Invented benchmark data and the four benchmark models.

The table is made up for this benchmark (deterministic seed): ten numeric predictors
``x1..x10``, two categorical predictors ``c6`` (6 levels) and ``c40`` (40 levels), an
exposure in (0.05, 1], a Poisson claim count whose mean is ``exposure * exp(eta)`` and a
0/1 flag drawn from a logistic model. With an intercept the full design has
1 + 10 + 5 + 39 = 55 columns.

Rows are generated and written one chunk at a time (memory stays flat), each chunk from
its own seed ``(seed, chunk index)``, so a given size and seed always give the same file.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

SEED = 20_260_401
CHUNK_ROWS = 1_000_000
# several row groups per chunk: DuckDB reads a Parquet file in parallel by row group
ROW_GROUP_ROWS = 125_000
NUMERIC = tuple(f"x{i}" for i in range(1, 11))
C6_LEVELS = tuple(f"k{i}" for i in range(1, 7))
C40_LEVELS = tuple(f"r{i:02d}" for i in range(1, 41))
# unequal level frequencies, so the most frequent level (indb's default reference) is clear
C6_PROB = np.array([0.30, 0.24, 0.18, 0.13, 0.10, 0.05])
C40_PROB = (1.0 / (np.arange(40) + 4.0)) / (1.0 / (np.arange(40) + 4.0)).sum()

# true effects of the invented data (numeric effects per unit of each x)
B_COUNT = np.array([0.20, -0.35, 0.012, 0.10, -0.15, 0.25, 0.06, 0.05, 0.30, -0.04])
B_FLAG = np.array([-0.30, 0.50, -0.010, 0.20, 0.10, -0.40, 0.08, -0.06, -0.25, 0.07])
C6_COUNT = np.array([0.0, 0.10, 0.25, -0.15, 0.35, 0.50])
C6_FLAG = np.array([0.0, -0.20, 0.30, 0.15, -0.40, 0.60])
C40_COUNT = np.linspace(-0.4, 0.4, 40)
C40_FLAG = np.sin(np.arange(40)) * 0.3

SCHEMA = pa.schema(
    [
        *(pa.field(x, pa.float64()) for x in NUMERIC),
        pa.field("c6", pa.string()),
        pa.field("c40", pa.string()),
        pa.field("exposure", pa.float64()),
        pa.field("claims", pa.int64()),
        pa.field("flag", pa.int64()),
    ]
)


@dataclass(frozen=True)
class Model:
    """One benchmark model: which columns, family and offset.

    ``compresses`` says whether every predictor is categorical, so the design has few
    distinct rows (for the Poisson log link with a log-exposure offset the per-cell sums
    of claims and exposure are sufficient, so such a fit could run on the cells alone).
    """

    key: str
    label: str
    response: str
    family: str
    predictors: tuple[str, ...]
    offset: str | None
    compresses: bool = False

    @property
    def numerics(self) -> tuple[str, ...]:
        return tuple(c for c in self.predictors if c in NUMERIC)

    @property
    def factors(self) -> tuple[str, ...]:
        return tuple(c for c in self.predictors if c not in NUMERIC)

    @property
    def columns(self) -> tuple[str, ...]:
        """Every column the model reads (predictors, response, exposure)."""
        extra = ("exposure",) if self.offset else ()
        return (*self.predictors, self.response, *extra)

    @property
    def p(self) -> int:
        levels = {"c6": len(C6_LEVELS), "c40": len(C40_LEVELS)}
        return 1 + len(self.numerics) + sum(levels[c] - 1 for c in self.factors)


MODELS: tuple[Model, ...] = (
    Model(
        "poisson",
        "Poisson + offset, 10 num + 2 cat (p=55)",
        "claims",
        "poisson",
        (*NUMERIC, "c6", "c40"),
        "ln(exposure)",
    ),
    Model(
        "logistic",
        "logistic, 10 num + 2 cat (p=55)",
        "flag",
        "binomial",
        (*NUMERIC, "c6", "c40"),
        None,
    ),
    Model(
        "poisson_num",
        "Poisson + offset, 10 num only (p=11)",
        "claims",
        "poisson",
        NUMERIC,
        "ln(exposure)",
    ),
    Model(
        "poisson_cat",
        "Poisson + offset, 2 cat only (p=45, 240 cells)",
        "claims",
        "poisson",
        ("c6", "c40"),
        "ln(exposure)",
        compresses=True,
    ),
)


def _chunk(rows: int, seed: int, index: int) -> pa.Table:
    rng = np.random.default_rng([seed, index])
    z = rng.standard_normal((rows, 3))
    x = np.empty((rows, 10))
    x[:, 0] = z[:, 0]
    x[:, 1] = rng.uniform(0.0, 1.0, rows)
    x[:, 2] = np.round(rng.normal(45.0, 12.0, rows), 1)
    x[:, 3] = rng.exponential(1.0, rows)
    x[:, 4] = 0.6 * z[:, 0] + 0.8 * z[:, 1]  # correlated with x1
    x[:, 5] = rng.uniform(-1.0, 1.0, rows)
    x[:, 6] = rng.gamma(2.0, 1.0, rows)
    x[:, 7] = 2.0 * z[:, 2]
    x[:, 8] = (rng.uniform(size=rows) < 0.3).astype(float)
    x[:, 9] = rng.poisson(3.0, rows).astype(float)
    i6 = rng.choice(len(C6_LEVELS), size=rows, p=C6_PROB)
    i40 = rng.choice(len(C40_LEVELS), size=rows, p=C40_PROB)
    exposure = rng.uniform(0.05, 1.0, rows)
    xc = x - x.mean(axis=0)  # keep the intercepts moderate whatever the scale of each x
    eta_c = -1.9 + xc @ B_COUNT + C6_COUNT[i6] + C40_COUNT[i40]
    claims = rng.poisson(exposure * np.exp(eta_c))
    eta_f = -0.8 + xc @ B_FLAG + C6_FLAG[i6] + C40_FLAG[i40]
    flag = (rng.uniform(size=rows) < 1.0 / (1.0 + np.exp(-eta_f))).astype(np.int64)
    arrays = [pa.array(x[:, j]) for j in range(10)]
    arrays += [
        pa.array(np.asarray(C6_LEVELS, dtype=object)[i6], pa.string()),
        pa.array(np.asarray(C40_LEVELS, dtype=object)[i40], pa.string()),
        pa.array(exposure),
        pa.array(claims.astype(np.int64)),
        pa.array(flag),
    ]
    return pa.Table.from_arrays(arrays, schema=SCHEMA)


def data_path(folder: str, rows: int) -> str:
    return os.path.join(folder, f"bench_{rows}_{SEED}.parquet")


def ensure_data(folder: str, rows: int) -> tuple[str, bool]:
    """Write the table of ``rows`` rows under ``folder`` unless it is cached there.

    Returns the path and whether it was written now. The file is written under a
    temporary name and renamed when complete, so an interrupted run leaves no partial file.
    """
    path = data_path(folder, rows)
    if os.path.exists(path):
        return path, False
    os.makedirs(folder, exist_ok=True)
    partial = path + ".partial"
    try:
        with pq.ParquetWriter(partial, SCHEMA, compression="snappy") as writer:
            done, index = 0, 0
            while done < rows:
                k = min(CHUNK_ROWS, rows - done)
                writer.write_table(_chunk(k, SEED, index), row_group_size=ROW_GROUP_ROWS)
                done += k
                index += 1
        os.replace(partial, path)
    finally:
        if os.path.exists(partial):
            os.remove(partial)
    return path, True
