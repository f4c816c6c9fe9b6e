"""The in-database model registry: round trip, idempotent refits and atomic writes.

Data: the ship damage incidents of McCullagh & Nelder (*Generalized Linear Models*, 2nd ed.,
1989, section 6.3.2) as stored in statsmodels' test data (``discrete/tests/results/
ships.csv``), and ``statsmodels.datasets.randhie`` (RAND Health Insurance Experiment, 20,190
rows) for the larger model killed mid-fit. Oracle for coefficients and predictions:
statsmodels GLM on the same data. Every test gets a fresh DuckDB file in ``tmp_path``.
"""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import textwrap
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose, assert_array_equal
from reference_cases import ships_registry_frame as _ships

import indb
from indb.engines.duckdb import DuckDBEngine
from indb.errors import RegistryError, SpecError
from indb.registry import Registry
from indb.results import FitResult

# indb and statsmodels solve the same likelihood equations; at tol=1e-10 both are converged
# far below this (task brief for the core fitter: coefficients rtol 1e-6).
COEF_RTOL = 1e-6
TOL = 1e-10


@pytest.fixture
def db(tmp_path: Path) -> str:
    return str(tmp_path / "registry.duckdb")


def _write(db: str, table: str, frame: pd.DataFrame) -> None:
    with duckdb.connect(db) as con:
        con.register("frame", frame)
        con.execute(f'CREATE OR REPLACE TABLE "{table}" AS SELECT * FROM frame')
        con.unregister("frame")


def _query(db: str, sql: str) -> pd.DataFrame:
    with duckdb.connect(db) as con:
        return con.execute(sql).df()


@contextmanager
def _registry(db: str) -> Iterator[Registry]:
    reg = indb.api.registry(db)
    try:
        yield reg
    finally:
        reg.engine.close()


def _fit_ships(db: Any, reference: dict[str, str] | None = None, **kwargs: Any) -> FitResult:
    return indb.fit(
        "ships",
        "accident",
        "poisson",
        db=db,
        offset="ln(service)",
        exclude=["row_id"],
        # fixed reference levels: the most frequent level changes when the data do
        reference=reference or {"type": "A", "built": "1960-64", "operated": "1960-74"},
        tol=TOL,
        **kwargs,
    )


def _exog(frame: pd.DataFrame, res: FitResult) -> pd.DataFrame:
    """Design matrix in indb's term order (treatment coding, as in the API contract)."""
    cols: dict[str, Any] = {}
    for c in res.coefficients:
        if not c.columns:
            cols[c.term] = np.ones(len(frame))
        else:
            cols[c.term] = (frame[c.columns[0]] == c.levels[0]).astype(float).to_numpy()
    return pd.DataFrame(cols, index=frame.index)


def _oracle(frame: pd.DataFrame, res: FitResult) -> Any:
    """statsmodels Poisson with offset ln(service) on the same design."""
    return sm.GLM(
        frame["accident"],
        _exog(frame, res),
        family=sm.families.Poisson(),
        offset=np.log(frame["service"]),
    ).fit(tol=1e-12)


def snapshot(db: str) -> dict[str, Any]:
    """Everything a registry write could touch: every registry table's full contents, the
    views, macros and tables of the database (catalog functions of DuckDB)."""
    with duckdb.connect(db) as con:
        out: dict[str, Any] = {}
        tables = con.execute(
            "SELECT table_name FROM duckdb_tables() WHERE schema_name = 'indb_registry' "
            "ORDER BY table_name"
        ).fetchall()
        for (table,) in tables:
            out[table] = con.execute(
                f'SELECT * FROM indb_registry."{table}" ORDER BY ALL'
            ).fetchall()
        out["views"] = con.execute(
            "SELECT schema_name, view_name, sql FROM duckdb_views() WHERE NOT internal ORDER BY ALL"
        ).fetchall()
        out["macros"] = con.execute(
            "SELECT schema_name, function_name, macro_definition FROM duckdb_functions() "
            "WHERE function_type = 'macro' AND NOT internal ORDER BY ALL"
        ).fetchall()
        out["tables"] = con.execute(
            "SELECT schema_name, table_name, column_count FROM duckdb_tables() ORDER BY ALL"
        ).fetchall()
        return out


