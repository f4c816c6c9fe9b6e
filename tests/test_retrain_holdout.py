"""Holdout gates for scheduled refits (issue 14, item 3): ``[gates] holdout = "SOURCE"``
judges the new and the live version on the same rows in the same scans, the gates read
those figures, ``indb retrain`` prints them and the registry keeps them.

Data: statsmodels' ``randhie`` (RAND Health Insurance Experiment, 20,190 person-years;
shipped in statsmodels, nothing downloaded): ``mdvis`` (medical visits) as a Poisson
response; even rows train, odd rows are the holdout. The deliberate drift: a feed that
loses the visits of 70% of the rows with an individual deductible (``idp = 1``) before the
refit. The refit then fits its own rows better (statsmodels: deviance per row 4.15 -> 3.70)
while it predicts the clean holdout worse; the in-sample gate passes and the holdout gates
hold it back (exit 6).

Oracle: statsmodels GLM fitted on the same rows (coefficients checked against indb's), its
predictions on the holdout summed with pandas (deviance by statsmodels' ``family.deviance``,
A/E per level with pandas, the Gini by the Lorenz curve written out in
``assess_cases.lorenz_gini``).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pytest
from assess_cases import drifted, randhie_frames, visits_oracle
from click.testing import CliRunner, Result
from numpy.testing import assert_allclose

import indb
from indb.cli import main
from indb.retrain import EXIT_HELD, retrain
from indb.specfile import load_spec_file

#: the holdout figures against statsmodels' predictions (both converged far below this)
RTOL = 1e-7
NUMERIC = ["lncoins", "lpi", "physlm", "disea"]
GATES = """\
max_deviance_per_row_increase = 0.0
holdout = "visits_holdout"
holdout_by = ["hlthp"]
max_holdout_deviance_increase = 0.01
max_gini_drop = 0.01
max_level_ae_deviation = 0.10
min_level_exposure = 500
"""
SPEC = """\
[model]
source = "visits"
response = "mdvis"
family = "poisson"
exclude = ["row_id", "fmde", "hlthf", "hlthp"]
categorical = ["idp", "hlthg"]
tol = 1e-12

[deploy]
name = "doctor_visits"

