"""The outside oracle of ``indb explore``: the same one-way figures computed with pandas
(``DataFrame.groupby``) and numpy (``numpy.quantile``, ``numpy.searchsorted``) from the rows
in memory, and the comparison with an :class:`indb.Exploration`.

Conventions written out from the API contract (not from indb's code): rows used have a
response, offset and weight; exposure per row is weight x exp(offset) (weight, or 1, without
them); actual is weight x response; numeric columns are cut at the distinct values of
``numpy.quantile(finite values of the rows used, k / bands)`` with numpy's default 'linear'
method (Hyndman & Fan type 7), band k holding cuts[k-2] < x <= cuts[k-1]; NaN and infinities
form band 0, NULL a level of its own (key None).
"""

from __future__ import annotations

from collections.abc import Hashable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.testing import assert_allclose

import indb

#: figures of one group: (rows, exposure, actual)
Figures = tuple[int, float, float]


@dataclass(frozen=True)
class Oracle:
    rows_read: int
    rows_used: int
    excluded: dict[str, int]
    total: Figures
    columns: dict[str, dict[Hashable, Figures]]
    cuts: dict[str, np.ndarray]


def band_cuts(values: np.ndarray, bands: int) -> np.ndarray:
    """Distinct cut points: numpy.quantile ('linear', numpy's default) of the finite values."""
    finite = values[np.isfinite(values)]
    qs = [k / bands for k in range(1, bands)]
    return np.unique(np.quantile(finite, qs, method="linear"))


def band_keys(values: np.ndarray, is_null: np.ndarray, cuts: np.ndarray) -> list[Hashable]:
    """Band per row: searchsorted(cuts, x, 'left') + 1 (so x <= cuts[0] is band 1), 0 for
    NaN/inf, None for NULL."""
    out: list[Hashable] = []
    for x, null in zip(values.tolist(), is_null.tolist(), strict=True):
        if null:
            out.append(None)
        elif not np.isfinite(x):
            out.append(0)
        else:
            out.append(int(np.searchsorted(cuts, x, side="left")) + 1)
    return out


def one_way(
    frame: pd.DataFrame,
    response: str,
    *,
    categorical: Sequence[str] = (),
    numeric: Sequence[str] = (),
    offset: np.ndarray | None = None,
    weight: np.ndarray | None = None,
    bands: int = 10,
    nulls: dict[str, np.ndarray] | None = None,
    level_text=str,
) -> Oracle:
    """The oracle's figures. ``offset`` and ``weight`` are per-row arrays (NaN = NULL);
    ``nulls`` gives a numeric column's NULL mask where NaN is a value (default: NaN is NULL);
    ``level_text`` turns a categorical value into its level text."""
    nulls = nulls or {}
    y = frame[response].to_numpy(dtype=float)
    used = ~np.isnan(y)
    excluded = {"response": int(np.isnan(y).sum())}
    w = np.ones(len(frame)) if weight is None else np.asarray(weight, dtype=float)
    if offset is not None:
        excluded["offset"] = int(np.isnan(offset).sum())
        used &= ~np.isnan(offset)
    if weight is not None:
        excluded["weight"] = int(np.isnan(w).sum())
        used &= ~np.isnan(w)
    with np.errstate(invalid="ignore"):
        exposure = w * np.exp(offset) if offset is not None else w
    actual = w * y
    rows = frame.loc[used].reset_index(drop=True)
    e, a = exposure[used], actual[used]
    columns: dict[str, dict[Hashable, Figures]] = {}
    cuts: dict[str, np.ndarray] = {}
    for c in categorical:
        keys = [None if pd.isna(v) else level_text(v) for v in rows[c].tolist()]
        columns[c] = _grouped(keys, e, a)
    for c in numeric:
        x = rows[c].to_numpy(dtype=float)
        null = nulls[c][used] if c in nulls else np.isnan(x)
        cuts[c] = band_cuts(x[~null], bands)
        columns[c] = _grouped(band_keys(x, null, cuts[c]), e, a)
    # a second computation of the totals (numpy sums, not pandas) checks the grouping
    total = (int(used.sum()), float(np.sum(e)), float(np.sum(a)))
    for c, groups in columns.items():
        assert sum(g[0] for g in groups.values()) == total[0], c
        assert_allclose(sum(g[1] for g in groups.values()), total[1], rtol=1e-12)
        assert_allclose(sum(g[2] for g in groups.values()), total[2], rtol=1e-12)
    return Oracle(len(frame), int(used.sum()), excluded, total, columns, cuts)


def _grouped(keys: list[Hashable], e: np.ndarray, a: np.ndarray) -> dict[Hashable, Figures]:
    # pandas groupby with dropna=False keeps the NULL group (key None -> NaN in the index)
    df = pd.DataFrame({"k": pd.Series(keys, dtype=object), "e": e, "a": a})
    g = df.groupby("k", dropna=False, sort=False).agg(
        rows=("e", "size"), exposure=("e", "sum"), actual=("a", "sum")
    )
    out: dict[Hashable, Figures] = {}
    for k, r in g.iterrows():
        key = None if pd.isna(k) else k
        out[key] = (int(r["rows"]), float(r["exposure"]), float(r["actual"]))
    return out


def assert_matches(found: indb.Exploration, want: Oracle, rtol: float = 1e-12) -> None:
    """Every figure of ``found`` against the oracle; a capped column's shown levels must be
    the ones with the most exposure and its other-levels row the rest."""
    assert found.rows_read == want.rows_read
    assert found.rows_used == want.rows_used
    assert found.excluded == want.excluded
    _same(found.total, want.total, rtol, "total")
    assert {c.name for c in found.columns} == set(want.columns)
    for c in found.columns:
        groups = want.columns[c.name]
        if c.kind == "numeric":
            assert_allclose(c.cuts, want.cuts[c.name], rtol=1e-13, atol=0)
            got = {lv.band if lv.band is not None else None: lv for lv in c.levels}
        else:
            got = {lv.level: lv for lv in c.levels}
        assert set(got) <= set(groups), (c.name, set(got) - set(groups))
        for key, lv in got.items():
            _same(lv, groups[key], rtol, f"{c.name}={key}")
            if lv.exposure > 0:
                assert_allclose(lv.rate, groups[key][2] / groups[key][1], rtol=rtol)
        rest = [k for k in groups if k not in got]
        if c.other is None:
            assert not rest, (c.name, rest)
            continue
        # the levels shown (NULL aside) are those with the most exposure
        shown = [k for k in got if k is not None]
        by_exposure = sorted((k for k in groups if k is not None), key=lambda k: -groups[k][1])
        assert set(shown) == set(by_exposure[: len(shown)]), c.name
        assert c.other_levels == len(rest)
        other = tuple(sum(groups[k][i] for k in rest) for i in range(3))
        _same(c.other, other, rtol, f"{c.name} other levels")


def _same(got, want: Figures, rtol: float, what: str) -> None:
    assert got.rows == want[0], what
    assert_allclose(got.exposure, want[1], rtol=rtol, err_msg=what)
    assert_allclose(got.actual, want[2], rtol=rtol, atol=1e-300, err_msg=what)