# -- round trip -----------------------------------------------------------------------


def test_round_trip_versions_compare_promote_rollback_drop(db: str):
    full = _ships()
    _write(db, "ships", full)
    v1 = _fit_ships(db, name="ship_damage")
    assert (v1.deployment["version"], v1.deployment["promoted"]) == (1, True)

    # Next period: type E ships leave the fleet; the refit is recorded but held.
    reduced = full[full["type"] != "E"].reset_index(drop=True)
    _write(db, "ships", reduced)
    v2 = _fit_ships(db, name="ship_damage", promote=False)
    assert (v2.deployment["version"], v2.deployment["promoted"]) == (2, False)

    with _registry(db) as reg:
        models = reg.models()
        assert [m["model_name"] for m in models] == ["ship_damage"]
        assert models[0]["live_version"] == 1
        assert models[0]["view_name"] == "ship_damage"
        versions = reg.versions("ship_damage")
        assert [(v["version"], v["status"]) for v in versions] == [(1, "live"), (2, "held")]
        assert [v["n_used"] for v in versions] == [len(full), len(reduced)]
        assert [v["family"] for v in versions] == ["poisson", "poisson"]

        # Stored results come back exactly (JSON keeps every double's digits).
        for fitted, k in ((v1, 1), (v2, 2)):
            loaded = reg.load("ship_damage", k)
            assert loaded.terms == fitted.terms
            assert_array_equal(loaded.estimates, fitted.estimates)
            assert_array_equal(loaded.std_errors, fitted.std_errors)
            assert_array_equal(loaded.covariance, fitted.covariance)
            assert loaded.deviance == fitted.deviance and loaded.n_used == fitted.n_used
        # ... and they are the right models: statsmodels on each version's data.
        for frame, k in ((full, 1), (reduced, 2)):
            loaded = reg.load("ship_damage", k)
            oracle = _oracle(frame, loaded)
            assert_allclose(loaded.estimates, oracle.params.to_numpy(), rtol=COEF_RTOL)
            assert_allclose(loaded.std_errors, oracle.bse.to_numpy(), rtol=COEF_RTOL)
            assert_allclose(loaded.deviance, oracle.deviance, rtol=COEF_RTOL)

        cmp = reg.compare("ship_damage", 1, 2)
        by_term = {t["term"]: t for t in cmp["terms"]}
        for c in v1.coefficients:
            t = by_term[c.term]
            if c.term == "type=E":  # not in version 2
                assert np.isnan(t["estimate_b"]) and np.isnan(t["change"])
                continue
            change = v2.coef(c.term).estimate - c.estimate
            assert_allclose(t["change"], change, rtol=1e-12)
            assert_allclose(t["change_in_se"], change / c.std_error, rtol=1e-12)
        assert cmp["rows"] == [len(full), len(reduced)]
        assert_allclose(
            cmp["deviance_per_row"],
            [v1.deviance / len(full), v2.deviance / len(reduced)],
            rtol=1e-12,
        )

        # Promote version 2: the view now scores with version 2's coefficients.
        reg.promote("ship_damage", 2)
        assert reg.model("ship_damage")["live_version"] == 2
        statuses = {v["version"]: v["status"] for v in reg.versions("ship_damage")}
        assert statuses == {1: "retired", 2: "live"}
    view = _query(db, "SELECT row_id, score_mean FROM ship_damage ORDER BY row_id")
    expected = _oracle(reduced, v2).predict(_exog(reduced, v2), offset=np.log(reduced["service"]))
    assert_allclose(view["score_mean"].to_numpy(), expected.to_numpy(), rtol=COEF_RTOL)

    # Roll back to version 1: its coefficients (type E included) score the current rows.
    with _registry(db) as reg:
        reg.promote("ship_damage", 1)
        assert reg.model("ship_damage")["live_version"] == 1
    view = _query(db, "SELECT row_id, score_mean FROM ship_damage ORDER BY row_id")
    # version 1's model (fitted on the full data) applied to the current rows
    expected = _oracle(full, v1).predict(_exog(reduced, v1), offset=np.log(reduced["service"]))
    assert_allclose(view["score_mean"].to_numpy(), expected.to_numpy(), rtol=COEF_RTOL)

    with _registry(db) as reg:
        reg.drop("ship_damage", 2)
        statuses = {v["version"]: v["status"] for v in reg.versions("ship_damage")}
        assert statuses == {1: "live", 2: "dropped"}
        with pytest.raises(RegistryError, match="live"):
            reg.drop("ship_damage", 1)
        with pytest.raises(RegistryError, match="dropped"):
            reg.promote("ship_damage", 2)
        with pytest.raises(RegistryError, match="no version 9"):
            reg.load("ship_damage", 9)
        with pytest.raises(RegistryError, match="no model named 'nope'"):
            reg.versions("nope")
        actions = [(e["version"], e["action"]) for e in reg.events("ship_damage")]
    assert actions == [
        (1, "fit"),
        (1, "promote"),
        (2, "fit"),
        (2, "promote"),
        (1, "promote"),
        (2, "drop"),
    ]


