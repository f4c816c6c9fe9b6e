"""Spec files with values of the wrong kind, and database paths that do not exist: refused
before anything runs, with one line naming the key and the kind expected.

Issue 11, item 8: a top-level ``model = "pol"`` or ``deploy = "x"`` raised a ValueError
traceback (exit 1); ``[gates] min_rows = "lots"`` a traceback after the fit; ``intervals =
"no"`` was taken as true; ``run``/``retrain`` created an empty database for a mistyped or
``../`` path where ``fit`` refuses it. Each reproduction now exits 2 with one pinned line,
creates no database file and leaves an existing database exactly as it was (compared by
``robust_support.dump_file``: every table with its rows, view, macro and schema). The
reproductions run the installed command in a real process; the table of every key of every
spec-file table runs through click's runner and the library's loader.

Data: the ship damage incidents of McCullagh & Nelder (*Generalized Linear Models*, 2nd ed.,
1989, section 6.3.2) as stored in statsmodels' test data (``discrete/tests/results/
ships.csv``), for the database the refused specs point at. No numbers are compared here:
every outcome is a refusal (or a load that keeps the values as written).
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pytest
import robust_support as R
import statsmodels
from click.testing import CliRunner, Result
from reference_cases import ships_registry_frame as _ships

import indb
from indb.cli import main
from indb.errors import SpecError
from indb.specfile import TABLES, Gates, load_spec_file

SHIPS_CSV = Path(statsmodels.__file__).parent / "discrete" / "tests" / "results" / "ships.csv"

MODEL = """\
[model]
source = "ships"
response = "accident"
family = "poisson"
offset = "ln(service)"
exclude = ["row_id"]
reference = { type = "A", built = "1960-64", operated = "1960-74" }
"""
DEPLOY = '[deploy]\nname = "ship_damage"\n'
ENGINE = '[engine]\ndb = "models.duckdb"\n'
GOOD = MODEL + DEPLOY + ENGINE


def _write(db: Path, frame: pd.DataFrame) -> None:
    with duckdb.connect(str(db)) as con:
        con.register("frame", frame)
        con.execute("CREATE OR REPLACE TABLE ships AS SELECT * FROM frame")
        con.unregister("frame")


def _run(*args: Any) -> Result:
    return CliRunner().invoke(main, [str(a) for a in args])


def _ok(result: Result) -> Result:
    assert result.exit_code == 0, (result.exit_code, result.stdout, result.stderr)
    return result


def _refused(result: Result | subprocess.CompletedProcess[str], line: str) -> None:
    """Exit 2, nothing on stdout, and exactly ``line`` (after the prefix) on stderr."""
    code = result.exit_code if isinstance(result, Result) else result.returncode
    assert code == 2, (code, result.stdout, result.stderr)
    assert result.stdout == ""
    assert result.stderr.splitlines() == [f"indb: error: {line}"], result.stderr


def _process(*args: Any) -> subprocess.CompletedProcess[str]:
    """The command in a fresh interpreter, as a scheduler runs it."""
    return subprocess.run(
        [sys.executable, "-m", "indb.cli", *map(str, args)],
        capture_output=True,
        text=True,
        timeout=120,
        env={**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)},
    )


@pytest.fixture(scope="module")
def deployed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A database with the ships table and version 1 of ship_damage live (by `indb run`)."""
    folder = tmp_path_factory.mktemp("deployed")
    _write(folder / "models.duckdb", _ships())
    (folder / "spec.toml").write_text(GOOD, encoding="utf-8")
    _ok(_run("run", "-q", folder / "spec.toml"))
    return folder / "models.duckdb"


@pytest.fixture
def db(deployed: Path, tmp_path: Path) -> Path:
    target = tmp_path / "models.duckdb"
    shutil.copy(deployed, target)
    return target


# -- the reproductions of item 8 ------------------------------------------------------------

# (spec text, the error after "spec file PATH: ")
REPRODUCTIONS = {
    "top-level model": (
        'model = "pol"\n' + DEPLOY + ENGINE,
        'top-level key model must be a table ([model] with its keys on the lines below), got "pol"',
    ),
    "top-level deploy": (
        'deploy = "x"\n' + MODEL + ENGINE,
        'top-level key deploy must be a table ([deploy] with its keys on the lines below), got "x"',
    ),
    "gate min_rows as text": (
        GOOD + '[gates]\nmin_rows = "lots"\n',
        '[gates] min_rows must be a whole number, got "lots"',
    ),
    "intervals as text": (
        MODEL + DEPLOY + 'intervals = "no"\n' + ENGINE,
        '[deploy] intervals must be true or false, got "no"',
    ),
}


