"""``indb report`` on DuckDB, PostgreSQL and Spark: the same page from every engine's registry.

A model fitted once on DuckDB (statsmodels' fair survey, ``tests/report_cases.py``'s labels
with quotes and markup; a spline, an interaction) is recorded in each engine's registry
(``indb.deploy``) and its report written with the holdout on that engine. The tables of the
page must be DuckDB's: the stored numbers (coefficients, fit quality, term curves) exactly,
the holdout's sums to rounding (sums in another order); the same charts in the same order.
The numbers themselves are checked against statsmodels in ``tests/test_report_html.py``.
"""

from __future__ import annotations

import sys
import uuid
from pathlib import Path
from typing import Any

import duckdb
import pytest
from engine_support import Loader
from numpy.testing import assert_allclose

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # tests/: report_cases

from report_cases import CHILDREN, FIT_TOL, frames, read_tables  # noqa: E402

import indb  # noqa: E402

#: the holdout's sums in another order (PostgreSQL's exact numeric sums, Spark's partials)
SAME_RTOL = 1e-11
#: tables of numbers stored in the registry: read back as the same doubles
STORED = ("coefficients", "quality", "term_tests", "iterations")


@pytest.fixture(scope="module")
def fitted() -> dict[str, Any]:
    train, hold = frames()
    con = duckdb.connect()
    con.register("frame", train)
    con.execute("CREATE TABLE fair_train AS SELECT * FROM frame")
    con.unregister("frame")
    source = "SELECT rating, religious, age, educ, years, children FROM fair_train"
    result = indb.fit(source, db=con, tol=FIT_TOL, **CHILDREN)
    # the second model of ``against``: the same response and offset, fewer predictors
    small = indb.fit(source, db=con, tol=FIT_TOL,
                     **{**CHILDREN, "predictors": ["rating", "religious"], "splines": {},
                        "interactions": []})  # fmt: skip
    con.close()
    return {"result": result, "small": small, "hold": hold}


def _reference(fitted: dict[str, Any], tmp_path: Path) -> str:
    """DuckDB's page of the same recorded model (a registry file of its own)."""
    db = tmp_path / "ref.duckdb"
    with duckdb.connect(str(db)) as con:
        con.register("frame", fitted["hold"])
        con.execute("CREATE TABLE hold AS SELECT * FROM frame")
        con.unregister("frame")
    indb.deploy(fitted["result"], "children", db=str(db), score_source="hold")
    out = indb.report_html("children", tmp_path / "ref.html", db=str(db), on="hold")
    return Path(out.path).read_text(encoding="utf-8")


def test_report_from_each_engine_shows_duckdb_numbers(
    loader: Loader, fitted: dict[str, Any], tmp_path: Path
) -> None:
    tag = uuid.uuid4().hex[:8]
    table = loader.load(f"fair_hold_{tag}", fitted["hold"])
    schema, model = f"reg_{tag}", f"children_{tag}"
    indb.deploy(
        fitted["result"], model, db=loader.engine, registry_schema=schema, score_source=table
    )
    written = indb.report_html(
        model, tmp_path / "page.html", db=loader.engine, registry_schema=schema, on=table
    )
    assert written.scans == 3 and written.version == 1
    page = Path(written.path).read_text(encoding="utf-8")
    ref = _reference(fitted, tmp_path)
    got, want = read_tables(page), read_tables(ref)
    assert got.order.keys() == want.order.keys()
    assert page.count('data-chart="') == ref.count('data-chart="') == 12
    for name, rows in want.tables.items():
        assert got.order[name] == want.order[name], name
        if name in ("model", "versions", "events"):
            continue  # names, views and times of this registry
        for key, cells in rows.items():
            for field, (text, raw) in cells.items():
                other = got.tables[name][key][field]
                if name in STORED or name.startswith(("term:", "curve:")):
                    # stored numbers, and the curves drawn from them (over the holdout's
                    # range: its minimum and maximum, exact on every engine)
                    assert other == (text, raw), (name, key, field)
                elif raw is None or field in ("level", "unseen"):
                    assert other[1] == raw, (name, key, field)
                elif (name, key) != ("assessment", "seconds"):
                    assert_allclose(
                        float(str(other[1])), float(raw), rtol=SAME_RTOL, err_msg=f"{name} {key}"
                    )
    assert f"on the {loader.engine.dialect.name} engine" in page


def test_report_against_a_second_model_on_each_engine(
    loader: Loader, fitted: dict[str, Any], tmp_path: Path
) -> None:
    """``against``: the second model scored in the same scans on every engine; the
    side-by-side figures and the double-lift bands are DuckDB's to rounding."""
    tag = uuid.uuid4().hex[:8]
    table = loader.load(f"fair_hold_{tag}", fitted["hold"])
    schema, model = f"reg_{tag}", f"children_{tag}"
    small = fitted["small"]
    pages = []
    for engine, where, hold in ((loader.engine, schema, table), (None, None, "hold")):
        if engine is None:  # DuckDB's page of the same two recorded models
            db = tmp_path / "ref.duckdb"
            with duckdb.connect(str(db)) as con:
                con.register("frame", fitted["hold"])
                con.execute("CREATE TABLE hold AS SELECT * FROM frame")
                con.unregister("frame")
            engine, where = str(db), "indb"
        for result, name in ((fitted["result"], model), (small, f"{model}_small")):
            indb.deploy(result, name, db=engine, registry_schema=where, score_source=hold)
        written = indb.report_html(model, tmp_path / f"p{len(pages)}.html", db=engine,
                                   registry_schema=where, on=hold,
                                   against=f"{model}_small")  # fmt: skip
        assert written.scans == 5 and written.compared_with == f"{model}_small:1"
        pages.append(read_tables(Path(written.path).read_text(encoding="utf-8")).tables)
    got, want = pages
    for name in ("against", "ratio_bands"):
        assert list(got[name]) == list(want[name]) and want[name], name
        for key, cells in want[name].items():
            for field, (_, raw) in cells.items():
                other = got[name][key][field]
                if raw is None or field == "figure":  # the figures' names
                    assert other[1] == raw, (name, key, field)
                    continue
                assert_allclose(float(str(other[1])), float(raw), rtol=SAME_RTOL,
                                err_msg=f"{name} {key} {field}")  # fmt: skip
