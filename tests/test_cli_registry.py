"""The registry side of the ``indb`` command line, end to end on real DuckDB files.

Commands: ``fit --name`` (and its companions), ``models``, ``versions``, ``show``,
``compare``, ``promote``, ``drop``, ``scoring-sql``, ``run`` and ``retrain``; exit codes
and output content are asserted. Data: the ship damage incidents of McCullagh & Nelder
(*Generalized Linear Models*, 2nd ed., 1989, section 6.3.2) as stored in statsmodels' test
data (``discrete/tests/results/ships.csv``). Oracle for predictions: statsmodels GLM.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from click.testing import CliRunner, Result
from numpy.testing import assert_allclose
from reference_cases import ships_registry_frame as _ships

from indb.cli import main

INDB = Path(sys.executable).parent / "indb"
COEF_RTOL = 1e-6  # same likelihood equations, both converged (task brief for the fitter)
FIT = [
    "fit",
    "--family",
    "poisson",
    "--response",
    "accident",
    "--offset",
    "ln(service)",
    "--exclude",
    "row_id",
    "--reference",
    "type=A",
    "--reference",
    "built=1960-64",
    "--reference",
    "operated=1960-74",
]


def _write(db: Path | str, table: str, frame: pd.DataFrame) -> None:
    with duckdb.connect(str(db)) as con:
        con.register("frame", frame)
        con.execute(f'CREATE OR REPLACE TABLE "{table}" AS SELECT * FROM frame')
        con.unregister("frame")


def _run(*args: str) -> Result:
    return CliRunner().invoke(main, [str(a) for a in args])


def _ok(result: Result) -> Result:
    assert result.exit_code == 0, (result.exit_code, result.stdout, result.stderr)
    return result


def _error(result: Result, code: int, *needles: str) -> str:
    assert result.exit_code == code, (result.exit_code, result.stdout, result.stderr)
    assert result.stdout == "" and "Traceback" not in result.stderr
    lines = result.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("indb: error:"), result.stderr
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    return lines[0]


def _oracle(frame: pd.DataFrame, coefficients: list[dict[str, Any]]) -> tuple[Any, Any]:
    """statsmodels Poisson, offset ln(service), on the design of indb's JSON terms."""
    cols: dict[str, Any] = {}
    for c in coefficients:
        if not c["columns"]:
            cols[c["term"]] = np.ones(len(frame))
        else:
            cols[c["term"]] = (frame[c["columns"][0]] == c["levels"][0]).astype(float).to_numpy()
    exog = pd.DataFrame(cols, index=frame.index)
    fitted = sm.GLM(
        frame["accident"], exog, family=sm.families.Poisson(), offset=np.log(frame["service"])
    ).fit(tol=1e-12)
    return exog, fitted


