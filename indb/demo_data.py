"""Invented demo data: the motor book of *Quillmere Mutual*, a fictional insurer.

Everything in this module is made up for demonstrations and benchmarks. Quillmere Mutual,
its regions, its vehicle groups and every number below are **invented**; they are chosen to
look plausible for a motor portfolio, not taken from any real insurer or published study.
No real person or policy is described.

One row is one policy-year (or part of a year):

================  ========  ==========================================================
column            type      meaning (all invented)
================  ========  ==========================================================
policy_id         BIGINT    1, 2, 3, ... in file order
exposure          DOUBLE    years on risk, 0.05..1 (55 % are full years)
driver_age        INTEGER   age of the main driver, 18..90
vehicle_power     INTEGER   power class of the vehicle, 4..15
vehicle_age       INTEGER   age of the vehicle in years, 0..30
bonus_malus       DOUBLE    no-claims scale, 50 (best)..150 (worst), 100 for a new driver
density           DOUBLE    inhabitants per km2 (thousands) where the driver lives
region            VARCHAR   6 levels (Central, Eastvale, Highfell, Northmoor, ...)
vehicle_group     VARCHAR   12 levels G01..G12 (rating group of the model)
fuel              VARCHAR   2 levels (diesel, petrol)
claim_count       INTEGER   number of claims during the exposure
claim_cost        DOUBLE    total cost of those claims (money units), 0 when no claim
lapsed            INTEGER   1 if the policy was not renewed, else 0
================  ========  ==========================================================

The invented truth
------------------
The three responses follow GLMs whose true coefficients are the module constants
:data:`FREQUENCY_TRUTH`, :data:`SEVERITY_TRUTH` and :data:`LAPSE_TRUTH`, keyed by term names
in indb's naming (``"intercept"``, a numeric column's name, ``"column=level"`` for a
non-reference level). Every effect is linear in the stored columns, so a model on the
columns as they are is correctly specified and should recover these numbers. Each
categorical reference level is the most frequent level (indb's default reference), whose
true effect is 0.

* ``claim_count ~ Poisson(exposure * exp(eta))`` with ``eta`` built from
  :data:`FREQUENCY_TRUTH`: fit a Poisson GLM with offset ``ln(exposure)``. Mean annual
  frequency is about 0.08 claims per policy-year.
* ``claim_cost`` is the sum of ``claim_count`` independent gamma severities with shape
  :data:`SEVERITY_SHAPE` and mean ``exp(eta)`` from :data:`SEVERITY_TRUTH` (mean about
  1700 money units). The sum of ``n`` such severities is gamma with shape
  ``n * SEVERITY_SHAPE``, so on rows with claims the average severity
  ``claim_cost / claim_count`` follows a gamma GLM (log link) with prior weight
  ``claim_count`` and dispersion ``1 / SEVERITY_SHAPE``. Costs are rounded to cents
  (never below 0.01 when there is a claim), which is negligible for the fit.
  ``claim_cost / exposure`` (pure premium) is compound Poisson-gamma, a natural Tweedie
  example, though the Tweedie mean-variance law only approximates this truth.
* ``lapsed ~ Bernoulli(1 / (1 + exp(-eta)))`` with ``eta`` from :data:`LAPSE_TRUTH`
  (which includes ``claim_count``: policies with claims lapse more); lapse rate about 13 %.

The predictors are correlated on purpose: young drivers carry a high ``bonus_malus``,
``density`` depends on ``region``.

Determinism
-----------
Rows are generated in fixed blocks of :data:`BLOCK_ROWS` rows. Block ``b`` of column
stream ``k`` draws from ``numpy.random.SeedSequence(seed, spawn_key=(b, k))``, and every
column has its own stream, so

* the output depends only on ``(rows, seed)``, not on ``chunk_rows`` (which only sets the
  Parquet row-group size);
* the first ``n`` rows of a larger data set equal the data set of ``n`` rows with the
  same seed;
* the same seed gives the same bytes with the same numpy and pyarrow versions. numpy does
  not promise identical streams across its releases, so pin numpy when the exact values
  matter.
"""

from __future__ import annotations

import os
from collections.abc import Iterator, Mapping

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from indb.errors import SpecError

INSURER = "Quillmere Mutual"
"""Name of the invented insurer (not a real company)."""

BLOCK_ROWS = 1 << 17
"""Rows per generation block; fixed so that the output does not depend on the chunk size."""

REGIONS = ("Central", "Eastvale", "Highfell", "Northmoor", "Southbay", "Westridge")
REGION_SHARE = (0.30, 0.18, 0.10, 0.15, 0.14, 0.13)
# Median density (thousands of inhabitants per km2) of each region, invented.
REGION_DENSITY = (2.5, 0.8, 0.05, 0.2, 1.2, 0.4)

