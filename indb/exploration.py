"""One-way exploration of a response before any model: per level of each categorical column
and per quantile band of each numeric column, the rows, exposure, Σ weight·response and the
observed rate, from three scans of the source (:mod:`indb.plan.explore_scan`).

The observed rate of a group is Σ w·y / Σ w·exp(offset) (w = 1 without a weight; without an
offset, Σ w·y / Σ w): the rate a log-link model with only an intercept fits to the group's
rows, so it reads as a claim frequency with an offset ln(exposure) and as a weighted mean
without one. The offset is taken to be on the log scale (the log of exposure).
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from indb import options as O
from indb.design import Inputs, require_column, resolve_inputs
from indb.engines.base_engine import Engine, qualify_source
from indb.errors import NondeterministicSourceError, SpecError
from indb.fitrun import fetched_count
from indb.plan import explore_scan as X
from indb.plan.context import PlanContext
from indb.prefit import source_columns
from indb.spec import ModelSpec, Source
from indb.sqlexpr import EXP_FINITE_MAX

#: scans of the source an exploration makes (the profile, the order statistics that give
#: the band edges of numeric columns, and the one GROUPING SETS scan); describing the
#: source's columns runs nothing
SCANS = 3


@dataclass(frozen=True)
class Figures:
    """Rows, exposure and Σ weight·response (``actual``) of a group of rows."""

    rows: int
    exposure: float
    actual: float

    @property
    def rate(self) -> float:
        """actual / exposure (NaN for a group without exposure)."""
        return self.actual / self.exposure if self.exposure > 0 else math.nan


@dataclass(frozen=True)
class Level(Figures):
    """One level of a categorical column or one band of a numeric one.

    ``level`` is the level's text, None for the rows where the column is NULL. A band has
    ``band`` (1 upward; 0 for NaN and infinite values) and, for a band of numbers, the
    interval ``(low, high]`` it covers (``[low, high]`` for the first band).
    """

    level: str | None = None
    band: int | None = None
    low: float | None = None
    high: float | None = None

    @property
    def missing(self) -> bool:
        return self.level is None and self.band is None


@dataclass(frozen=True)
class Column:
    """What an exploration found for one column.

    ``levels`` are shown in order: a categorical column's levels by exposure (most first),
    a numeric column's bands from low to high, then NaN/infinite values and NULL. ``other``
    sums a categorical column's levels beyond ``max_shown`` (``other_levels`` of them).
    ``cuts`` are the distinct quantile values between the bands; ``low`` and ``high`` the
    smallest and largest finite value.
    """

    name: str
    kind: str  # categorical | numeric
    levels: tuple[Level, ...]
    other: Figures | None = None
    other_levels: int = 0
    cuts: tuple[float, ...] = ()
    low: float | None = None
    high: float | None = None

    @property
    def level_count(self) -> int:
        """Distinct levels, NULL counted as one; for a numeric column the bands with rows,
        and one each for NaN/infinite values and NULL when there are such rows."""
        return len(self.levels) + self.other_levels


@dataclass(frozen=True)
class Exploration:
    """The outcome of :func:`indb.explore`: one-way figures of a response, column by column.

    ``excluded`` counts, per input (``response``, ``offset``, ``weight``), the rows set
    aside because it is NULL there (a row may count under several); ``rows_read`` -
    ``rows_used`` rows were set aside in all. ``total`` covers every row used.
    """

    source: str
    response: str
    offset: str | None
    weight: str | None
    rows_read: int
    rows_used: int
    excluded: dict[str, int]
    total: Figures
    columns: tuple[Column, ...]
    bands: int
    max_shown: int
    scans: int = SCANS
    seconds: float = 0.0

    @property
    def exposure_basis(self) -> str:
        """What a row's exposure is: ``weight x exp(offset)``, ``exp(offset)``, ``weight``
        or ``rows`` (each row 1)."""
        if self.offset is not None:
            return "weight x exp(offset)" if self.weight is not None else "exp(offset)"
        return "weight" if self.weight is not None else "rows"

    def column(self, name: str) -> Column:
        for c in self.columns:
            if c.name == name:
                return c
        raise KeyError(name)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dictionary (NaN rates as None)."""
        base = self.total.rate
        return {
            "source": self.source,
            "response": self.response,
            "offset": self.offset,
            "weight": self.weight,
            "exposure_basis": self.exposure_basis,
            "rows_read": self.rows_read,
            "rows_used": self.rows_used,
            "rows_excluded": self.rows_read - self.rows_used,
            "excluded_by": dict(self.excluded),
            "total": _figures(self.total, base),
            "columns": [_column_dict(c, base) for c in self.columns],
            "bands": self.bands,
            "max_shown": self.max_shown,
            "scans": self.scans,
            "seconds": self.seconds,
        }