def test_idempotent_refit_and_new_version_on_request(db: str):
    _write(db, "ships", _ships())
    first = _fit_ships(db, name="ship_damage")
    before = snapshot(db)

    again = _fit_ships(db, name="ship_damage")
    assert again.deployment["created"] is False
    assert again.deployment["version"] == first.deployment["version"] == 1
    assert_array_equal(again.estimates, first.estimates)  # same spec, same data: same numbers
    assert snapshot(db) == before  # nothing recorded, view untouched

    forced = _fit_ships(db, name="ship_damage", new_version=True)
    assert forced.deployment["created"] is True and forced.deployment["version"] == 2
    with _registry(db) as reg:
        assert [v["version"] for v in reg.versions("ship_damage")] == [1, 2]
        assert reg.model("ship_damage")["live_version"] == 2
        assert_array_equal(reg.load("ship_damage", 2).estimates, first.estimates)


# -- atomicity ------------------------------------------------------------------------

# The child fits the larger model with name=...; its progress callback prints one line per
# IRLS iteration and waits for the parent, so the parent can kill it at a chosen iteration.
CHILD = textwrap.dedent(
    """
    import sys
    import indb

    def pause(record):
        if record.phase == "prepare":  # pre-fit scans: the IRLS loop has not started
            return
        print(f"iteration {record.iteration} {record.phase}", flush=True)
        sys.stdin.readline()

    res = indb.fit(
        "randhie", "mdvis", "poisson", db=sys.argv[1], name="visits", new_version=True,
        progress=pause,
    )
    print(f"saved {res.deployment['version']}", flush=True)
    """
)


def _start_child(db: str) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-c", CHILD, db],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )


def _kill_after(db: str, iterations: int, delay: float = 0.0) -> int:
    """Let the child run ``iterations`` IRLS iterations (then ``delay`` seconds more), then
    SIGKILL it. Returns the child's exit status."""
    child = _start_child(db)
    assert child.stdin is not None and child.stdout is not None
    try:
        for k in range(1, iterations + 1):
            line = child.stdout.readline()
            assert line.startswith(f"iteration {k} "), (line, child.stderr.read())
            if k < iterations or delay > 0:
                child.stdin.write("\n")
                child.stdin.flush()
        time.sleep(delay)
        child.send_signal(signal.SIGKILL)
    finally:
        child.wait(timeout=60)
        child.stdout.close()
        child.stderr.close()
        child.stdin.close()
    return child.returncode


def _one_more_version(after: dict[str, Any], before: dict[str, Any], model: str) -> bool:
    """True when ``after`` is ``before`` plus exactly one complete, live version of ``model``
    (rows are (model_name, version, ...); the model row's third field is live_version)."""

    def versions(snap: dict[str, Any]) -> set[int]:
        return {r[1] for r in snap["model_version"] if r[0] == model}

    def count(snap: dict[str, Any], table: str, v: int) -> int:
        return sum(1 for r in snap[table] if r[0] == model and r[1] == v)

    new = versions(after) - versions(before)
    if len(new) != 1 or versions(before) - versions(after):
        return False
    (version,) = new
    live = next(r[2] for r in after["model"] if r[0] == model)
    return (
        count(after, "version_term", version) == count(before, "version_term", 1)
        and count(after, "version_iteration", version) == count(before, "version_iteration", 1)
        and count(after, "registry_event", version) == 2  # fit, promote
        and live == version
        and after["tables"] == before["tables"]
    )