VEHICLE_GROUPS = tuple(f"G{i:02d}" for i in range(1, 13))
VEHICLE_GROUP_SHARE = (0.04, 0.07, 0.10, 0.12, 0.15, 0.13, 0.11, 0.09, 0.07, 0.06, 0.04, 0.02)

FUELS = ("diesel", "petrol")
FUEL_SHARE = (0.42, 0.58)

LEVELS: dict[str, tuple[str, ...]] = {
    "region": REGIONS,
    "vehicle_group": VEHICLE_GROUPS,
    "fuel": FUELS,
}
"""Levels of each categorical column (ascending string order)."""

REFERENCE = {"region": "Central", "vehicle_group": "G05", "fuel": "petrol"}
"""Most frequent level of each categorical column (indb's default reference level)."""

# --- the invented truth (log link, per policy-year) -----------------------------------------
FREQUENCY_TRUTH: dict[str, float] = {
    "intercept": -3.0,
    "driver_age": -0.012,
    "vehicle_power": 0.03,
    "vehicle_age": -0.015,
    "bonus_malus": 0.012,
    "density": 0.035,
    "region=Eastvale": 0.05,
    "region=Highfell": -0.20,
    "region=Northmoor": -0.10,
    "region=Southbay": 0.15,
    "region=Westridge": -0.05,
    "vehicle_group=G01": -0.25,
    "vehicle_group=G02": -0.15,
    "vehicle_group=G03": -0.10,
    "vehicle_group=G04": -0.05,
    "vehicle_group=G06": 0.05,
    "vehicle_group=G07": 0.08,
    "vehicle_group=G08": 0.12,
    "vehicle_group=G09": 0.18,
    "vehicle_group=G10": 0.22,
    "vehicle_group=G11": 0.30,
    "vehicle_group=G12": 0.40,
    "fuel=diesel": 0.10,
}
"""Invented true Poisson log-link coefficients of ``claim_count`` (offset ``ln(exposure)``)."""

SEVERITY_TRUTH: dict[str, float] = {
    "intercept": 7.0,
    "driver_age": 0.004,
    "vehicle_power": 0.04,
    "vehicle_age": -0.02,
    "density": -0.01,
    "region=Eastvale": 0.02,
    "region=Highfell": 0.10,
    "region=Northmoor": 0.05,
    "region=Southbay": -0.03,
    "region=Westridge": 0.00,
    "vehicle_group=G01": -0.30,
    "vehicle_group=G02": -0.22,
    "vehicle_group=G03": -0.15,
    "vehicle_group=G04": -0.07,
    "vehicle_group=G06": 0.07,
    "vehicle_group=G07": 0.13,
    "vehicle_group=G08": 0.20,
    "vehicle_group=G09": 0.27,
    "vehicle_group=G10": 0.35,
    "vehicle_group=G11": 0.45,
    "vehicle_group=G12": 0.60,
    "fuel=diesel": 0.05,
}
"""Invented true gamma log-link coefficients of the mean severity of one claim."""

SEVERITY_SHAPE = 1.2
"""Invented gamma shape of one claim's cost (coefficient of variation 1/sqrt(1.2) = 0.91)."""

LAPSE_TRUTH: dict[str, float] = {
    "intercept": -1.3,
    "driver_age": -0.025,
    "vehicle_age": 0.01,
    "bonus_malus": 0.008,
    "region=Eastvale": 0.10,
    "region=Highfell": -0.25,
    "region=Northmoor": -0.05,
    "region=Southbay": 0.15,
    "region=Westridge": 0.00,
    "fuel=diesel": -0.10,
    "claim_count": 0.35,
}
"""Invented true logit coefficients of ``lapsed``."""

SCHEMA = pa.schema(
    [
        pa.field("policy_id", pa.int64(), nullable=False),
        pa.field("exposure", pa.float64(), nullable=False),
        pa.field("driver_age", pa.int32(), nullable=False),
        pa.field("vehicle_power", pa.int32(), nullable=False),
        pa.field("vehicle_age", pa.int32(), nullable=False),
        pa.field("bonus_malus", pa.float64(), nullable=False),
        pa.field("density", pa.float64(), nullable=False),
        pa.field("region", pa.string(), nullable=False),
        pa.field("vehicle_group", pa.string(), nullable=False),
        pa.field("fuel", pa.string(), nullable=False),
        pa.field("claim_count", pa.int32(), nullable=False),
        pa.field("claim_cost", pa.float64(), nullable=False),
        pa.field("lapsed", pa.int32(), nullable=False),
    ],
    metadata={"scenario": f"{INSURER} motor book (invented data from indb.demo_data)"},
)
"""Arrow schema of the policy table."""