[gates]
{gates}
[engine]
db = "models.duckdb"
"""


def _write(db: Path, tables: dict[str, pd.DataFrame]) -> None:
    with duckdb.connect(str(db)) as con:
        for name, frame in tables.items():
            con.register("frame", frame)
            con.execute(f"CREATE OR REPLACE TABLE {name} AS SELECT * FROM frame")
            con.unregister("frame")


def _setup(tmp_path: Path, gates: str = GATES, spec: str = SPEC) -> tuple[Path, Path]:
    train, hold = randhie_frames()
    db = tmp_path / "models.duckdb"
    _write(db, {"visits": train, "visits_holdout": hold})
    path = tmp_path / "visits.toml"
    path.write_text(spec.format(gates=gates), encoding="utf-8")
    return path, db


def _run(*args: Any) -> Result:
    return CliRunner().invoke(main, [str(a) for a in args])


def test_a_drifted_refit_is_held_by_the_holdout(tmp_path: Path) -> None:
    spec, db = _setup(tmp_path)
    train, hold = randhie_frames()
    first = _run("retrain", spec, "--json")
    assert first.exit_code == 0, first.stderr
    doc1 = json.loads(first.stdout)
    assert doc1["status"] == "first"
    # the first version is judged alone: only the level gate applies, and passes
    assert [g["gate"] for g in doc1["gates"]] == ["require_converged", "max_level_ae_deviation"]
    assert [v["role"] for v in doc1["holdout"]["versions"]] == ["new"]
    v1 = indb.api.registry(str(db)).load("doctor_visits", 1)
    orc1 = visits_oracle(train, hold, v1)
    assert_allclose(doc1["holdout"]["versions"][0]["deviance"], orc1["deviance"], rtol=RTOL)

    _write(db, {"visits": drifted(train)})
    out = _run("retrain", spec, "--json")
    assert out.exit_code == EXIT_HELD == 6, out.stderr
    doc = json.loads(out.stdout)
    assert doc["status"] == "held" and doc["version"] == 2 and doc["previous_version"] == 1
    v2 = indb.api.registry(str(db)).load("doctor_visits", 2)
    orc2 = visits_oracle(drifted(train), hold, v2)
    # the premise, by statsmodels: better in sample, worse out of sample
    assert orc2["per_row"] < orc1["per_row"] and orc2["deviance"] > 1.1 * orc1["deviance"]
    gates = {g["gate"]: g for g in doc["gates"]}
    assert gates["max_deviance_per_row_increase"]["passed"]  # the in-sample gate lets it by
    assert_allclose(
        gates["max_deviance_per_row_increase"]["value"],
        orc2["per_row"] / orc1["per_row"] - 1,
        rtol=1e-6,
    )
    inc = gates["max_holdout_deviance_increase"]
    assert not inc["passed"]
    assert_allclose(inc["value"], orc2["deviance"] / orc1["deviance"] - 1, rtol=1e-6)
    drop = gates["max_gini_drop"]
    assert_allclose(drop["value"], orc1["gini"] - orc2["gini"], rtol=1e-6, atol=1e-9)
    level = gates["max_level_ae_deviation"]
    assert not level["passed"] and level["detail"] == "idp = 1"
    assert_allclose(level["value"], orc2["ae_idp"][1] - 1, rtol=1e-6)
    # both versions' figures, from one assessment (the same scans)
    new, live = doc["holdout"]["versions"]
    assert (new["version"], new["role"], live["version"], live["role"]) == (2, "new", 1, "live")
    assert_allclose(new["deviance"], orc2["deviance"], rtol=RTOL)
    assert_allclose(live["deviance"], orc1["deviance"], rtol=RTOL)
    assert_allclose(new["gini"], orc2["gini"], rtol=RTOL)
    assert doc["holdout"]["scans"] == 5 and doc["holdout"]["rows"] == len(hold)
    # the view still serves version 1
    with duckdb.connect(str(db), read_only=True) as con:
        assert con.execute("SELECT live_version FROM indb_registry.model").fetchone()[0] == 1
    # the registry keeps each assessment: v1 alone, then v2 and v1 side by side
    listed = json.loads(_run("versions", "doctor_visits", "--db", db, "--json").stdout)[
        "assessments"
    ]
    assert [(r["version"], r["compared_version"], r["purpose"]) for r in listed] == [
        (1, None, "holdout gates"),
        (1, 2, "holdout gates"),
        (2, 1, "holdout gates"),
    ]
    assert {r["source"] for r in listed} == {"visits_holdout"}
    assert_allclose(listed[2]["deviance"], orc2["deviance"], rtol=RTOL)
    shown = _run("show", "doctor_visits", "--db", db, "--version", "2")
    assert "Assessments, oldest first" in shown.stdout and "doctor_visits v1" in shown.stdout


def test_retrain_prints_both_versions(tmp_path: Path) -> None:
    spec, db = _setup(tmp_path)
    train, _ = randhie_frames()
    assert _run("retrain", spec).exit_code == 0
    _write(db, {"visits": drifted(train)})
    out = _run("retrain", spec)
    assert out.exit_code == 6
    lines = out.stdout.splitlines()
    assert any(
        ln.startswith(
            "Holdout visits_holdout: 10,095 of 10,095 rows, both versions in the same 5 scans"
        )
        for ln in lines
    )
    assert any(ln.startswith("2 (new)") for ln in lines) and any(
        ln.startswith("1 (live)") for ln in lines
    )
    gate = next(ln for ln in lines if ln.startswith("max_level_ae_deviation"))
    assert gate.split()[-4:] == ["FAIL", "idp", "=", "1"]


def test_a_refit_that_holds_up_is_promoted(tmp_path: Path) -> None:
    """Fewer training rows, no drift: the holdout figures barely move, every gate passes."""
    spec, db = _setup(tmp_path)
    train, _ = randhie_frames()
    assert _run("retrain", spec).exit_code == 0
    _write(db, {"visits": train[train.row_id % 6 != 0]})
    out = _run("retrain", spec, "--json")
    assert out.exit_code == 0, out.stdout
    doc = json.loads(out.stdout)
    assert doc["status"] == "promoted" and all(g["passed"] for g in doc["gates"])
    # unchanged spec and data: the holdout is judged again and kept with the live version
    again = json.loads(_run("retrain", spec, "--json").stdout)
    assert again["status"] == "unchanged"
    listed = json.loads(_run("versions", "doctor_visits", "--db", db, "--json").stdout)[
        "assessments"
    ]
    assert [(r["version"], r["compared_version"]) for r in listed][-1] == (2, None)
    assert len(listed) == 4


def test_spec_file_keys(tmp_path: Path) -> None:
    spec, _ = _setup(tmp_path, gates='holdout = "holdout.parquet"\nmax_gini_drop = 0.02\n')
    gates = load_spec_file(str(spec)).gates
    assert gates.holdout == str(tmp_path / "holdout.parquet")  # relative to the spec file
    assert gates.max_gini_drop == 0.02


BAD_SPEC = [
    (
        "max_gini_drop = 0.01\n",
        'gate max_gini_drop judges rows the fit did not see: give holdout = "SOURCE"',
    ),
    (
        'holdout = "visits_holdout"\nmax_level_ae_deviation = -0.1\n',
        "gate max_level_ae_deviation must be 0 or more; got -0.1",
    ),
    ('holdout = ""\n', 'gate holdout must name a table, query or file; got ""'),
    (
        'holdout = "visits_holdout"\nmax_gini_drop = "a lot"\n',
        '[gates] max_gini_drop must be a number, got "a lot"',
    ),
]


@pytest.mark.parametrize(("gates", "message"), BAD_SPEC, ids=[m for _, m in BAD_SPEC])
def test_bad_gates_are_refused_on_load(tmp_path: Path, gates: str, message: str) -> None:
    spec, db = _setup(tmp_path, gates=gates)
    out = _run("retrain", spec)
    assert out.exit_code == 2
    lines = out.stderr.splitlines()
    assert len(lines) == 1 and message in lines[0], lines
    with duckdb.connect(str(db), read_only=True) as con:
        schemas = {r[0] for r in con.execute("SELECT schema_name FROM duckdb_schemas()").fetchall()}
    assert "indb_registry" not in schemas  # nothing written


def _registry_dump(db: Path) -> dict[str, Any]:
    with duckdb.connect(str(db), read_only=True) as con:
        names = [
            r[0]
            for r in con.execute(
                "SELECT table_name FROM duckdb_tables() WHERE schema_name = 'indb_registry'"
            ).fetchall()
        ]
        return {
            n: con.execute(f'SELECT * FROM indb_registry."{n}" ORDER BY ALL').fetchall()
            for n in names
        }


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (
            {"gates": GATES.replace('"visits_holdout"', '"no_such_table"')},
            "cannot read the source 'no_such_table'",
        ),
        (
            {"spec": SPEC.replace('family = "poisson"', 'family = "gaussian"')},
            "holdout gates: cannot compare model 'doctor_visits' with model 'doctor_visits' "
            "version 1: their families differ ('gaussian' and 'poisson')",
        ),
        (
            {"spec": SPEC.replace('"fmde", ', "")},
            "has no column 'fmde' (a numeric predictor of model 'doctor_visits')",
        ),
    ],
    ids=["missing holdout", "family changed", "holdout lacks a column"],
)
def test_holdout_mistakes_write_nothing(
    tmp_path: Path, change: dict[str, str], message: str
) -> None:
    """A first version with plain gates, then a retrain whose holdout cannot be judged: one
    line, exit 2, the registry as it was."""
    spec, db = _setup(tmp_path, gates="")
    train, hold = randhie_frames()
    assert _run("retrain", spec).exit_code == 0
    # the holdout lacks a column only the changed spec reads
    _write(db, {"visits_holdout": hold.drop(columns=["fmde"]), "visits": train.iloc[:-5]})
    before = _registry_dump(db)
    spec.write_text(
        change.get("spec", SPEC).format(gates=change.get("gates", GATES)), encoding="utf-8"
    )
    out = _run("retrain", spec, "-q")  # no progress lines: the error is the only line
    assert out.exit_code == 2, out.stdout
    lines = out.stderr.splitlines()
    assert len(lines) == 1 and message in lines[0], lines
    assert _registry_dump(db) == before


def test_a_level_gate_needs_levels(tmp_path: Path) -> None:
    """No categorical predictor and no holdout_by: the level gate has nothing to judge,
    which is said after the fit and before anything is written."""
    spec, db = _setup(
        tmp_path,
        gates='holdout = "visits_holdout"\nmax_level_ae_deviation = 0.1\n',
        spec=SPEC.replace('categorical = ["idp", "hlthg"]', ""),
    )
    out = _run("retrain", spec, "-q")
    assert out.exit_code == 2
    assert out.stderr.splitlines() == [
        "indb: error: gate max_level_ae_deviation has no levels to judge: model "
        "'doctor_visits' has no categorical predictor; name columns of the holdout in "
        "holdout_by"
    ]
    assert _registry_dump(db) == {}


def test_python_retrain_returns_the_assessment(tmp_path: Path) -> None:
    spec, _ = _setup(tmp_path)
    outcome = retrain(load_spec_file(str(spec)))
    assert outcome.holdout is not None and outcome.holdout.version == 1
    assert outcome.holdout.against is None and outcome.exit_code == 0