@pytest.mark.slow
def test_killing_the_process_mid_fit_leaves_registry_and_views_unchanged(db: str):
    _write(db, "randhie", sm.datasets.randhie.load_pandas().data)
    _write(db, "ships", _ships())
    # A registry with content: another model and the first version of the one refitted.
    _fit_ships(db, name="ship_damage")
    first = indb.fit("randhie", "mdvis", "poisson", db=db, name="visits")
    n_iter = len(first.iteration_log)
    assert n_iter >= 4
    before = snapshot(db)
    assert any(v[1] == "visits" for v in before["views"])

    # Killed while paused inside IRLS (first and last iteration): before the
    # write-back starts, so nothing may have changed.
    for stop in (1, n_iter):
        status = _kill_after(db, stop)
        assert status == -signal.SIGKILL
        assert snapshot(db) == before, f"registry changed after a kill at iteration {stop}"

    # Killed while the result is built and written back: the transaction either committed
    # (one complete new version, live, view replaced) or left no trace at all.
    for delay in (0.05, 0.1, 0.2):
        _kill_after(db, n_iter, delay)
        after = snapshot(db)
        if after != before:
            assert _one_more_version(after, before, "visits"), "a partial write survived a kill"
            before = after

    # The registry still works: a normal fit adds a version and the view serves it.
    again = indb.fit("randhie", "mdvis", "poisson", db=db, name="visits", new_version=True)
    with _registry(db) as reg:
        assert reg.model("visits")["live_version"] == again.deployment["version"]
        assert [v["status"] for v in reg.versions("visits")][-1] == "live"
    assert _query(db, "SELECT count(*) AS n FROM visits")["n"][0] == 20190


def test_failures_during_write_back_leave_nothing_written(db: str):
    ships = _ships()
    _write(db, "ships", ships)
    _fit_ships(db, name="ship_damage")
    # A scoring source lacking a model input column (no "service" for the offset).
    _write(db, "ships_book", ships.drop(columns=["service"]))
    # A table already holding the name the next model's view would take.
    with duckdb.connect(db) as con:
        con.execute("CREATE TABLE clash AS SELECT 1 AS x")
    before = snapshot(db)

    with pytest.raises(SpecError, match=r"lacks model input column.*service"):
        _fit_ships(db, name="ship_book", score_source="ships_book")
    assert snapshot(db) == before

    # Same for a refit of an existing model that would be promoted.
    with pytest.raises(SpecError, match="service"):
        _fit_ships(db, name="ship_damage", score_source="ships_book", new_version=True)
    assert snapshot(db) == before

    # The view would replace a table indb did not create: refused before the write-back
    # (a failure inside the transaction is rolled back: tests/robustness/test_faults.py
    # kills the write-back before each of its statements).
    # issue 13: and before the fit's first scan (no IRLS iteration is reported)
    scans: list[Any] = []
    with pytest.raises(RegistryError, match="would replace base table 'clash'"):
        _fit_ships(db, name="clash", progress=scans.append)
    assert scans == []
    assert snapshot(db) == before
    # a held version deploys nothing, so it may take the name
    held = _fit_ships(db, name="clash", promote=False, progress=scans.append)
    assert held.deployment["promoted"] is False
    fit_scans = [r for r in scans if r.phase != "prepare"]  # then the pre-fit scans
    assert len(fit_scans) == held.iterations  # the callback sees every IRLS scan
    assert _query(db, "SELECT x FROM clash")["x"].tolist() == [1]


def test_documented_top_level_api_and_text_report(tmp_path: Path) -> None:
    # issue 13: indb.deploy was documented but only indb.api.deploy existed, and print(result)
    # showed the dataclass fields instead of the report
    from indb.report import render_report

    db = str(tmp_path / "t.duckdb")
    con = duckdb.connect(db)
    con.execute(
        "CREATE TABLE t AS SELECT i, i % 3 AS g, (i % 7) * 0.5 AS x, (i % 5) AS y "
        "FROM range(60) r(i)"
    )
    con.close()
    res = indb.fit("t", "y", "poisson", db=db, categorical=["g"], exclude=["i"])
    assert str(res) == render_report(res)
    assert repr(res).startswith("FitResult(")
    out = indb.deploy(res, "counts", db=db)
    assert out.deployment["version"] == 1
    assert "CREATE" in indb.scoring_sql("counts", db=db).upper()