@pytest.mark.parametrize("command", ["run", "retrain"])
@pytest.mark.parametrize("case", list(REPRODUCTIONS))
def test_reproduction_is_refused_before_anything_runs(
    db: Path, tmp_path: Path, command: str, case: str
):
    text, message = REPRODUCTIONS[case]
    # Next to the deployed database: nothing in it changes.
    spec = tmp_path / "bad.toml"
    spec.write_text(text, encoding="utf-8")
    before = R.dump_file(db)
    _refused(_process(command, spec), f"spec file {spec}: {message}")
    assert R.dump_file(db) == before
    # In a folder without the database: no database file appears.
    empty = tmp_path / "empty"
    empty.mkdir()
    spec = empty / "bad.toml"
    spec.write_text(text, encoding="utf-8")
    _refused(_process(command, spec), f"spec file {spec}: {message}")
    assert list(empty.iterdir()) == [spec]


@pytest.mark.parametrize("command", ["run", "retrain"])
@pytest.mark.parametrize("dry_run", [False, True])
def test_missing_database_path_is_refused_like_fit(
    db: Path, tmp_path: Path, command: str, dry_run: bool
):
    before = R.dump_file(db)
    flags = ["--dry-run"] if dry_run else []
    # A typo in the file name, and a ../ path that leads out of the spec's folder to a file
    # that is not there (the real one is models.duckdb): both made empty databases before.
    sub = tmp_path / "jobs"
    sub.mkdir()
    for folder, path in ((tmp_path, "modles.duckdb"), (sub, "../model.duckdb")):
        spec = folder / "typo.toml"
        spec.write_text(GOOD.replace('"models.duckdb"', f'"{path}"'), encoding="utf-8")
        resolved = Path(os.path.normpath(folder / path))
        _refused(
            _run(command, *flags, spec),
            f"spec file {spec}: [engine] db '{resolved}': no such database file; check the "
            "path, or make [model] source a Parquet/CSV path to start a new database",
        )
        assert not resolved.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["jobs", "models.duckdb", "typo.toml"]
    assert list(sub.iterdir()) == [sub / "typo.toml"]
    assert R.dump_file(db) == before
    # `fit` refuses a missing --db the same way (the check both share).
    fit = _run(
        "fit",
        "--db",
        tmp_path / "modles.duckdb",
        "--family",
        "poisson",
        "--response",
        "accident",
        "ships",
    )
    assert fit.exit_code == 2 and "no such database file; check the path" in fit.stderr


def test_relative_database_path_reaches_the_file(db: Path, tmp_path: Path):
    # The same ../ spelling works when the file is there (relative to the spec's folder).
    sub = tmp_path / "jobs"
    sub.mkdir()
    spec = sub / "spec.toml"
    spec.write_text(GOOD.replace('"models.duckdb"', '"../models.duckdb"'), encoding="utf-8")
    out = _ok(_run("retrain", "-q", spec))
    assert "spec and data unchanged; version 1 stays live" in out.stdout


def test_a_parquet_source_may_still_start_a_new_database(tmp_path: Path):
    # A spec fitting a file is what creates the database (as `fit --name` of a file does).
    _ships().to_parquet(tmp_path / "ships.parquet")
    spec = tmp_path / "spec.toml"
    spec.write_text(GOOD.replace('source = "ships"', 'source = "ships.parquet"'))
    out = json.loads(_ok(_run("run", "--json", "-q", spec)).stdout)
    assert out["deployment"]["version"] == 1 and (tmp_path / "models.duckdb").exists()


# -- every key of every table ----------------------------------------------------------------