def _num(v: float | None) -> float | None:
    return None if v is None or not math.isfinite(v) else float(v)


def _figures(f: Figures, base: float) -> dict[str, Any]:
    rel = f.rate / base if base > 0 else math.nan
    return {
        "rows": f.rows,
        "exposure": _num(f.exposure),
        "actual": _num(f.actual),
        "rate": _num(f.rate),
        "relativity": _num(rel),
    }


def _column_dict(c: Column, base: float) -> dict[str, Any]:
    levels = []
    for lv in c.levels:
        row: dict[str, Any] = {"level": lv.level}
        if c.kind == X.NUMERIC:
            row |= {"band": lv.band, "low": _num(lv.low), "high": _num(lv.high)}
        levels.append(row | _figures(lv, base))
    out: dict[str, Any] = {"column": c.name, "kind": c.kind, "level_count": c.level_count}
    if c.kind == X.NUMERIC:
        out |= {"cuts": list(c.cuts), "low": _num(c.low), "high": _num(c.high)}
    out["levels"] = levels
    other = _figures(c.other, base) | {"levels": c.other_levels} if c.other else None
    out["other"] = other
    return out


# -- the run -------------------------------------------------------------------------------------


def check_arguments(bands: Any, max_shown: Any) -> None:
    """Refuse band counts and level caps out of range (their kinds are checked already)."""
    if not 2 <= bands <= O.MAX_BANDS:
        raise SpecError(f"bands must be a whole number from 2 to {O.MAX_BANDS:,}; got {bands!r}")
    if not max_shown >= 1:
        raise SpecError(f"max_shown must be a whole number of at least 1; got {max_shown!r}")


def explore_source(
    engine: Engine,
    source: str,
    response: str,
    *,
    offset: str | None = None,
    weight: str | None = None,
    by: Sequence[str] | None = None,
    exclude: Sequence[str] = (),
    categorical: Sequence[str] = (),
    bands: int = 10,
    max_shown: int = 20,
) -> Exploration:
    """Explore ``response`` on ``engine``: see :func:`indb.explore`."""
    check_arguments(bands, max_shown)
    t0 = time.perf_counter()
    ctx, columns = _resolve(engine, source, response, offset, weight, by, exclude, categorical)
    numerics = [name for name, kind in columns if kind == X.NUMERIC]
    profile = _one_row(engine, X.explore_profile_query(ctx, numerics))
    rows_read, rows_used, excluded = _check_profile(ctx, profile)
    stats = {}
    if numerics:
        stats = engine.fetch_columns(
            engine.dialect.render(X.explore_cuts_query(ctx, numerics, bands))
        )
    ranges = {c: _cuts(profile, stats, i, bands) for i, c in enumerate(numerics)}
    cuts = {c: r[0] for c, r in ranges.items()}
    found = engine.fetch_columns(
        engine.dialect.render(X.explore_grouped_query(ctx, columns, cuts, max_shown))
    )
    total, per_column = _assemble(found, columns, ranges)
    # the scan takes categorical columns first; show them in the order given or found
    given = _explored_order(ctx.inputs, by)
    per_column = tuple(sorted(per_column, key=lambda c: given.index(c.name)))
    if total.rows != rows_used:
        raise NondeterministicSourceError(
            f"the source is not deterministic: the grouped scan counted {total.rows:,} rows "
            f"where the profile scan counted {rows_used:,}; store the rows first (CREATE "
            "TABLE ... AS SELECT ...) or make a sample repeatable"
        )
    if not total.exposure > 0:
        raise SpecError(
            f"the {rows_used:,} rows used have no exposure in all (every weight is 0): "
            "there is no rate to explore; check the weight expression"
        )
    return Exploration(
        source=ctx.spec.source.text,
        response=response,
        offset=offset,
        weight=weight,
        rows_read=rows_read,
        rows_used=rows_used,
        excluded=excluded,
        total=total,
        columns=per_column,
        bands=bands,
        max_shown=max_shown,
        scans=scans_of(numerics),
        seconds=time.perf_counter() - t0,
    )


def _one_row(engine: Engine, tree: Any) -> dict[str, Any]:
    cols = engine.fetch_columns(engine.dialect.render(tree))
    return {k: (v[0] if len(v) else None) for k, v in cols.items()}


