"""Tests of the invented demo-data generator (indb.demo_data).

The recovery checks fit the invented truth back with statsmodels GLM (a test-only oracle
outside this project): they test the generator itself, not indb's fitter.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import statsmodels.api as sm

from indb.demo_data import (
    BLOCK_ROWS,
    FREQUENCY_TRUTH,
    LAPSE_TRUTH,
    LEVELS,
    REFERENCE,
    SCHEMA,
    SEVERITY_SHAPE,
    SEVERITY_TRUTH,
    iter_policy_batches,
    policies_table,
    write_policies,
)
from indb.errors import SpecError

# Crosses one block boundary so that block seeding and partial blocks are exercised.
ROWS_ACROSS_BLOCKS = BLOCK_ROWS + 5_000

# Tolerance of the recovery checks: |estimate - truth| <= 4 standard errors (common
# practice for a z-type check; with ~20 coefficients a false alarm has probability ~1e-3).
N_SE = 4.0


@pytest.fixture(scope="module")
def sample() -> pd.DataFrame:
    return policies_table(50_000, seed=2026).to_pandas()


# -- determinism ---------------------------------------------------------------------------


def test_same_seed_gives_same_bytes(tmp_path) -> None:
    a = write_policies(tmp_path / "a.parquet", 20_000, seed=7, chunk_rows=6_000)
    b = write_policies(tmp_path / "b.parquet", 20_000, seed=7, chunk_rows=6_000)
    with open(a, "rb") as fa, open(b, "rb") as fb:
        assert fa.read() == fb.read()


def test_different_seed_gives_different_values() -> None:
    a = policies_table(2_000, seed=1)
    b = policies_table(2_000, seed=2)
    assert a.column("policy_id").equals(b.column("policy_id"))
    assert not a.column("driver_age").equals(b.column("driver_age"))


def test_values_do_not_depend_on_chunk_size(tmp_path) -> None:
    small = write_policies(tmp_path / "small.parquet", ROWS_ACROSS_BLOCKS, chunk_rows=9_999)
    large = write_policies(tmp_path / "large.parquet", ROWS_ACROSS_BLOCKS, chunk_rows=10**6)
    assert pq.ParquetFile(small).metadata.num_row_groups == -(-ROWS_ACROSS_BLOCKS // 9_999)
    assert pq.ParquetFile(large).metadata.num_row_groups == 1
    in_memory = policies_table(ROWS_ACROSS_BLOCKS)
    assert pq.read_table(small).equals(in_memory)
    assert pq.read_table(large).equals(in_memory)


def test_batches_have_requested_size_and_concatenate_to_table() -> None:
    pieces = list(iter_policy_batches(25_000, seed=3, chunk_rows=10_000))
    assert [p.num_rows for p in pieces] == [10_000, 10_000, 5_000]
    assert pa.concat_tables(pieces).equals(policies_table(25_000, seed=3))


def test_smaller_data_set_is_a_prefix_of_a_larger_one() -> None:
    big = policies_table(ROWS_ACROSS_BLOCKS)
    assert big.slice(0, 1_000).equals(policies_table(1_000))
    # A partial last block is a prefix of the full block drawn for a larger data set.
    part = policies_table(BLOCK_ROWS + 100)
    assert big.slice(BLOCK_ROWS, 100).equals(part.slice(BLOCK_ROWS))


# -- shape, types, domains -----------------------------------------------------------------


def test_row_count_schema_and_engine_types(tmp_path) -> None:
    path = write_policies(tmp_path / "sub" / "p.parquet", 3_001, chunk_rows=1_000)
    table = pq.read_table(path)
    assert table.num_rows == 3_001
    assert table.schema.equals(SCHEMA)
    con = duckdb.connect()
    described = con.execute("DESCRIBE SELECT * FROM read_parquet(?)", [path]).fetchall()
    types = {row[0]: row[1] for row in described}
    assert types["region"] == types["vehicle_group"] == types["fuel"] == "VARCHAR"
    assert types["policy_id"] == "BIGINT"
    assert types["claim_count"] == types["driver_age"] == "INTEGER"
    assert types["exposure"] == types["claim_cost"] == types["bonus_malus"] == "DOUBLE"
    assert con.execute("SELECT count(*) FROM read_parquet(?)", [path]).fetchone() == (3_001,)


def test_no_nulls_and_domains(sample: pd.DataFrame) -> None:
    d = sample
    assert not d.isna().any().any()
    assert d["policy_id"].tolist() == list(range(1, len(d) + 1))
    assert d["exposure"].between(0.05, 1.0).all()
    assert d["driver_age"].between(18, 90).all()
    assert d["vehicle_power"].between(4, 15).all()
    assert d["vehicle_age"].between(0, 30).all()
    assert d["bonus_malus"].between(50, 150).all()
    assert (d["density"] > 0).all()
    assert (d["claim_count"] >= 0).all()
    assert ((d["claim_cost"] == 0) == (d["claim_count"] == 0)).all()
    assert (d.loc[d["claim_count"] > 0, "claim_cost"] >= 0.01).all()
    assert set(d["lapsed"].unique()) == {0, 1}
    for column, levels in LEVELS.items():
        assert set(d[column].unique()) == set(levels), column
        # The documented reference level is the most frequent one (indb's default).
        assert d[column].value_counts().idxmax() == REFERENCE[column], column


def test_empty_data_set(tmp_path) -> None:
    assert policies_table(0).num_rows == 0
    path = write_policies(tmp_path / "empty.parquet", 0)
    table = pq.read_table(path)
    assert table.num_rows == 0
    assert table.schema.equals(SCHEMA)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"rows": -1}, "rows must be >= 0; got -1"),
        ({"rows": 10, "chunk_rows": 0}, "chunk_rows must be >= 1; got 0"),
        ({"rows": 10, "seed": -3}, "seed must be >= 0; got -3"),
        ({"rows": 1.5}, "rows must be an integer; got 1.5 (float)"),
        ({"rows": True}, "rows must be an integer; got True (bool)"),
    ],
)
def test_bad_arguments_name_the_option(tmp_path, kwargs, message) -> None:
    target = tmp_path / "x.parquet"
    with pytest.raises(SpecError) as info:
        write_policies(target, **kwargs)
    assert str(info.value) == message
    assert not target.exists()
    assert not (tmp_path / "x.parquet.partial").exists()


# -- the invented truth is recoverable (statsmodels GLM as external oracle) ----------------


def _design(d: pd.DataFrame, truth: dict[str, float]) -> pd.DataFrame:
    columns = {}
    for term in truth:
        if term == "intercept":
            columns[term] = np.ones(len(d))
        elif "=" in term:
            column, level = term.split("=", 1)
            columns[term] = (d[column] == level).astype(float).to_numpy()
        else:
            columns[term] = d[term].astype(float).to_numpy()
    return pd.DataFrame(columns, index=d.index)


def _assert_recovers(result, truth: dict[str, float]) -> None:
    est = result.params
    se = result.bse
    off = {t: (est[t] - b) / se[t] for t, b in truth.items() if abs(est[t] - b) > N_SE * se[t]}
    assert not off, f"estimates more than {N_SE} SE from the invented truth: {off}"


def test_poisson_frequency_truth_is_recovered(sample: pd.DataFrame) -> None:
    # Oracle: statsmodels GLM Poisson, log link, offset ln(exposure).
    X = _design(sample, FREQUENCY_TRUTH)
    model = sm.GLM(
        sample["claim_count"],
        X,
        family=sm.families.Poisson(),
        offset=np.log(sample["exposure"]),
    )
    _assert_recovers(model.fit(), FREQUENCY_TRUTH)


def test_gamma_severity_truth_is_recovered(sample: pd.DataFrame) -> None:
    # Oracle: statsmodels GLM Gamma, log link, on the average severity of rows with claims
    # with var_weights = claim_count (a sum of n gammas of shape a is gamma of shape n*a).
    claims = sample[sample["claim_count"] > 0]
    X = _design(claims, SEVERITY_TRUTH)
    y = claims["claim_cost"] / claims["claim_count"]
    model = sm.GLM(
        y,
        X,
        family=sm.families.Gamma(link=sm.families.links.Log()),
        var_weights=claims["claim_count"].astype(float),
    )
    result = model.fit()
    _assert_recovers(result, SEVERITY_TRUTH)
    # Pearson dispersion estimates 1/shape; loose band: the estimate is noisy (common practice).
    assert result.scale == pytest.approx(1.0 / SEVERITY_SHAPE, rel=0.15)


def test_logistic_lapse_truth_is_recovered(sample: pd.DataFrame) -> None:
    # Oracle: statsmodels GLM Binomial, logit link.
    X = _design(sample, LAPSE_TRUTH)
    model = sm.GLM(sample["lapsed"], X, family=sm.families.Binomial())
    _assert_recovers(model.fit(), LAPSE_TRUTH)
