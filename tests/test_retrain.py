"""Spec files and scheduled retraining: parsing errors, first run, unchanged data, warm
starts, promotion gates and their exit codes, dry runs, and ``indb run``.

Data: the ship damage incidents of McCullagh & Nelder (*Generalized Linear Models*, 2nd ed.,
1989, section 6.3.2) as stored in statsmodels' test data (``discrete/tests/results/
ships.csv``); Poisson with offset ln(months of service). "Changed data" is the same table
with some rows removed. Oracle: statsmodels GLM. Every test gets a fresh DuckDB file (and
spec file) in ``tmp_path``.
"""

from __future__ import annotations

import json
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

import indb
from indb.cli import main
from indb.errors import SpecError
from indb.results import FitResult
from indb.retrain import EXIT_HELD, retrain
from indb.specfile import load_spec_file

COEF_RTOL = 1e-6  # same likelihood equations, both converged (task brief for the fitter)
REFERENCE = {"type": "A", "built": "1960-64", "operated": "1960-74"}
# Rows removed for "changed data": a handful, so coefficients move but stay close.
CHANGED = (3, 11, 26)

SPEC = """\
[model]
source = "ships"
response = "accident"
family = "poisson"
offset = "ln(service)"
exclude = ["row_id"]
reference = {{ type = "A", built = "1960-64", operated = "1960-74" }}

[deploy]
name = "ship_damage"

[gates]
{gates}

[engine]
db = "models.duckdb"
"""


def _write(db: Path, frame: pd.DataFrame) -> None:
    with duckdb.connect(str(db)) as con:
        con.register("frame", frame)
        con.execute("CREATE OR REPLACE TABLE ships AS SELECT * FROM frame")
        con.unregister("frame")


def _setup(tmp_path: Path, gates: str = "") -> tuple[Path, Path]:
    """A spec file and its database holding the ships table."""
    spec = tmp_path / "ship_damage.toml"
    spec.write_text(SPEC.format(gates=gates), encoding="utf-8")
    db = tmp_path / "models.duckdb"
    _write(db, _ships())
    return spec, db


def _change_data(db: Path) -> pd.DataFrame:
    changed = _ships()
    changed = changed[~changed["row_id"].isin(CHANGED)].reset_index(drop=True)
    _write(db, changed)
    return changed


def _oracle(frame: pd.DataFrame, res: FitResult) -> tuple[pd.DataFrame, Any]:
    cols: dict[str, Any] = {}
    for c in res.coefficients:
        if not c.columns:
            cols[c.term] = np.ones(len(frame))
        else:
            cols[c.term] = (frame[c.columns[0]] == c.levels[0]).astype(float).to_numpy()
    exog = pd.DataFrame(cols, index=frame.index)
    fitted = sm.GLM(
        frame["accident"], exog, family=sm.families.Poisson(), offset=np.log(frame["service"])
    ).fit(tol=1e-12)
    return exog, fitted


def _view(db: Path) -> pd.DataFrame:
    with duckdb.connect(str(db)) as con:
        return con.execute("SELECT row_id, score_mean FROM ship_damage ORDER BY row_id").df()


def _registry_rows(db: Path) -> dict[str, list[tuple[Any, ...]]]:
    with duckdb.connect(str(db)) as con:
        names = [
            r[0]
            for r in con.execute(
                "SELECT table_name FROM duckdb_tables() WHERE schema_name = 'indb_registry'"
            ).fetchall()
        ]
        out = {
            n: con.execute(f'SELECT * FROM indb_registry."{n}" ORDER BY ALL').fetchall()
            for n in names
        }
        out["views"] = con.execute(
            "SELECT view_name, sql FROM duckdb_views() WHERE NOT internal ORDER BY ALL"
        ).fetchall()
        return out


def _load(db: Path, version: int | None = None) -> FitResult:
    reg = indb.api.registry(str(db))
    try:
        return reg.load("ship_damage", version)
    finally:
        reg.engine.close()


def _run(*args: str) -> Result:
    return CliRunner().invoke(main, list(args))


# -- spec files -----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "needles"),
    [
        (
            '[model]\nsource = "ships"\nresponse = "accident"\nfamly = "poisson"\n',
            ["unknown key", "famly", "[model]"],
        ),
        ('[model]\nresponse = "accident"\n', ["[model] needs source"]),
        ('[model]\nsource = "ships"\nresponse = "y"\n[schedule]\nat = 1\n', ["schedule"]),
        (
            '[model]\nsource = "ships"\nresponse = "y"\n[gates]\nmax_change = 0.1\n',
            ["max_change", "[gates]", "max_relative_change"],
        ),
        ('[model\nsource = "ships"\n', ["not valid TOML"]),
    ],
)
def test_spec_file_errors_name_the_problem(tmp_path: Path, text: str, needles: list[str]):
    path = tmp_path / "bad.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError) as err:
        load_spec_file(str(path))
    for needle in needles:
        assert needle in str(err.value)
    # The command line says the same in one line and exits 2 (input error).
    result = _run("retrain", str(path))
    assert result.exit_code == 2, result.output
    assert result.stderr.startswith("indb: error:") and needles[0] in result.stderr
    assert result.stdout == ""