# One independent random stream per draw; the order of this tuple is part of the output.
_STREAMS = (
    "exposure_full",
    "exposure_part",
    "driver_age",
    "vehicle_power",
    "vehicle_age",
    "malus_flag",
    "malus_extra",
    "region",
    "density",
    "vehicle_group",
    "fuel",
    "claim_count",
    "claim_cost",
    "lapsed",
)


def policies_table(rows: int, seed: int = 2026) -> pa.Table:
    """Generate the invented policy table in memory.

    Parameters
    ----------
    rows:
        Number of policies (>= 0). Meant for small sizes; use :func:`write_policies`
        beyond a few million rows.
    seed:
        Non-negative integer seed.

    Returns
    -------
    pyarrow.Table
        Columns as in :data:`SCHEMA`; identical to the file :func:`write_policies` writes
        for the same ``rows`` and ``seed``.
    """
    _check_int("rows", rows, minimum=0)
    _check_int("seed", seed, minimum=0)
    if rows == 0:
        return SCHEMA.empty_table()
    return pa.concat_tables(_blocks(rows, seed))


def iter_policy_batches(
    rows: int, seed: int = 2026, chunk_rows: int = 1_000_000
) -> Iterator[pa.Table]:
    """Yield the invented policy table in consecutive pieces of ``chunk_rows`` rows.

    Memory stays proportional to ``chunk_rows``, whatever ``rows`` is. The concatenated
    pieces do not depend on ``chunk_rows``.

    Parameters
    ----------
    rows:
        Total number of policies (>= 0).
    seed:
        Non-negative integer seed.
    chunk_rows:
        Rows per yielded table (>= 1); the last one may be shorter.

    Yields
    ------
    pyarrow.Table
        Consecutive pieces with schema :data:`SCHEMA`.
    """
    _check_int("rows", rows, minimum=0)
    _check_int("seed", seed, minimum=0)
    _check_int("chunk_rows", chunk_rows, minimum=1)
    pending: list[pa.Table] = []
    pending_rows = 0
    for block in _blocks(rows, seed):
        pending.append(block)
        pending_rows += block.num_rows
        while pending_rows >= chunk_rows:
            merged = pa.concat_tables(pending)
            yield merged.slice(0, chunk_rows)
            rest = merged.slice(chunk_rows)
            pending = [rest] if rest.num_rows else []
            pending_rows = rest.num_rows
    if pending_rows:
        yield pa.concat_tables(pending)


def write_policies(
    path: str | os.PathLike[str],
    rows: int,
    seed: int = 2026,
    chunk_rows: int = 1_000_000,
) -> str:
    """Write the invented policy table to a Parquet file, chunk by chunk.

    Memory stays flat (about ``chunk_rows`` rows at a time), so 10^8 rows are fine given
    the disk space (about 8 bytes per row with zstd compression). The file is written
    next to ``path`` under a temporary name and renamed when complete, so an interrupted
    run leaves no truncated file at ``path``. Parent folders are created.

    Parameters
    ----------
    path:
        Output file.
    rows:
        Number of policies (>= 0).
    seed:
        Non-negative integer seed. Same ``rows`` and ``seed`` give the same values whatever
        ``chunk_rows`` is (and the same bytes for the same ``chunk_rows`` and library
        versions).
    chunk_rows:
        Rows per Parquet row group (>= 1).

    Returns
    -------
    str
        The path written.
    """
    _check_int("rows", rows, minimum=0)
    _check_int("seed", seed, minimum=0)
    _check_int("chunk_rows", chunk_rows, minimum=1)
    target = os.fspath(path)
    parent = os.path.dirname(os.path.abspath(target))
    os.makedirs(parent, exist_ok=True)
    partial = target + ".partial"
    try:
        with pq.ParquetWriter(partial, SCHEMA, compression="zstd") as writer:
            for piece in iter_policy_batches(rows, seed, chunk_rows):
                writer.write_table(piece, row_group_size=chunk_rows)
        os.replace(partial, target)
    finally:
        if os.path.exists(partial):
            os.remove(partial)
    return target


# --- internals ---------------------------------------------------------------------------