def _resolve(
    engine: Engine,
    source: str,
    response: str,
    offset: str | None,
    weight: str | None,
    by: Sequence[str] | None,
    exclude: Sequence[str],
    categorical: Sequence[str],
) -> tuple[PlanContext, list[tuple[str, str]]]:
    """The source's columns checked as the fit checks them (the explored columns are the
    fit's default predictors, or ``by``), and the columns to explore: (name, kind),
    categorical ones first (the grouped scan needs them so), each kind in the order given
    (``by``) or in the source's order."""

    def spec_for(family: str) -> ModelSpec:
        spec = ModelSpec.build(
            source,
            response,
            family,
            offset=offset,
            weight=weight,
            predictors=list(by) if by is not None else None,
            exclude=exclude,
            categorical=categorical,
        )
        return dataclasses.replace(spec, source=qualified)

    qualified = qualify_source(engine, Source.parse(source))
    spec = spec_for("gaussian")
    described = source_columns(spec, engine)
    names = [n for n, _ in described]
    d = engine.dialect
    for c in by or ():
        require_column(c, "explored", names, "name source columns in by= (CLI --by)")
    # a BOOLEAN response reads as 0/1; the fit's checks take it for the binomial family
    if response in names and d.type_kind(dict(described)[response]) == "boolean":
        spec = spec_for("binomial")
    inputs = resolve_inputs(spec, described, d.type_kind, d.sqlglot_name)
    columns = _explored(inputs, by)
    if not columns:
        raise SpecError(
            f"nothing to explore: the source {spec.source.label()!r} has no columns besides "
            "the response and the columns the offset and weight read"
        )
    return PlanContext(spec, inputs, d), columns


def _explored_order(inputs: Inputs, by: Sequence[str] | None) -> list[str]:
    # dict.fromkeys: a column given twice is explored once
    return list(dict.fromkeys(by)) if by is not None else [n for n, _ in inputs.columns]


def _explored(inputs: Inputs, by: Sequence[str] | None) -> list[tuple[str, str]]:
    order = _explored_order(inputs, by)
    cats = [c for c in order if c in inputs.factors]
    nums = [c for c in order if c in inputs.numerics]
    return [(c, X.CATEGORICAL) for c in cats] + [(c, X.NUMERIC) for c in nums]


def _check_profile(ctx: PlanContext, row: dict[str, Any]) -> tuple[int, int, dict[str, int]]:
    """Row counts from the profile row; errors for values an exploration cannot sum."""
    rows_read, rows_used = fetched_count(row[X.N_TOTAL]), fetched_count(row[X.N_USED])
    spec = ctx.spec
    label = {
        "response": f"response column {spec.response!r}",
        "offset": f"offset expression {spec.offset!r}",
        "weight": f"weight expression {spec.weight!r}",
    }
    excluded = {k: fetched_count(row[a]) for k, a in X.NULLS.items() if a in row}
    if rows_read == 0:
        raise SpecError(f"the source {spec.source.label()!r} has no rows")
    if rows_used == 0:
        nulls = ", ".join(f"{label[k]}: {n:,}" for k, n in excluded.items() if n)
        raise SpecError(
            f"no rows left: every one of the {rows_read:,} rows has a NULL response, offset "
            f"or weight (NULL rows by input: {nulls}); fill them in or filter them out in the "
            "source query"
        )
    for k, alias in X.NOT_FINITE.items():
        bad = fetched_count(row.get(alias))
        if bad:
            raise SpecError(
                f"{label[k]} is NaN or infinite in {bad:,} of {rows_used:,} rows; filter or "
                "fix those rows in the source query"
            )
    negative = fetched_count(row.get(X.NEGATIVE_WEIGHT))
    if negative:
        raise SpecError(
            f"{label['weight']} is negative in {negative:,} of {rows_used:,} rows; a weight "
            "counts rows or exposure, so it must be >= 0: fix those rows in the source query"
        )
    top = row.get(X.OFFSET_MAX)
    if top is not None and float(top) > EXP_FINITE_MAX:
        raise SpecError(
            f"{label['offset']} reaches {float(top):.6g}, where exp(offset) overflows: "
            "the offset is read as the log of exposure (e.g. 'ln(exposure)'); give it on "
            "that scale, or give the exposure as the weight instead"
        )
    return rows_read, rows_used, excluded


def scans_of(numerics: Sequence[str]) -> int:
    """Scans of the source: the profile, the order statistics (with a numeric column) and
    the GROUPING SETS scan."""
    return SCANS if numerics else SCANS - 1


def _cuts(
    row: dict[str, Any], stats: Mapping[str, np.ndarray], i: int, bands: int
) -> tuple[tuple[float, ...], float | None, float | None]:
    """The i-th numeric column's distinct quantile cut points, smallest and largest finite
    value (no cuts and None without a finite value)."""
    lo, hi = row[f"lo_{i}"], row[f"hi_{i}"]
    if lo is None or not math.isfinite(float(lo)):
        return (), None, None
    qs = [_quantile(stats, i, q) for q in X.band_quantiles(bands)]
    return tuple(sorted(set(qs))), float(lo), float(hi)