def test_spec_without_name_or_database_is_refused(tmp_path: Path):
    no_name = tmp_path / "no_name.toml"
    no_name.write_text(
        '[model]\nsource = "ships"\nresponse = "accident"\n[engine]\ndb = "x.duckdb"\n'
    )
    result = _run("retrain", str(no_name))
    assert result.exit_code == 2 and "[deploy] needs a model name" in result.stderr
    no_db = tmp_path / "no_db.toml"
    no_db.write_text('[model]\nsource = "ships"\nresponse = "accident"\n[deploy]\nname = "m"\n')
    for command in ("run", "retrain"):
        result = _run(command, str(no_db))
        assert result.exit_code == 2 and "[engine] has no db" in result.stderr, result.stderr
    assert not (tmp_path / "x.duckdb").exists()


# -- retraining -----------------------------------------------------------------------


def test_first_run_promotes_and_unchanged_data_keeps_the_version(tmp_path: Path):
    spec_path, db = _setup(tmp_path)
    spec = load_spec_file(str(spec_path))

    first = retrain(spec)
    assert (first.status, first.version, first.exit_code) == ("first", 1, 0)
    assert first.previous_version is None and first.previous_iterations is None
    ships = _ships()
    exog, oracle = _oracle(ships, first.result)
    assert_allclose(first.result.estimates, oracle.params.to_numpy(), rtol=COEF_RTOL)
    expected = oracle.predict(exog, offset=np.log(ships["service"]))
    assert_allclose(_view(db)["score_mean"].to_numpy(), expected.to_numpy(), rtol=COEF_RTOL)

    before = _registry_rows(db)
    again = retrain(spec)
    assert (again.status, again.version, again.exit_code) == ("unchanged", 1, 0)
    # Started at the answer, IRLS only has to confirm it.
    assert again.iterations < first.iterations
    assert _registry_rows(db) == before


def test_changed_data_within_gates_promotes_with_a_warm_start(tmp_path: Path):
    gates = "max_change_in_se = 3.0\nmax_deviance_per_row_increase = 1.0\nmin_rows = 20"
    spec_path, db = _setup(tmp_path, gates)
    spec = load_spec_file(str(spec_path))
    first = retrain(spec)
    assert first.status == "first"
    changed = _change_data(db)

    out = retrain(spec)
    assert (out.status, out.version, out.previous_version, out.exit_code) == (
        "promoted",
        2,
        1,
        0,
    )
    assert {c.gate for c in out.checks} == {
        "require_converged",
        "min_rows",
        "max_change_in_se",
        "max_deviance_per_row_increase",
    }
    assert all(c.passed for c in out.checks)
    # The same fit from a cold start needs more IRLS iterations than the warm start ...
    cold = indb.fit(
        "ships",
        "accident",
        "poisson",
        db=str(db),
        offset="ln(service)",
        exclude=["row_id"],
        reference=REFERENCE,
    )
    assert out.iterations < cold.iterations
    assert out.previous_iterations == first.iterations
    # ... and reaches the same answer, which is statsmodels' on the changed data.
    assert_allclose(out.result.estimates, cold.estimates, rtol=COEF_RTOL)
    exog, oracle = _oracle(changed, out.result)
    assert_allclose(out.result.estimates, oracle.params.to_numpy(), rtol=COEF_RTOL)
    expected = oracle.predict(exog, offset=np.log(changed["service"]))
    assert_allclose(_view(db)["score_mean"].to_numpy(), expected.to_numpy(), rtol=COEF_RTOL)
    assert out.comparison["rows"] == [len(_ships()), len(changed)]


