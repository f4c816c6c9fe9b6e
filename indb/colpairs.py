"""The pairs of design columns one row can use together, and (X'WX)^-1 at those pairs.

numpy only. A row's design vector x has at most one non-zero entry per column group (the
columns sharing their factors and their value: the non-reference levels of one factor, or of
one factor x numeric term), so a quadratic form x'Ax only ever reads A at

* (j, j), and
* (j, k) for columns of *different* groups whose levels agree on the factors they share
  (``age & region=North`` goes with ``region=North``, never with ``region=South``).

For one factor of L levels next to r other columns that is L + L r + r^2 numbers instead of
(L + r)^2: what the diagnostics view's leverage needs (:mod:`indb.quadform` writes the form
as SQL), and all a registry version has to keep of the inverse for it.
"""

from __future__ import annotations

from collections.abc import Hashable, Sequence
from dataclasses import dataclass

import numpy as np

#: most pairs a result keeps (3 numbers each in a registry version's JSON, one VALUES entry
#: in the view); a model that needs more (two crossed factors of several hundred levels)
#: gets no diagnostics view, and says why
MAX_PAIRS = 250_000


@dataclass(frozen=True)
class PairColumn:
    """A design column as the pairs see it: the factors and levels it indicates, and the
    per-row value it multiplies (any hashable key; columns with equal factors and value
    form one group)."""

    factors: tuple[str, ...]
    levels: tuple[str, ...]
    value: Hashable

    @property
    def group(self) -> tuple[tuple[str, ...], Hashable]:
        return (self.factors, self.value)


def compatible_pairs(columns: Sequence[PairColumn]) -> tuple[np.ndarray, np.ndarray] | None:
    """Index pairs (j <= k) of the columns one row can have non-zero together, ordered by
    (j, k); None when there are more than :data:`MAX_PAIRS`."""
    groups: dict[tuple, list[int]] = {}
    for j, c in enumerate(columns):
        groups.setdefault(c.group, []).append(j)
    members = list(groups.values())
    if _count(columns, members) > MAX_PAIRS:
        return None
    rows: list[np.ndarray] = [np.arange(len(columns), dtype=np.int64)]
    cols: list[np.ndarray] = [np.arange(len(columns), dtype=np.int64)]
    for a, ga in enumerate(members):
        for gb in members[a + 1 :]:
            r, c = _group_pairs(columns, ga, gb)
            rows.append(r)
            cols.append(c)
    j, k = np.concatenate(rows), np.concatenate(cols)
    lo, hi = np.minimum(j, k), np.maximum(j, k)
    order = np.lexsort((hi, lo))
    return lo[order], hi[order]


def _shared(columns: Sequence[PairColumn], ga: list[int], gb: list[int]) -> list[str]:
    fb = set(columns[gb[0]].factors)
    return [f for f in columns[ga[0]].factors if f in fb]


def _key(c: PairColumn, factors: Sequence[str]) -> tuple[str, ...]:
    lv = dict(zip(c.factors, c.levels, strict=True))
    return tuple(lv[f] for f in factors)


def _by_key(columns: Sequence[PairColumn], group: list[int], factors: list[str]) -> dict:
    out: dict[tuple[str, ...], list[int]] = {}
    for j in group:
        out.setdefault(_key(columns[j], factors), []).append(j)
    return out


def _count(columns: Sequence[PairColumn], members: list[list[int]]) -> int:
    n = len(columns)
    for a, ga in enumerate(members):
        for gb in members[a + 1 :]:
            shared = _shared(columns, ga, gb)
            if not shared:
                n += len(ga) * len(gb)
                continue
            kb = _by_key(columns, gb, shared)
            n += sum(len(kb.get(_key(columns[j], shared), ())) for j in ga)
        if n > MAX_PAIRS:
            break
    return n


def _group_pairs(
    columns: Sequence[PairColumn], ga: list[int], gb: list[int]
) -> tuple[np.ndarray, np.ndarray]:
    shared = _shared(columns, ga, gb)
    a, b = np.asarray(ga, dtype=np.int64), np.asarray(gb, dtype=np.int64)
    if not shared:
        return np.repeat(a, len(b)), np.tile(b, len(a))
    kb = _by_key(columns, gb, shared)
    r: list[int] = []
    c: list[int] = []
    for j in ga:
        hits = kb.get(_key(columns[j], shared), ())
        r += [j] * len(hits)
        c += hits
    return np.asarray(r, dtype=np.int64), np.asarray(c, dtype=np.int64)
