"""``indb explore`` on every engine: DuckDB, PostgreSQL and Spark (in-process).

The same two scans rendered per dialect (a profile with the band edges, one GROUPING SETS
scan) must give the same figures: each engine is checked against the pandas/numpy oracle of
``tests/explore_oracle.py`` (test-only; cut points by ``numpy.quantile``'s default 'linear'
method), to 1e-12 relative (only summation order differs), and the cut points to 1e-13.
Data: the invented demo book (``indb.demo_data``) with NULLs put in, and
``statsmodels.datasets.fair`` (shipped inside the statsmodels wheel).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import statsmodels.api as sm
from explore_oracle import assert_matches, one_way

import indb
from indb.demo_data import policies_table

#: the engine's name of the double type, for a NaN written in a source query
DOUBLE = {"duckdb": "DOUBLE", "postgres": "DOUBLE PRECISION", "spark-local": "DOUBLE"}


def book() -> pd.DataFrame:
    # the invented demo book (2,000 policies) with NULLs in explored columns, the response,
    # the exposure and the weight; quotes and non-ASCII letters in one level
    df = policies_table(2_000, seed=5).to_pandas()
    i = df["policy_id"].to_numpy()
    df["region"] = df["region"].astype(object).where(i % 29 != 0, None)
    df["region"] = df["region"].replace({"Eastvale": "East 'vale' \\ Ünter"})
    df["driver_age"] = df["driver_age"].astype(float).where(i % 31 != 0)
    df["exposure"] = df["exposure"].where(i % 37 != 0)
    df["claim_count"] = df["claim_count"].astype(float).where(i % 41 != 0)
    df["w"] = (1.0 + (i % 4)).astype(float)
    df.loc[i % 43 == 0, "w"] = np.nan
    df["renewed"] = df["lapsed"] == 0
    return df


def test_same_figures_on_every_engine(loader) -> None:
    df = book()
    table = loader.load("book", df)
    nan = f"CAST('NaN' AS {DOUBLE[loader.name]})"
    # a NaN in an explored numeric column (loaded NaN becomes NULL, so it is made in the query)
    source = (
        f"SELECT *, CASE WHEN policy_id % 47 = 0 THEN {nan} ELSE density END AS dens FROM {table}"
    )
    by = ["region", "vehicle_group", "vehicle_power", "driver_age", "dens"]
    found = indb.explore(
        source,
        "claim_count",
        offset="ln(exposure)",
        weight="w",
        by=by,
        categorical=["vehicle_power"],
        max_shown=5,
        bands=8,
        db=loader.engine,
    )
    dens = df["density"].to_numpy(dtype=float).copy()
    dens_nan = (df["policy_id"] % 47 == 0).to_numpy()
    dens[dens_nan] = np.nan
    # oracle: pandas groupby / numpy.quantile on the same rows (explore_oracle.py)
    want = one_way(
        df.assign(dens=dens),
        "claim_count",
        categorical=["region", "vehicle_group", "vehicle_power"],
        numeric=["driver_age", "dens"],
        offset=np.log(df["exposure"].to_numpy()),
        weight=df["w"].to_numpy(),
        bands=8,
        nulls={"dens": np.zeros(len(df), dtype=bool)},
    )
    assert_matches(found, want)
    assert [c.name for c in found.columns] == by
    bands = {lv.band for lv in found.column("dens").levels}
    assert 0 in bands and None not in bands  # NaN is a band of its own, and no row is NULL
    region = found.column("region")
    assert region.other is not None and region.levels[-1].missing
    assert "East 'vale' \\ Ünter" in {lv.level for lv in region.levels}  # shown, not summed


def test_boolean_response_and_dataset_on_every_engine(loader) -> None:
    df = book()
    loader.load("book", df)
    found = indb.explore("book", "renewed", by=["fuel", "bonus_malus"], db=loader.engine)
    want = one_way(
        df.assign(renewed=df["renewed"].astype(float)),
        "renewed",
        categorical=["fuel"],
        numeric=["bonus_malus"],
    )
    assert_matches(found, want)
    # statsmodels.datasets.fair: 1974 Redbook survey on extramarital affairs (6366 rows)
    d = sm.datasets.fair.load_pandas().data
    fair = pd.DataFrame(
        {
            "affairs": d["affairs"],
            "occupation": d["occupation"].astype("int64"),
            "yrs_married": d["yrs_married"],
        }
    )
    loader.load("fair", fair)
    found = indb.explore("fair", "affairs", categorical=["occupation"], bands=6, db=loader.engine)
    want = one_way(
        fair,
        "affairs",
        categorical=["occupation"],
        numeric=["yrs_married"],
        bands=6,
        level_text=lambda v: str(int(v)),
    )
    assert_matches(found, want)


def test_tiny_exposure_underflows_to_zero(loader) -> None:
    # exp(offset) below the smallest double is an exposure of 0 (PostgreSQL's exp raises on
    # underflow; the plan asks for IEEE's 0); by hand: exposures 1 + 0, actual 1 + 2
    frame = pd.DataFrame({"y": [1.0, 2.0], "off": [0.0, -800.0], "k": ["a", "a"]})
    loader.load("tiny", frame)
    found = indb.explore("tiny", "y", offset="off", db=loader.engine)
    level = found.column("k").levels[0]
    assert (level.rows, level.exposure, level.actual) == (2, 1.0, 3.0)