def test_failing_gate_holds_back_with_exit_code_6(tmp_path: Path):
    spec_path, db = _setup(tmp_path, "max_relative_change = 0.0001")
    first = _run("retrain", "-q", str(spec_path))
    assert first.exit_code == 0, first.output
    assert "first version 1" in first.stdout
    changed = _change_data(db)

    held = _run("retrain", "-q", str(spec_path))
    assert held.exit_code == EXIT_HELD == 6, held.output
    assert "HELD BACK" in held.stdout and "max_relative_change" in held.stdout
    gate_line = next(ln for ln in held.stdout.splitlines() if ln.startswith("max_relative"))
    assert gate_line.split()[-1] == "FAIL"
    assert "warm-started from version 1" in held.stdout

    with duckdb.connect(str(db)) as con:
        live = con.execute(
            "SELECT live_version FROM indb_registry.model WHERE model_name = 'ship_damage'"
        ).fetchone()[0]
        statuses = con.execute(
            "SELECT version, status FROM indb_registry.model_version ORDER BY version"
        ).fetchall()
    assert live == 1 and statuses == [(1, "live"), (2, "held")]
    # The view still serves version 1: the model fitted on the original data, applied to
    # the rows now in the table.
    ships = _ships()
    v1 = _load(db, 1)
    _, oracle_v1 = _oracle(ships, v1)
    exog_now, _ = _oracle(changed, v1)
    expected = oracle_v1.predict(exog_now, offset=np.log(changed["service"]))
    assert_allclose(_view(db)["score_mean"].to_numpy(), expected.to_numpy(), rtol=COEF_RTOL)

    as_json = _run("retrain", "--json", "-q", str(spec_path))
    assert as_json.exit_code == 6
    out = json.loads(as_json.stdout)
    assert out["status"] == "held" and out["exit_code"] == 6
    assert [g["passed"] for g in out["gates"] if g["gate"] == "max_relative_change"] == [False]

    # issue 13: held versions do not pile up. The same spec on the same data repeats held
    # version 2 and says so; other data give version 3; the data of version 2 again repeat
    # version 2 (an older held version, not the newest)
    again = _run("retrain", "-q", str(spec_path))
    assert again.exit_code == 6, again.output
    assert "match held version 2" in again.stdout and "no new version" in again.stdout
    fewer = changed.iloc[1:].reset_index(drop=True)
    _write(db, fewer)
    assert _run("retrain", "-q", str(spec_path)).exit_code == 6
    _write(db, changed)
    back = _run("retrain", "-q", str(spec_path))
    assert back.exit_code == 6 and "match held version 2" in back.stdout, back.output
    with duckdb.connect(str(db)) as con:
        statuses = con.execute(
            "SELECT version, status FROM indb_registry.model_version ORDER BY version"
        ).fetchall()
    assert statuses == [(1, "live"), (2, "held"), (3, "held")]


def test_dry_run_prints_sql_and_writes_nothing(tmp_path: Path):
    spec_path, db = _setup(tmp_path)
    # Before any version exists (and without creating anything).
    fresh = _run("retrain", "--dry-run", str(spec_path))
    assert fresh.exit_code == 0, fresh.output
    assert "SELECT" in fresh.stdout and "IRLS scan" in fresh.stdout
    assert "nothing was written" in fresh.stdout
    with duckdb.connect(str(db)) as con:
        schemas = con.execute("SELECT schema_name FROM duckdb_schemas()").fetchall()
    assert ("indb_registry",) not in schemas

    assert _run("retrain", "-q", str(spec_path)).exit_code == 0
    _change_data(db)
    before = _registry_rows(db)
    dry = _run("retrain", "--dry-run", "--json", str(spec_path))
    assert dry.exit_code == 0, dry.output
    statements = json.loads(dry.stdout)["sql"]
    assert statements and all("SELECT" in s["sql"].upper() for s in statements)
    assert _registry_rows(db) == before

    # A spec whose database does not exist yet: the dry run does not create the file.
    other = tmp_path / "elsewhere"
    other.mkdir()
    spec_text = spec_path.read_text().replace('source = "ships"', f'source = "{tmp_path}/s.csv"')
    _ships().to_csv(tmp_path / "s.csv", index=False)
    (other / "spec.toml").write_text(spec_text)
    result = _run("retrain", "--dry-run", str(other / "spec.toml"))
    assert result.exit_code == 0, result.output
    assert not (other / "models.duckdb").exists()


def test_run_fits_and_deploys_a_spec_file(tmp_path: Path):
    spec_path, db = _setup(tmp_path)
    result = _run("run", "--json", str(spec_path))
    assert result.exit_code == 0, result.output
    out = json.loads(result.stdout)
    assert out["scoring_view"] == "ship_damage" and out["mean_column"] == "score_mean"
    assert out["deployment"]["version"] == 1 and out["deployment"]["promoted"] is True
    ships = _ships()
    exog, oracle = _oracle(ships, _load(db))
    expected = oracle.predict(exog, offset=np.log(ships["service"]))
    with duckdb.connect(str(db)) as con:
        view = con.execute("SELECT score_mean FROM ship_damage ORDER BY row_id").df()
    assert_allclose(view["score_mean"].to_numpy(), expected.to_numpy(), rtol=COEF_RTOL)

    # A second run on unchanged data records nothing new; --new-version forces one.
    text = _run("run", "-q", str(spec_path))
    assert text.exit_code == 0 and "same spec and data as version 1 (live)" in text.stdout
    forced = _run("run", "-q", "--new-version", str(spec_path))
    assert forced.exit_code == 0 and "version 2 is live" in forced.stdout