def _check_int(option: str, value: object, minimum: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise SpecError(f"{option} must be an integer; got {value!r} ({type(value).__name__})")
    if value < minimum:
        raise SpecError(f"{option} must be >= {minimum}; got {value}")


def _blocks(rows: int, seed: int) -> Iterator[pa.Table]:
    for b, start in enumerate(range(0, rows, BLOCK_ROWS)):
        yield _block(seed, b, start, min(BLOCK_ROWS, rows - start))


def _streams(seed: int, block: int) -> dict[str, np.random.Generator]:
    return {
        name: np.random.Generator(
            np.random.PCG64(np.random.SeedSequence(seed, spawn_key=(block, k)))
        )
        for k, name in enumerate(_STREAMS)
    }


def _pick(rng: np.random.Generator, shares: tuple[float, ...], n: int) -> np.ndarray:
    cdf = np.cumsum(shares)
    cdf /= cdf[-1]
    codes = np.searchsorted(cdf, rng.random(n), side="right")
    return np.minimum(codes, len(shares) - 1).astype(np.int32)


def _linear_predictor(
    truth: Mapping[str, float],
    numeric: Mapping[str, np.ndarray],
    codes: Mapping[str, np.ndarray],
    n: int,
) -> np.ndarray:
    eta = np.zeros(n)
    for term, beta in truth.items():
        if term == "intercept":
            eta += beta
        elif "=" in term:
            column, level = term.split("=", 1)
            eta += beta * (codes[column] == LEVELS[column].index(level))
        else:
            eta += beta * numeric[term]
    return eta


def _block(seed: int, block: int, start: int, n: int) -> pa.Table:
    g = _streams(seed, block)

    full_year = g["exposure_full"].random(n) < 0.55
    part_year = np.round(0.05 + 0.95 * g["exposure_part"].random(n), 3)
    exposure = np.where(full_year, 1.0, part_year)

    driver_age = np.clip(np.rint(g["driver_age"].normal(46.0, 15.0, n)), 18, 90).astype(np.int32)
    vehicle_power = np.minimum(4 + g["vehicle_power"].poisson(2.6, n), 15).astype(np.int32)
    vehicle_age = np.minimum(np.floor(g["vehicle_age"].gamma(2.0, 3.5, n)), 30).astype(np.int32)

    # New drivers start at 100 and earn 3 points a year down to 50; a quarter carry a malus.
    start_level = np.maximum(50.0, 100.0 - 3.0 * (driver_age - 18))
    malus = (g["malus_flag"].random(n) < 0.25) * np.rint(g["malus_extra"].exponential(12.0, n))
    bonus_malus = np.clip(start_level + malus, 50.0, 150.0)

    region = _pick(g["region"], REGION_SHARE, n)
    median_density = np.asarray(REGION_DENSITY)[region]
    density = np.round(
        np.clip(median_density * np.exp(g["density"].normal(0.0, 1.0, n)), 0.002, 30.0), 3
    )
    vehicle_group = _pick(g["vehicle_group"], VEHICLE_GROUP_SHARE, n)
    fuel = _pick(g["fuel"], FUEL_SHARE, n)

    numeric = {
        "driver_age": driver_age,
        "vehicle_power": vehicle_power,
        "vehicle_age": vehicle_age,
        "bonus_malus": bonus_malus,
        "density": density,
    }
    codes = {"region": region, "vehicle_group": vehicle_group, "fuel": fuel}

    mu_count = exposure * np.exp(_linear_predictor(FREQUENCY_TRUTH, numeric, codes, n))
    claim_count = g["claim_count"].poisson(mu_count).astype(np.int32)

    # Sum of k gamma(shape a, scale s) severities is gamma(shape k*a, scale s).
    mean_severity = np.exp(_linear_predictor(SEVERITY_TRUTH, numeric, codes, n))
    claim_cost = np.zeros(n)
    has_claim = claim_count > 0
    total = g["claim_cost"].gamma(
        SEVERITY_SHAPE * claim_count[has_claim], mean_severity[has_claim] / SEVERITY_SHAPE
    )
    claim_cost[has_claim] = np.maximum(np.round(total, 2), 0.01)

    numeric["claim_count"] = claim_count
    eta_lapse = _linear_predictor(LAPSE_TRUTH, numeric, codes, n)
    lapsed = (g["lapsed"].random(n) < 1.0 / (1.0 + np.exp(-eta_lapse))).astype(np.int32)

    return pa.Table.from_arrays(
        [
            pa.array(np.arange(start + 1, start + n + 1, dtype=np.int64)),
            pa.array(exposure),
            pa.array(driver_age),
            pa.array(vehicle_power),
            pa.array(vehicle_age),
            pa.array(bonus_malus),
            pa.array(density),
            pa.array(REGIONS).take(pa.array(region)),
            pa.array(VEHICLE_GROUPS).take(pa.array(vehicle_group)),
            pa.array(FUELS).take(pa.array(fuel)),
            pa.array(claim_count),
            pa.array(claim_cost),
            pa.array(lapsed),
        ],
        schema=SCHEMA,
    )