# The contract, written out by hand: each key, a value of the wrong kind (as TOML text), and
# the words the error must use for the kind expected. A key added to the spec file without
# a row here fails test_every_spec_key_has_a_case.
TEXT = "text (a quoted string)"
NUMBER = "a number"
WHOLE = "a whole number"
BOOLEAN = "true or false"
NAMES = 'a list of column names, e.g. ["age", "region"]'
KEY_CASES = [
    ("model", "source", "3", TEXT),
    ("model", "response", '["accident"]', TEXT),
    ("model", "family", "true", TEXT),
    ("model", "link", "1.5", TEXT),
    ("model", "trials", "10", TEXT),
    ("model", "offset", '{ log = "service" }', TEXT),
    ("model", "weight", "2", TEXT),
    ("model", "frequency_weight", "false", TEXT),
    ("model", "power", '"1.5"', NUMBER),
    ("model", "theta", "true", NUMBER),
    ("model", "link_power", "nan", NUMBER),
    ("model", "intercept", '"yes"', BOOLEAN),
    ("model", "intercept", "1", BOOLEAN),
    ("model", "predictors", '"type"', NAMES),
    ("model", "exclude", '"row_id"', NAMES),
    ("model", "exclude", "[1, 2]", NAMES),
    ("model", "categorical", "{ type = true }", NAMES),
    ("model", "reference", '"type=A"', 'a table of column = level, e.g. { region = "North" }'),
    (
        "model",
        "reference",
        "{ type = true }",
        'a table of column = level, e.g. { region = "North" }',
    ),
    (
        "model",
        "interactions",
        '"type,built"',
        'a list of column lists, e.g. [["age", "region"]] or ["age,region"]',
    ),
    (
        "model",
        "interactions",
        "[[1, 2]]",
        'a list of column lists, e.g. [["age", "region"]] or ["age,region"]',
    ),
    ("model", "splines", '["service"]', "a table of column = number of knots, e.g. { age = 4 }"),
    (
        "model",
        "splines",
        "{ service = 4.5 }",
        "a table of column = number of knots, e.g. { age = 4 }",
    ),
    ("model", "on_null", "false", TEXT),
    ("model", "tol", '"1e-8"', NUMBER),
    ("model", "max_iter", '"many"', WHOLE),
    ("model", "max_iter", "50.0", WHOLE),
    ("model", "strict", '"no"', BOOLEAN),
    ("model", "max_levels", "true", WHOLE),
    ("model", "confidence", '"95%"', NUMBER),
    ("model", "compress", "true", TEXT),
    ("model", "sample_start", "1", TEXT),
    ("model", "covariance", "1", TEXT),
    ("model", "cluster", '["policy_id"]', TEXT),
    ("model", "penalty", '"0.1"', NUMBER),
    ("model", "l1_share", "true", NUMBER),
    ("model", "standardize", '"yes"', BOOLEAN),
    ("model", "penalty_for", '"age=0"', "a table of term = number, e.g. { age = 0.5 }"),
    ("model", "path", "2.5", WHOLE),
    ("model", "path_ratio", '"small"', NUMBER),
    ("model", "cluster", "[1]", TEXT),
    ("model", "drop_one", '"yes"', BOOLEAN),
    ("model", "folds", "2.5", WHOLE),
    ("model", "fold_by", "5", TEXT),
    ("model", "cv_rule", "1", TEXT),
    ("deploy", "name", "7", TEXT),
    ("deploy", "view_schema", '["mart"]', TEXT),
    ("deploy", "score_source", "1979-05-27", TEXT),
    ("deploy", "intervals", '"no"', BOOLEAN),
    ("deploy", "intervals", "0", BOOLEAN),
    ("deploy", "diagnostics", '"yes"', BOOLEAN),
    ("deploy", "registry_schema", "false", TEXT),
    ("gates", "require_converged", '"true"', BOOLEAN),
    ("gates", "max_relative_change", '"10%"', NUMBER),
    ("gates", "max_change_in_se", "true", NUMBER),
    ("gates", "max_deviance_per_row_increase", "nan", NUMBER),
    ("gates", "min_rows", '"lots"', WHOLE),
    ("gates", "min_rows", "1e3", WHOLE),
    ("gates", "max_excluded_share", "[0.1]", NUMBER),
    ("gates", "holdout", "2024", TEXT),
    ("gates", "holdout_by", '"region"', NAMES),
    ("gates", "max_holdout_deviance_increase", '"2%"', NUMBER),
    ("gates", "max_gini_drop", "false", NUMBER),
    ("gates", "max_level_ae_deviation", "nan", NUMBER),
    ("gates", "min_level_exposure", "[100]", NUMBER),
    ("engine", "db", "1", TEXT),
    ("engine", "memory_limit", "4", TEXT),
    ("engine", "temp_directory", "true", TEXT),
    ("engine", "threads", '"many"', WHOLE),
]
# How the error shows a value, where that differs from the TOML text (a date, a float
# written with an exponent, inline tables); every other value reads as written.
SHOWN = {
    "1979-05-27": '"1979-05-27"',
    "1e3": "1000.0",
    '{ log = "service" }': '{"log": "service"}',
    "{ type = true }": '{"type": true}',
    "{ service = 4.5 }": '{"service": 4.5}',
}