def test_unseen_macro_counts_what_the_view_counts(tmp_path: Path) -> None:
    # issue 13: NAME_score scores an unknown level as the reference level and cannot say
    # so; its companion NAME_unseen returns the view's score_unseen for the same inputs
    db = str(tmp_path / "u.duckdb")
    con = duckdb.connect(db)
    con.execute(
        "CREATE TABLE pol AS SELECT i, CASE hash(i, 'r') % 3 WHEN 0 THEN 'North' WHEN 1 "
        "THEN 'South' ELSE 'West' END AS region, 20 + i % 40 AS age, "
        "0.5 + (i % 4) * 0.25 AS exposure, hash(i, 'c') % 3 AS claims FROM range(300) r(i)"
    )
    con.execute(
        "CREATE TABLE newpol AS SELECT * FROM (VALUES (1, 'North', 30, 1.0), "
        "(2, 'Atlantis', 30, 1.0), (3, NULL, 30, 1.0), (4, 'South', NULL, 1.0), "
        "(5, 'Atlantis', NULL, 1.0), (6, 'West', 45, -1.0)) t(i, region, age, exposure)"
    )
    con.close()
    indb.fit(
        "pol",
        "claims",
        "poisson",
        db=db,
        offset="ln(exposure)",
        exclude=["i"],
        name="freq",
        score_source="newpol",
    )
    con = duckdb.connect(db)
    rows = con.execute(
        "SELECT i, score_mean, score_unseen, freq_score(region, age, exposure), "
        "freq_unseen(region, age, exposure) FROM freq ORDER BY i"
    ).fetchall()
    for i, mean, unseen, macro_mean, macro_unseen in rows:
        assert macro_unseen == unseen, i
        assert (macro_mean is None) == (mean is None), i
        if mean is not None:
            assert macro_mean == pytest.approx(mean, rel=1e-12)
    # seen; unseen level; NULL level; NULL age (no mean); both; ln(-1) (no mean)
    assert [r[2] for r in rows] == [0, 1, 1, 1, 2, 1]
    # both macros go when the model moves to another schema
    con.close()
    indb.fit(
        "pol",
        "claims",
        "poisson",
        db=db,
        offset="ln(exposure)",
        exclude=["i"],
        name="freq",
        score_source="newpol",
        view_schema="mart",
    )
    con = duckdb.connect(db)
    where = {
        r[0]: r[1]
        for r in con.execute(
            "SELECT function_name, schema_name FROM duckdb_functions() "
            "WHERE function_name IN ('freq_score', 'freq_unseen')"
        ).fetchall()
    }
    assert where == {"freq_score": "mart", "freq_unseen": "mart"}
    con.close()


def test_a_changed_spec_is_held_unless_promoted(tmp_path: Path) -> None:
    # issue 13: an ad-hoc `fit --name M --only type` over a live model went live at once,
    # skipping the gates its spec file had, and changed the macro's arguments from 4 to 1
    from indb.errors import DeploymentWarning

    db = str(tmp_path / "s.duckdb")
    _write(db, "ships", _ships())

    def live() -> int:
        return int(_query(db, "SELECT live_version FROM indb_registry.model")["live_version"][0])

    first = _fit_ships(db, name="ship_damage")
    assert first.deployment["promoted"] is True  # a first version goes live
    with pytest.warns(DeploymentWarning, match=r"recorded held.*differs.*in predictors"):
        adhoc = _fit_ships(db, name="ship_damage", predictors=["type"], reference={"type": "A"})
    assert adhoc.deployment["promoted"] is False and live() == 1
    # the macro keeps its four arguments and version 1's means (the view's, which
    # statsmodels checks in test_round_trip_versions_compare_promote_rollback_drop)
    both = _query(
        db,
        "SELECT score_mean, ship_damage_score(type, built, operated, service) AS m "
        "FROM ship_damage",
    )
    assert_allclose(both["m"], both["score_mean"], rtol=1e-12)
    # the same spec as the live version on changed data goes live (a refit)
    _query(db, "DELETE FROM ships WHERE row_id = 3")
    refit = _fit_ships(db, name="ship_damage")
    assert refit.deployment["promoted"] is True and live() == 3
    # asked for, the changed spec goes live, and the changed scoring inputs are named
    with pytest.warns(DeploymentWarning, match=r"scoring inputs change from \(type, built"):
        asked = _fit_ships(
            db, name="ship_damage", predictors=["type"], reference={"type": "A"}, promote=True
        )
    assert asked.deployment["promoted"] is True and live() == 4


