"""Cells: the rows of the grouped scans (one per combination of factor levels) mapped to
the design's columns. :func:`level_codes` codes a cell's levels, :func:`column_groups`
groups columns that share factors and value, :func:`cell_columns` says which column of each
group a cell belongs to (numpy only; lookups cached per design)."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from indb.design import Design


def level_codes(levels: Sequence[str], values: np.ndarray) -> np.ndarray:
    """Position of each cell value in ``levels`` (ascending text); a value that is not a
    level (NULL, or a level the design does not know) gets a code past the levels, in
    ascending text order with NULL last, so that sorting by code is deterministic."""
    lut = {lv: i for i, lv in enumerate(levels)}
    codes = np.array([lut.get(v, -1) for v in values.tolist()], dtype=np.int64)
    unknown = codes < 0
    if unknown.any():
        others = sorted({v for v in np.asarray(values)[unknown]}, key=lambda v: (v is None, str(v)))
        extra = {v: len(levels) + i for i, v in enumerate(others)}
        codes[unknown] = [extra[v] for v in np.asarray(values)[unknown]]
    return codes


@dataclass(frozen=True)
class ColumnGroup:
    """Design columns that share their factors and their value: indicators of distinct
    level combinations of the same factors, so no row has more than one of them (their
    block of X'WX is diagonal)."""

    factors: tuple[int, ...]
    value: int
    columns: tuple[int, ...]


def column_groups(design: Design) -> list[ColumnGroup]:
    """The design's columns grouped by (factors, value), in order of first column."""
    return [g for g, _ in _lookups(design)]


def cell_columns(design: Design, codes: Sequence[np.ndarray]) -> list[np.ndarray]:
    """For each of :func:`column_groups`, the design column each cell belongs to (-1 for
    none: a reference level, or a combination the design has no column for).

    ``codes`` are the cells' :func:`level_codes`, one array per factor of the design.
    """
    n = len(codes[0]) if codes else 1
    out: list[np.ndarray] = []
    for g, look in _lookups(design):
        if not g.factors:
            out.append(np.full(n, g.columns[0], dtype=np.int64))
        elif look is None:
            out.append(_cell_columns_by_tuple(design, g, codes))
        else:
            sizes, table = look
            # one integer per level combination (mixed radix; values that are not levels
            # share the top digit, which no column has)
            key = np.zeros(n, dtype=np.int64)
            for fi, size in zip(g.factors, sizes, strict=True):
                key = key * size + np.minimum(codes[fi], size - 1)
            out.append(table[key])
    return out


#: designs whose lookups were built last (by id, holding the design so the id stays unique)
_LOOKUP_CACHE: dict[int, tuple[Design, list]] = {}
#: most level combinations a group's lookup table holds (int64 each); more go by tuple
_MAX_TABLE = 1 << 22


def _lookups(design: Design) -> list[tuple[ColumnGroup, tuple[list[int], np.ndarray] | None]]:
    """Column groups and, per factor group, a table from mixed-radix level key to column
    (-1 where the design has none); built once per design, since every IRLS scan needs it."""
    hit = _LOOKUP_CACHE.get(id(design))
    if hit is not None and hit[0] is design:
        return hit[1]
    grouped: dict[tuple[tuple[int, ...], int], list[int]] = {}
    for j, c in enumerate(design.columns):
        grouped.setdefault((c.factors, c.value), []).append(j)
    out: list[tuple[ColumnGroup, tuple[list[int], np.ndarray] | None]] = []
    for (f, v), cols in grouped.items():
        g = ColumnGroup(f, v, tuple(cols))
        sizes = [len(design.factors[fi].levels) + 1 for fi in f]
        if not f or math.prod(sizes) > _MAX_TABLE:
            out.append((g, None))
            continue
        key = np.zeros(len(cols), dtype=np.int64)
        for pos_in_col, (fi, size) in enumerate(zip(f, sizes, strict=True)):
            pos = {lv: i for i, lv in enumerate(design.factors[fi].levels)}
            key = key * size + np.array(
                [pos[design.columns[j].levels[pos_in_col]] for j in cols], dtype=np.int64
            )
        table = np.full(math.prod(sizes), -1, dtype=np.int64)
        table[key] = cols
        out.append((g, (sizes, table)))
    if len(_LOOKUP_CACHE) >= 8:
        _LOOKUP_CACHE.clear()
    _LOOKUP_CACHE[id(design)] = (design, out)
    return out


def _cell_columns_by_tuple(
    design: Design, g: ColumnGroup, codes: Sequence[np.ndarray]
) -> np.ndarray:
    """:func:`cell_columns` for a group with too many level combinations for a table."""
    where: dict[tuple[int, ...], int] = {}
    for j in g.columns:
        c = design.columns[j]
        where[
            tuple(
                design.factors[fi].levels.index(lv)
                for fi, lv in zip(c.factors, c.levels, strict=True)
            )
        ] = j
    rows = zip(*(codes[fi].tolist() for fi in g.factors), strict=True)
    return np.fromiter((where.get(k, -1) for k in rows), dtype=np.int64, count=len(codes[0]))