def _with_key(table: str, key: str, value: str) -> str:
    """The good spec with one key of one table set to ``value`` (replacing it if present)."""
    sections = {
        "model": MODEL.splitlines()[1:],
        "deploy": DEPLOY.splitlines()[1:],
        "gates": [],
        "engine": ENGINE.splitlines()[1:],
    }
    kept = [line for line in sections[table] if not line.startswith(f"{key} =")]
    sections[table] = [*kept, f"{key} = {value}"]
    return "".join(
        f"[{t}]\n" + "".join(f"{line}\n" for line in lines) for t, lines in sections.items()
    )


def test_every_spec_key_has_a_case():
    keys = {(t, k) for t, declared in TABLES.items() for k in declared}
    assert {(t, k) for t, k, _, _ in KEY_CASES} == keys


@pytest.mark.parametrize(
    ("table", "key", "value", "expected"),
    KEY_CASES,
    ids=[f"{t}.{k}={v}" for t, k, v, _ in KEY_CASES],
)
def test_value_of_the_wrong_kind_names_key_and_kind(
    tmp_path: Path, table: str, key: str, value: str, expected: str
):
    spec = tmp_path / "spec.toml"
    spec.write_text(_with_key(table, key, value), encoding="utf-8")
    shown = SHOWN.get(value, value)
    message = f"spec file {spec}: [{table}] {key} must be {expected}, got {shown}"
    with pytest.raises(SpecError) as err:
        load_spec_file(str(spec))
    assert str(err.value) == message
    # The database is named but absent: the check comes first, so nothing creates it.
    for command in ("run", "retrain"):
        _refused(_run(command, spec), message)
    assert list(tmp_path.iterdir()) == [spec]


def test_every_kind_accepts_its_toml_forms(tmp_path: Path):
    spec = tmp_path / "spec.toml"
    spec.write_text(
        """\
[model]
source = "ships"
response = "accident"
family = "tweedie"
link = "log"
offset = "ln(service)"
weight = "1"
frequency_weight = "1"
power = 2
link_power = 0.5
intercept = false
predictors = ["type", "built"]
exclude = []
categorical = ["built"]
reference = { type = "A", built = 1960 }
interactions = [["type", "built"], "built,operated"]
splines = { service = 4 }
on_null = "error"
tol = 1e-9
max_iter = 25
strict = true
max_levels = 100
confidence = 0.9
compress = "never"
sample_start = "never"

[deploy]
name = "ship_damage"
view_schema = "mart"
score_source = "ships"
intervals = false
registry_schema = "reg"

[gates]
require_converged = false
max_relative_change = 1
max_change_in_se = 2.5
max_deviance_per_row_increase = 0.1
min_rows = 30
max_excluded_share = 0.0

[engine]
db = "models.duckdb"
memory_limit = "1GB"
temp_directory = "spill"
threads = 2
""",
        encoding="utf-8",
    )
    loaded = load_spec_file(str(spec))
    assert loaded.model["power"] == 2 and loaded.model["intercept"] is False
    assert loaded.model["reference"] == {"type": "A", "built": 1960}
    assert loaded.model["interactions"] == [["type", "built"], "built,operated"]
    assert loaded.deploy["intervals"] is False
    assert loaded.gates == Gates(False, 1, 2.5, 0.1, 30, 0.0)
    assert loaded.engine["threads"] == 2
    assert loaded.engine["db"] == str(tmp_path / "models.duckdb")


def test_python_calls_are_checked_against_the_same_declarations(tmp_path: Path):
    path = tmp_path / "models.duckdb"
    with pytest.raises(SpecError, match=r"^intervals must be true or false, got 'no'$"):
        indb.fit("ships", "accident", "poisson", db=str(path), name="m", intervals="no")
    with pytest.raises(SpecError, match=r"^exclude must be a list of column names"):
        indb.fit("ships", "accident", "poisson", db=str(path), exclude="row_id")
    with pytest.raises(SpecError, match=r"^gate min_rows must be a whole number, got 'lots'$"):
        Gates(min_rows="lots")  # type: ignore[arg-type]
    assert not path.exists()