@pytest.fixture(scope="module")
def prepared(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A database with version 1 (live, all ships) and version 2 (held, type E left out)."""
    path = tmp_path_factory.mktemp("prepared") / "models.duckdb"
    ships = _ships()
    _write(path, "ships", ships)
    _ok(_run(*FIT, "--db", path, "--name", "ship_damage", "-q", "ships"))
    _write(path, "ships", ships[ships["type"] != "E"])
    _ok(_run(*FIT, "--db", path, "--name", "ship_damage", "--hold", "-q", "ships"))
    return path


@pytest.fixture
def db(prepared: Path, tmp_path: Path) -> Path:
    """A fresh copy of the prepared database for each test."""
    target = tmp_path / "models.duckdb"
    shutil.copy(prepared, target)
    return target


# -- fit --name ---------------------------------------------------------------------


def test_fit_with_name_writes_back_text_and_json(tmp_path: Path):
    path = tmp_path / "models.duckdb"
    ships = _ships()
    _write(path, "ships", ships)
    text = _ok(_run(*FIT, "--db", path, "--name", "ship_damage", "ships"))
    assert "CAUTION" in text.stdout
    assert text.stdout.rstrip().endswith(
        "Model ship_damage: version 1 is live; scoring view ship_damage (predicted mean in "
        "column score_mean), scoring macro ship_damage_score."
    )
    assert "indb: iteration" in text.stderr

    as_json = _ok(
        _run(
            *FIT,
            "--db",
            path,
            "--name",
            "ship_damage",
            "--new-version",
            "--hold",
            "--intervals",
            "--json",
            "ships",
        )
    )
    out = json.loads(as_json.stdout)
    assert out["scoring_view"] == "ship_damage" and out["mean_column"] == "score_mean"
    assert out["deployment"]["version"] == 2 and out["deployment"]["promoted"] is False
    assert as_json.stderr == ""
    # The live view (version 1) scores like statsmodels.
    exog, oracle = _oracle(ships, out["coefficients"])
    with duckdb.connect(str(path)) as con:
        view = con.execute("SELECT score_mean FROM ship_damage ORDER BY row_id").df()
    expected = oracle.predict(exog, offset=np.log(ships["service"]))
    assert_allclose(view["score_mean"].to_numpy(), expected.to_numpy(), rtol=COEF_RTOL)

    # the same spec on unchanged data matches the newest version (the held version 2)
    same = _ok(_run(*FIT, "--db", path, "--name", "ship_damage", "-q", "ships"))
    assert "same spec and data as version 2 (held)" in same.stdout


def test_fit_progress_json_lines(tmp_path: Path):
    path = tmp_path / "models.duckdb"
    _write(path, "ships", _ships())
    result = _ok(_run(*FIT, "--db", path, "--progress-json", "--json", "-q", "ships"))
    out = json.loads(result.stdout)
    lines = [json.loads(line) for line in result.stderr.splitlines()]
    # the pre-fit scans (profile, levels...) come first, numbered, with no deviance yet;
    # the iteration log keeps the fit's own scans
    prepare = [r for r in lines if r["phase"] == "prepare"]
    assert prepare == lines[: len(prepare)] and len(prepare) >= 3
    assert [r["iteration"] for r in prepare] == list(range(1, len(prepare) + 1))
    assert all(r["deviance"] is None and r["seconds"] >= 0 for r in prepare)
    records = lines[len(prepare) :]
    assert len(records) == len(out["iteration_log"]) >= 2
    assert [r["iteration"] for r in records] == [r["iteration"] for r in out["iteration_log"]]
    assert set(records[0]) == {
        "iteration",
        "deviance",
        "relative_change",
        "step_halvings",
        "seconds",
        "phase",
    }
    assert_allclose(records[-1]["deviance"], out["iteration_log"][-1]["deviance"], rtol=1e-15)


def test_fit_dry_run_prints_sql_and_writes_nothing(tmp_path: Path):
    path = tmp_path / "models.duckdb"
    _write(path, "ships", _ships())
    result = _ok(_run(*FIT, "--db", path, "--name", "ship_damage", "--dry-run", "ships"))
    assert "-- IRLS scan" in result.stdout and "SELECT" in result.stdout
    assert "nothing was written" in result.stdout
    as_json = _ok(_run(*FIT, "--db", path, "--dry-run", "--json", "ships"))
    assert json.loads(as_json.stdout)["sql"]
    with duckdb.connect(str(path)) as con:
        views = con.execute("SELECT view_name FROM duckdb_views() WHERE NOT internal").fetchall()
        schemas = con.execute("SELECT schema_name FROM duckdb_schemas()").fetchall()
    assert views == [] and ("indb_registry",) not in schemas


def test_deploy_options_need_name_and_database(tmp_path: Path):
    path = tmp_path / "models.duckdb"
    _write(path, "ships", _ships())
    _error(_run(*FIT, "--db", path, "--hold", "--intervals", "ships"), 2, "--hold", "--name")
    # the message names each option as typed: the name's spelling, a switch's off form
    _error(
        _run(*FIT, "--db", path, "--no-promote", "--no-intervals", "ships"),
        2,
        "--no-promote, --no-intervals apply only when",
        "--name",
    )
    parquet = tmp_path / "ships.parquet"
    _ships().to_parquet(parquet)
    _error(_run(*FIT, "--name", "ship_damage", parquet), 2, "--db")
    _error(_run(*FIT, "--db", path, "--name", "1bad", "ships"), 2, "1bad")

    # A named fit of a Parquet file may create the database it writes to.
    new_db = tmp_path / "new.duckdb"
    result = _ok(_run(*FIT, "--db", new_db, "--name", "ship_damage", "-q", parquet))
    assert "version 1 is live" in result.stdout and new_db.exists()


@pytest.mark.parametrize("hold", ["--no-promote", "--hold"])
def test_a_version_recorded_but_not_made_live(db: Path, hold: str):
    # --no-promote (promote=False in Python) and its former spelling --hold: version 3 is
    # recorded and held, version 1 keeps serving the view
    with duckdb.connect(str(db)) as con:
        before = con.execute("SELECT * FROM ship_damage ORDER BY row_id").fetchall()
    text = _ok(_run(*FIT, "--db", db, "--name", "ship_damage", hold, "--new-version", "ships"))
    assert "version 3 recorded but not live" in text.stdout
    lines = _ok(_run("versions", "ship_damage", "--db", db)).stdout.splitlines()[1:]
    assert [line.split()[1] for line in lines] == ["live", "held", "held"]
    with duckdb.connect(str(db)) as con:
        assert con.execute("SELECT * FROM ship_damage ORDER BY row_id").fetchall() == before


# -- registry commands --------------------------------------------------------------


def test_models_and_versions(db: Path, tmp_path: Path):
    text = _ok(_run("models", "--db", db)).stdout.splitlines()
    assert text[0].split() == ["model", "live", "version", "versions", "scoring", "view"]
    assert text[1].split() == ["ship_damage", "1", "2", "ship_damage"]
    out = json.loads(_ok(_run("models", "--db", db, "--json")).stdout)
    assert out["models"][0]["model"] == "ship_damage"
    assert out["models"][0]["live_version"] == 1 and out["models"][0]["versions"] == 2

    lines = _ok(_run("versions", "ship_damage", "--db", db)).stdout.splitlines()
    assert "deviance" in lines[0] and "iterations" in lines[0] and "converged" in lines[0]
    rows = [line.split() for line in lines[1:]]
    assert [(r[0], r[1]) for r in rows] == [("1", "live"), ("2", "held")]
    assert [r[4:6] for r in rows] == [["poisson", "log"], ["poisson", "log"]]
    n_e = int((_ships()["type"] == "E").sum())
    assert [int(r[7]) for r in rows] == [len(_ships()), len(_ships()) - n_e]
    out = json.loads(_ok(_run("versions", "ship_damage", "--db", db, "--json")).stdout)
    assert [v["status"] for v in out["versions"]] == ["live", "held"]

    empty = tmp_path / "empty.duckdb"
    duckdb.connect(str(empty)).close()
    assert "No models" in _ok(_run("models", "--db", empty)).stdout
    assert json.loads(_ok(_run("models", "--db", empty, "--json")).stdout) == {"models": []}
    _error(_run("versions", "nope", "--db", db), 7, "nope", "ship_damage")
    missing = tmp_path / "typo.duckdb"
    _error(_run("models", "--db", missing), 2, "typo.duckdb")
    assert not missing.exists()


def test_show_prints_the_stored_report(db: Path):
    live = _ok(_run("show", "ship_damage", "--db", db)).stdout
    assert live.startswith("Model ship_damage, version 1 (live)")
    assert "CAUTION" in live and "type=E" in live
    held = _ok(_run("show", "ship_damage", "--version", "2", "--db", db)).stdout
    assert held.startswith("Model ship_damage, version 2 (held)") and "type=E" not in held

    out = json.loads(_ok(_run("show", "ship_damage", "--db", db, "--json")).stdout)
    assert (out["model"], out["version"], out["status"]) == ("ship_damage", 1, "live")
    exog, oracle = _oracle(_ships(), out["coefficients"])
    estimates = [c["estimate"] for c in out["coefficients"]]
    assert_allclose(estimates, oracle.params.to_numpy(), rtol=COEF_RTOL)
    _error(_run("show", "ship_damage", "--version", "9", "--db", db), 7, "no version 9")


def test_compare_two_versions(db: Path):
    text = _ok(_run("compare", "ship_damage", "1", "2", "--db", db)).stdout
    assert text.startswith("Model ship_damage: version 1 compared with version 2")
    assert "change in SE of v1" in text and "deviance per row" in text
    type_e = next(line for line in text.splitlines() if line.startswith("type=E"))
    assert type_e.split()[2:5] == ["n/a", "n/a", "n/a"]  # the term is gone in version 2

    cmp = json.loads(_ok(_run("compare", "ship_damage", "1", "2", "--db", db, "--json")).stdout)
    v1 = json.loads(_ok(_run("show", "ship_damage", "--version", "1", "--db", db, "--json")).stdout)
    v2 = json.loads(_ok(_run("show", "ship_damage", "--version", "2", "--db", db, "--json")).stdout)
    est2 = {c["term"]: c["estimate"] for c in v2["coefficients"]}
    for term, c1 in zip(cmp["terms"], v1["coefficients"], strict=True):
        if term["term"] == "type=E":
            assert term["change"] is None  # JSON null, not NaN
            continue
        assert_allclose(term["change"], est2[term["term"]] - c1["estimate"], rtol=1e-12)
        assert_allclose(term["change_in_se"], term["change"] / c1["std_error"], rtol=1e-12)
    assert cmp["rows"] == [v1["n_used"], v2["n_used"]]
    assert_allclose(
        cmp["deviance_per_row"],
        [v1["deviance"] / v1["n_used"], v2["deviance"] / v2["n_used"]],
        rtol=1e-12,
    )
    _error(_run("compare", "ship_damage", "1", "5", "--db", db), 7, "no version 5")


def test_promote_roll_back_and_drop(db: Path):
    promoted = _ok(_run("promote", "ship_damage", "2", "--db", db)).stdout
    assert "version 2 is live (was version 1)" in promoted
    lines = _ok(_run("versions", "ship_damage", "--db", db)).stdout.splitlines()[1:]
    assert [line.split()[1] for line in lines] == ["retired", "live"]
    with duckdb.connect(str(db)) as con:
        # version 2 has no type E term: a type E ship scores like type A (the reference).
        e_row, a_row = con.execute(
            "SELECT ship_damage_score(t, '1970-74', '1975-79', 1000.0) FROM "
            "(VALUES ('E'), ('A')) v(t)"
        ).fetchall()
    assert e_row == a_row

    back = json.loads(_ok(_run("promote", "ship_damage", "1", "--db", db, "--json")).stdout)
    assert back == {
        "model": "ship_damage",
        "live_version": 1,
        "previous_live_version": 2,
        "scoring_view": "ship_damage",
    }
    assert "version 2 dropped" in _ok(_run("drop", "ship_damage", "2", "--db", db)).stdout
    _error(_run("drop", "ship_damage", "1", "--db", db), 7, "live")
    _error(_run("promote", "ship_damage", "2", "--db", db), 7, "dropped")
    _error(_run("promote", "nope", "1", "--db", db), 7, "nope")
    usage = _run("promote", "ship_damage", "two", "--db", db)
    assert usage.exit_code == 2 and "two" in usage.stderr


def test_scoring_sql_runs_elsewhere(db: Path):
    sql = _ok(_run("scoring-sql", "ship_damage", "--db", db)).stdout
    assert sql.startswith('CREATE OR REPLACE VIEW "ship_damage" AS SELECT')
    assert sql.rstrip().endswith(";")
    # "Elsewhere": a fresh in-memory database holding a table of the same name and columns.
    ships = _ships()
    con = duckdb.connect()
    con.register("frame", ships)
    con.execute("CREATE TABLE ships AS SELECT * FROM frame")
    con.execute(sql)
    got = con.execute("SELECT * FROM ship_damage ORDER BY row_id").df()
    v1 = json.loads(_ok(_run("show", "ship_damage", "--db", db, "--json")).stdout)
    exog, oracle = _oracle(ships, v1["coefficients"])
    expected = oracle.predict(exog, offset=np.log(ships["service"]))
    assert_allclose(got["score_mean"].to_numpy(), expected.to_numpy(), rtol=COEF_RTOL)
    assert "score_se_eta" not in got.columns

    # Another version, another source, with intervals.
    sql2 = _ok(
        _run(
            "scoring-sql",
            "ship_damage",
            "--version",
            "2",
            "--source",
            "SELECT * FROM ships WHERE type <> 'E'",
            "--intervals",
            "--db",
            db,
        )
    ).stdout
    con.execute(sql2)
    got2 = con.execute("SELECT * FROM ship_damage ORDER BY row_id").df()
    con.close()
    assert {"score_se_eta", "score_mean_low", "score_mean_high"} <= set(got2.columns)
    assert len(got2) == int((ships["type"] != "E").sum())

    out = json.loads(_ok(_run("scoring-sql", "ship_damage", "--db", db, "--json")).stdout)
    assert out["version"] == 1 and out["dialect"] == "duckdb" and out["sql"] == sql.rstrip()[:-1]
    _error(
        _run("scoring-sql", "ship_damage", "--dialect", "oracle9", "--db", db),
        2,
        "oracle9",
        "supported: duckdb",
    )


# -- spec files, exit codes ---------------------------------------------------------

SPEC = """\
[model]
source = "ships"
response = "accident"
family = "poisson"
offset = "ln(service)"
exclude = ["row_id"]

[deploy]
name = "ship_damage"

[gates]
max_relative_change = 0.0001

[engine]
db = "models.duckdb"
"""


def test_run_then_retrain_held_back_in_a_real_process(tmp_path: Path):
    (tmp_path / "spec.toml").write_text(SPEC, encoding="utf-8")
    db = tmp_path / "models.duckdb"
    ships = _ships()
    _write(db, "ships", ships)
    ran = _ok(_run("run", "-q", tmp_path / "spec.toml"))
    assert "version 1 is live" in ran.stdout
    unchanged = _ok(_run("retrain", "-q", tmp_path / "spec.toml"))
    assert "unchanged" in unchanged.stdout

    _write(db, "ships", ships[ships["row_id"] != 3])
    proc = subprocess.run(
        [str(INDB), "retrain", "-q", str(tmp_path / "spec.toml")],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 6, (proc.stdout, proc.stderr)
    assert "HELD BACK" in proc.stdout and "max_relative_change" in proc.stdout
    assert proc.stderr == ""
    lines = _ok(_run("versions", "ship_damage", "--db", db)).stdout.splitlines()[1:]
    assert [line.split()[1] for line in lines] == ["live", "held"]


# -- deployment settings on an unchanged refit (issue 11, item 10) -------------------------


def _model_row(db: Path) -> tuple[Any, ...]:
    with duckdb.connect(str(db), read_only=True) as con:
        return con.execute(
            "SELECT live_version, view_schema, intervals FROM indb_registry.model"
        ).fetchone()


def _assert_view_scores(db: Path, view: str, coefficients: list[dict[str, Any]]) -> None:
    """The view's mean and 95% interval columns equal statsmodels' on the ships rows."""
    ships = _ships()
    exog, oracle = _oracle(ships, coefficients)
    offset = np.log(ships["service"])
    with duckdb.connect(str(db), read_only=True) as con:
        got = con.execute(f"SELECT * FROM {view} ORDER BY row_id").df()
    mean = oracle.predict(exog, offset=offset)
    assert_allclose(got["score_mean"].to_numpy(), mean.to_numpy(), rtol=COEF_RTOL)
    # statsmodels' interval for the mean: the inverse link of eta's normal interval, as the
    # view computes it (tolerance as tests/test_scoring.py's CI_RTOL)
    frame = oracle.get_prediction(exog, offset=offset).summary_frame(alpha=0.05)
    assert_allclose(got["score_mean_low"].to_numpy(), frame["mean_ci_lower"], rtol=1e-6)
    assert_allclose(got["score_mean_high"].to_numpy(), frame["mean_ci_upper"], rtol=1e-6)


def _coefficients(db: Path, version: int) -> list[dict[str, Any]]:
    shown = _ok(_run("show", "ship_damage", "--db", db, "--version", version, "--json"))
    return json.loads(shown.stdout)["coefficients"]


def test_unchanged_fit_applies_new_intervals_and_view_schema(tmp_path: Path):
    db = tmp_path / "models.duckdb"
    _write(db, "ships", _ships())
    named = [*FIT, "--db", db, "--name", "ship_damage", "-q"]
    _ok(_run(*named, "ships"))
    # The same spec on the same data, asking for intervals: this used to answer "same spec
    # and data as version 1" and leave the view without them.
    out = json.loads(_ok(_run(*named, "--intervals", "--json", "ships")).stdout)
    assert out["deployment"]["version"] == 2 and out["deployment"]["created"] is True
    assert _model_row(db) == (2, None, True)
    _assert_view_scores(db, "ship_damage", out["coefficients"])
    # Asked again, nothing differs: no new version.
    again = _ok(_run(*named, "--intervals", "ships"))
    assert "same spec and data as version 2 (live)" in again.stdout

    moved = json.loads(_ok(_run(*named, "--view-schema", "mart", "--json", "ships")).stdout)
    assert moved["deployment"]["version"] == 3 and moved["scoring_view"] == "mart.ship_damage"
    assert _model_row(db) == (3, "mart", True)
    _assert_view_scores(db, "mart.ship_damage", moved["coefficients"])
    # Left out, --view-schema keeps the model's schema: unchanged again.
    assert "same spec and data as version 3 (live)" in _ok(_run(*named, "ships")).stdout


def test_unchanged_retrain_applies_a_changed_deploy_table(tmp_path: Path):
    spec = tmp_path / "spec.toml"
    spec.write_text(SPEC, encoding="utf-8")
    db = tmp_path / "models.duckdb"
    _write(db, "ships", _ships())
    _ok(_run("run", "-q", spec))
    assert "unchanged" in _ok(_run("retrain", "-q", spec)).stdout

    deploy = '[deploy]\nname = "ship_damage"\n'
    spec.write_text(SPEC.replace(deploy, deploy + "intervals = true\n"), encoding="utf-8")
    out = json.loads(_ok(_run("retrain", "--json", "-q", spec)).stdout)
    assert (out["status"], out["version"], out["previous_version"]) == ("promoted", 2, 1)
    assert _model_row(db) == (2, None, True)
    _assert_view_scores(db, "ship_damage", _coefficients(db, 2))
    assert "unchanged" in _ok(_run("retrain", "-q", spec)).stdout

    changed = deploy + 'intervals = true\nview_schema = "mart"\n'
    spec.write_text(SPEC.replace(deploy, changed), encoding="utf-8")
    out = json.loads(_ok(_run("retrain", "--json", "-q", spec)).stdout)
    assert (out["status"], out["version"]) == ("promoted", 3)
    assert out["scoring_view"] == "mart.ship_damage"
    _assert_view_scores(db, "mart.ship_damage", _coefficients(db, 3))
    assert "unchanged" in _ok(_run("retrain", "-q", spec)).stdout


def test_help_documents_exit_codes():
    text = _ok(_run("--help")).stdout
    assert "Exit codes" in text
    for code, words in [
        ("0", "success"),
        ("2", "input error"),
        ("3", "engine error"),
        ("5", "converge"),
        ("6", "held back"),
        ("7", "registry conflict"),
    ]:
        assert any(
            line.strip().startswith(f"{code}  ") and words in line for line in text.splitlines()
        ), code
    for command in ("models", "versions", "show", "compare", "promote", "drop", "scoring-sql"):
        assert command in text


def test_small_frictions_of_the_registry_commands(tmp_path: Path):
    # issue 13: promoting the live version said "(was version 1)" about itself; a misspelt
    # response column gets a suggestion
    path = tmp_path / "models.duckdb"
    _write(path, "ships", _ships())
    assert _run(*FIT, "--db", path, "--name", "ships_m", "ships").exit_code == 0
    again = _run("promote", "ships_m", "1", "--db", path)
    assert again.exit_code == 0, again.output
    assert "version 1 was already live" in again.stdout and "was version" not in again.stdout
    wrong = [a if a != "accident" else "acident" for a in FIT]
    _error(_run(*wrong, "--db", path, "ships"), 2, "did you mean 'accident'?")