def _quantile(stats: Mapping[str, np.ndarray], i: int, q: float) -> float:
    """Quantile ``q`` of column i from the values around its order statistics
    (:func:`indb.plan.explore_scan.explore_cuts_query`), as numpy.quantile's default
    'linear' method computes it: h = (n - 1) q, x[floor h] and x[floor h + 1] interpolated
    with numpy's two-sided lerp (exact at both ends)."""
    mine = np.asarray(stats[X.COLUMN]).astype(np.int64) == i
    values = np.asarray(stats[X.VALUE], dtype=float)[mine]
    up_to = np.asarray(stats[X.UP_TO]).astype(np.int64)[mine]
    count = np.asarray(stats[X.COUNT]).astype(np.int64)[mine]
    n = int(np.asarray(stats[X.FINITE]).astype(np.int64)[mine][0])

    def at(rank: int) -> float:
        hit = np.flatnonzero((up_to - count <= rank) & (rank < up_to))
        if len(hit) != 1:
            raise NondeterministicSourceError(
                f"the order statistics scan did not return rank {rank} of {n} values; "
                "the source must give the same rows every time it is read"
            )
        return float(values[hit[0]])

    h = (n - 1) * q
    if h >= n - 1:
        return at(n - 1)
    below = math.floor(h)
    a, b, t = at(below), at(below + 1), h - below
    return b - (b - a) * (1 - t) if t >= 0.5 else a + (b - a) * t


def _assemble(
    found: dict[str, np.ndarray],
    columns: Sequence[tuple[str, str]],
    ranges: dict[str, tuple[tuple[float, ...], float | None, float | None]],
) -> tuple[Figures, tuple[Column, ...]]:
    """The grouped scan's rows as a :class:`Figures` total and one :class:`Column` each."""
    g = np.asarray(found[X.SET], dtype=np.int64)
    slot = np.asarray(found[X.SLOT], dtype=np.int64)

    def figures(r: int) -> Figures:
        return Figures(
            rows=int(found[X.ROWS][r]),
            exposure=float(found[X.EXPOSURE][r]),
            actual=float(found[X.ACTUAL][r]),
        )

    total_rows = np.flatnonzero(g == len(columns))
    total = figures(int(total_rows[0])) if total_rows.size else Figures(0, 0.0, 0.0)
    out: list[Column] = []
    for i, (name, kind) in enumerate(columns):
        mine = [int(r) for r in np.flatnonzero(g == i)]
        shown = [r for r in mine if slot[r] != X.OTHER_SLOT or kind == X.NUMERIC]
        rest = [r for r in mine if r not in shown]
        if kind == X.CATEGORICAL:
            levels = [_level(figures(r), _text(found[X.LEVEL][r])) for r in shown]
            other = figures(rest[0]) if rest else None
            n_other = int(found[X.LEVELS][rest[0]]) if rest else 0
            out.append(Column(name, kind, _ordered(levels), other, n_other))
        else:
            cuts, lo, hi = ranges[name]
            levels = [_band(figures(r), _band_code(found[X.BAND][r]), cuts, lo, hi) for r in shown]
            out.append(Column(name, kind, _ordered(levels), cuts=cuts, low=lo, high=hi))
    return total, tuple(out)


def _text(v: Any) -> str | None:
    return None if v is None or (isinstance(v, float) and math.isnan(v)) else str(v)


def _band_code(v: Any) -> int | None:
    return None if v is None or (isinstance(v, float) and math.isnan(v)) else int(v)


def _level(f: Figures, text: str | None) -> Level:
    return Level(f.rows, f.exposure, f.actual, level=text)


def _band(
    f: Figures, band: int | None, cuts: tuple[float, ...], lo: float | None, hi: float | None
) -> Level:
    if band is None:
        return Level(f.rows, f.exposure, f.actual)
    if band == X.NOT_FINITE_BAND:
        return Level(f.rows, f.exposure, f.actual, level="NaN or infinite", band=band)
    bounds = [lo, *cuts, hi]
    low, high = bounds[band - 1], bounds[band]
    opening = "[" if band == 1 else "("
    text = f"{opening}{_g(low)}, {_g(high)}]"
    return Level(f.rows, f.exposure, f.actual, level=text, band=band, low=low, high=high)


def _g(v: float | None) -> str:
    return "n/a" if v is None else f"{v:.6g}"


def _ordered(levels: list[Level]) -> tuple[Level, ...]:
    """Bands from low to high, levels by exposure (most first, then by text); then the
    NaN/infinite band and the NULL level."""

    def key(lv: Level) -> tuple:
        if lv.missing:
            return (2,)
        if lv.band == X.NOT_FINITE_BAND:
            return (1,)
        if lv.band is not None:
            return (0, lv.band)
        return (0, -lv.exposure, -lv.rows, lv.level)

    return tuple(sorted(levels, key=key))
