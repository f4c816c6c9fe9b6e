"""Models, holdout rows and HTML readers for the report tests (``tests/test_report_html.py``,
``tests/test_report_browser.py``).

Data shipped inside statsmodels (nothing downloaded): the fair survey of
``tests/assess_cases.py`` (even rows train, odd rows are the holdout, which gains two rows
of a rating no training row has and three rows with a NULL age), with the marriage rating
as text labels that carry quotes, markup and non-ASCII letters (``LABELS``). Models, all
fitted by indb at tol 1e-12 into one DuckDB registry:

* ``children``: Poisson, offset ln(years); rating label and religious as levels, a
  restricted cubic spline of age (4 knots), educ, and religious x educ. Version 1 by
  ``indb.fit``, version 2 by ``indb retrain`` of a spec file with gates (its note records
  them);
* ``had``: binomial 0/1 on rating label, religious and age (a calibration table);
* ``educ_g``: gaussian, identity link, on rating label and age (effects on the linear
  predictor, t intervals).

The HTML is read back with the standard library's parser: every ``<table data-table>``
becomes {row key: {field: (text shown, exact value or None)}}.
"""

from __future__ import annotations

import math
import textwrap
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
from assess_cases import fair_frames

import indb
from indb.retrain import retrain
from indb.specfile import load_spec_file

#: rating -> its text level in the report's models: quotes, markup, entities, non-ASCII
LABELS = {
    "1": 'very poor <b>&"',
    "2": "poor 'ish'",
    "3": "fair \u2014 middling",
    "4": "good \u2713 Zo\u00eb",
    "5": "<script>alert(1)</script>",
    "9": "unseen </td> level",
}
FIT_TOL = 1e-12


def frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    train, hold = fair_frames()
    return (
        train.assign(rating=train["rating"].map(LABELS)),
        hold.assign(rating=hold["rating"].map(LABELS)),
    )


CHILDREN = {
    "response": "children",
    "family": "poisson",
    "offset": "ln(years)",
    "predictors": ["rating", "religious", "age", "educ"],
    "splines": {"age": 4},
    "interactions": [["religious", "educ"]],
}
HAD = {"response": "had", "family": "binomial", "predictors": ["rating", "religious", "age"]}
EDUC = {"response": "educ", "family": "gaussian", "predictors": ["rating", "age"]}
SOURCE = "SELECT rating, religious, age, educ, years, children, had FROM fair_train"


def build(folder: Path) -> dict[str, Any]:
    """The DuckDB file with fair_train, fair_hold and the three models (children twice)."""
    db = folder / "models.duckdb"
    train, hold = frames()
    with duckdb.connect(str(db)) as con:
        for name, frame in (("fair_train", train), ("fair_hold", hold)):
            con.register("frame", frame)
            con.execute(f"CREATE TABLE {name} AS SELECT * FROM frame")
            con.unregister("frame")
        con.execute(
            "CREATE TABLE fair_hold_no_response AS SELECT * EXCLUDE (children) FROM fair_hold"
        )
    for name, options in (("children", CHILDREN), ("had", HAD), ("educ_g", EDUC)):
        indb.fit(SOURCE, db=str(db), name=name, tol=FIT_TOL, **options)
    spec = folder / "children.toml"
    spec.write_text(
        textwrap.dedent(
            f"""
            [model]
            source = "{SOURCE}"
            response = "children"
            family = "poisson"
            offset = "ln(years)"
            predictors = ["rating", "religious", "age", "educ"]
            splines = {{ age = 4 }}
            interactions = [["religious", "educ"]]
            tol = {FIT_TOL}

            [deploy]
            name = "children"

            [engine]
            db = "{db}"

            [gates]
            min_rows = 100
            max_change_in_se = 0.5
            """
        )
    )
    outcome = retrain(load_spec_file(str(spec)), force=True)
    assert outcome.status == "promoted", outcome
    return {"db": db, "train": train, "hold": hold}


# -- reading the HTML back ------------------------------------------------------------------


class TableReader(HTMLParser):
    """Every ``<table data-table=NAME>``: {row key: {field: (text, data-v or None)}}, and
    each table's row keys in page order."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tables: dict[str, dict[str, dict[str, tuple[str, str | None]]]] = {}
        self.order: dict[str, list[str]] = {}
        self._table: str | None = None
        self._row: str | None = None
        self._cell: tuple[str, str | None] | None = None
        self._text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = dict(attrs)
        if tag == "table" and "data-table" in a:
            self._table = str(a["data-table"])
            self.tables[self._table] = {}
            self.order[self._table] = []
        elif tag == "tr" and self._table is not None and "data-key" in a:
            self._row = str(a["data-key"])
            self.tables[self._table][self._row] = {}
            self.order[self._table].append(self._row)
        elif tag == "td" and self._row is not None and "data-field" in a:
            self._cell = (str(a["data-field"]), a.get("data-v"))
            self._text = []

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._text.append(data)

    def handle_endtag(self, tag: str) -> None:
        if tag == "td" and self._cell is not None and self._table and self._row is not None:
            field, raw = self._cell
            self.tables[self._table][self._row][field] = ("".join(self._text).strip(), raw)
            self._cell = None
        elif tag == "tr":
            self._row = None
        elif tag == "table":
            self._table = None


def read_tables(html: str) -> TableReader:
    reader = TableReader()
    reader.feed(html)
    return reader


def exact(cell: tuple[str, str | None]) -> float:
    """The exact number of a cell (``data-v``, written with repr)."""
    raw = cell[1]
    assert raw is not None, cell
    return float(raw)


def shown(cell: tuple[str, str | None]) -> float:
    """The number a reader sees (thousands separators and a percent sign removed)."""
    text = cell[0].replace(",", "")
    if text.endswith("%"):
        return float(text[:-1]) / 100.0
    return float(text)


def same_number(value: Any, cell: tuple[str, str | None], digits: int = 5) -> None:
    """The cell holds ``value`` exactly, and shows it to ``digits`` significant digits."""
    if value is None:
        assert cell[1] in (None, "nan"), cell
        return
    assert exact(cell) == float(value), (value, cell)
    if cell[0].endswith("%"):  # a share, printed in percent to one decimal
        assert abs(shown(cell) - float(value)) <= 0.0005 + 1e-12, (value, cell)
    elif math.isfinite(float(value)) and float(value) != 0:
        assert (
            abs(shown(cell) - float(value))
            <= 0.5 * 10 ** (math.floor(math.log10(abs(float(value)))) - digits + 1) + 1e-300
        ), (value, cell)


def natural_spline_basis(x: np.ndarray, knots: list[float]) -> np.ndarray:
    """An independent basis of the natural cubic splines on ``knots`` (cubic between knots,
    linear beyond the outer ones: the space of a restricted cubic spline with its linear
    term), from scipy's natural cubic interpolating splines of the unit vectors, continued
    linearly outside the knots. Columns 2..k (column 1 is the constant minus the others)."""
    from scipy.interpolate import CubicSpline

    t = np.asarray(knots, dtype=float)
    x = np.asarray(x, dtype=float)
    cols = []
    for j in range(len(t)):
        unit = np.zeros(len(t))
        unit[j] = 1.0
        s = CubicSpline(t, unit, bc_type="natural")
        d = s.derivative()
        inside = s(np.clip(x, t[0], t[-1]))
        below = s(t[0]) + d(t[0]) * (x - t[0])
        above = s(t[-1]) + d(t[-1]) * (x - t[-1])
        cols.append(np.where(x < t[0], below, np.where(x > t[-1], above, inside)))
    return np.column_stack(cols[1:])