def test_a_registry_written_by_indb_0_1_gets_todays_names(db: str) -> None:
    # indb 0.1 named three registry columns and six result keys otherwise: rebuild that
    # layout from a version written today, then record a second version over it.
    _write(db, "ships", _ships())
    v1 = _fit_ships(db, name="ship_damage")
    earlier = {"wald": "statistic", "p_two_sided": "p_value", "residual_df": "df_resid"}
    stored = v1.to_dict()
    for c in stored["coefficients"]:
        for new, old in (("wald", "statistic"), ("p_two_sided", "p_value")):
            c[old] = c.pop(new)
        c["ci_low"], c["ci_high"] = c.pop("lower_bound"), c.pop("upper_bound")
    stored["df_model"], stored["df_resid"] = stored.pop("model_df"), stored.pop("residual_df")
    with duckdb.connect(db) as con:
        for table, new in (("version_term", "wald"), ("version_term", "p_two_sided")):
            con.execute(f"ALTER TABLE indb_registry.{table} RENAME {new} TO {earlier[new]}")
        con.execute("ALTER TABLE indb_registry.model_version RENAME residual_df TO df_resid")
        con.execute("UPDATE indb_registry.model_version SET result_json = ?", [json.dumps(stored)])

    with _registry(db) as reg:  # reading needs no change to the tables
        old = reg.load("ship_damage", 1)
    assert_array_equal(old.estimates, v1.estimates)
    assert [c.lower_bound for c in old.coefficients] == [c.lower_bound for c in v1.coefficients]
    assert (old.residual_df, old.model_df) == (v1.residual_df, v1.model_df)

    v2 = _fit_ships(db, name="ship_damage", new_version=True)
    assert v2.deployment["version"] == 2
    columns = _query(
        db,
        "SELECT table_name, column_name FROM information_schema.columns "
        "WHERE table_schema = 'indb_registry' AND table_name IN ('version_term', "
        "'model_version')",
    )
    names = set(columns["column_name"])
    assert {"wald", "p_two_sided", "residual_df"} <= names
    assert not names & set(earlier.values())
    terms = _query(db, "SELECT version, wald FROM indb_registry.version_term ORDER BY 1")
    # version 1's row was renamed in place: its Wald values are still there
    assert_allclose(
        terms[terms["version"] == 1]["wald"].to_numpy(), [c.wald for c in v1.coefficients]
    )


def test_a_scoring_source_without_the_inputs_is_refused_before_the_fit(db: str) -> None:
    # version 1 scores from a query with only its own inputs; a promoted refit that also
    # reads 'operated' would fail to build its view after the whole fit: refused first.
    _write(db, "ships", _ships())
    scored = "SELECT type, built, service FROM ships"
    v1 = _fit_ships(
        db,
        name="ship_damage",
        predictors=["type", "built"],
        score_source=scored,
        reference={"type": "A", "built": "1960-64"},
    )
    assert v1.deployment["promoted"]
    calls: list[str] = []

    class Counting(DuckDBEngine):
        def fetch_columns(self, sql: str):  # every scan goes through here
            calls.append(sql)
            return super().fetch_columns(sql)

    engine = Counting(db)
    try:
        with pytest.raises(SpecError, match=r"lacks model input column\(s\) \['operated'\]"):
            _fit_ships(engine, name="ship_damage", promote=True)
    finally:
        engine.close()
    # the registry's own catalog reads went through, but no query read the data
    assert calls and not [sql for sql in calls if '"ships"' in sql]
    with _registry(db) as reg:
        assert [v["version"] for v in reg.versions("ship_damage")] == [1]
    # held (promote=False) needs no view, so nothing to check
    held = _fit_ships(db, name="ship_damage", promote=False)
    assert held.deployment == {**held.deployment, "version": 2, "promoted": False}
