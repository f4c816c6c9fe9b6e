"""The order scan of an assessment: where each ordered part's bands end, and its Lorenz curve.

Every ordered part (the score, the actual rate, a binomial model's mean, the second model's
score, the log-ratio of the two scores, a numeric column cut into bands) orders the scored
rows by its key. This scan reads only what the order needs, per row the key, the band
weight ``bw`` (the exposure, or f pw for a part cut by weight) and the actual ``ac``:

1. one GROUP BY GROUPING SETS with a set per ordered part gives its tie groups (rows with
   the same key), each with its sums of ``bw`` and ``ac``;
2. one window sum per part along its key gives each tie group the band weight up to and
   including it, ``cb``; the part's total ``tb`` comes from a window over the part;
3. a tie group's band is the one that holds the midpoint of its weight,
   ``min(N, floor(N (cb - bw/2) / tb) + 1)``, so a tie group is never split;
4. per (part, band): the lowest and highest key (``lo``, ``hi``), the tie groups (``ng``)
   and ``ta`` = sum over its tie groups of ac (2 cb - bw).

At most N rows per part come back. The band scan (:func:`indb.plan.assess_scan.assess_query`)
then cuts every row's key at the bands' highest keys and sums everything else per band;
only the light columns above go through the sort.

The Gini from ``ta``: with tie groups g in key order, e_g their exposure, a_g their actual,
E and A the totals and C_g the exposure of the groups up to and including g, the area under
the ordered Lorenz curve (trapezoids over tie groups) is
sum_g e_g (2 (actual up to g) - a_g) / (2 E A); since every pair of groups is counted once
from each side, sum_g e_g (2 (actual up to g) - a_g) + sum_g a_g (2 C_g - e_g) = 2 E A, so
area = 1 - T / (2 E A) with T = sum_g a_g (2 C_g - e_g), and Gini = 1 - 2 area = T / (E A) - 1.
One running sum (of the exposure) thus gives both the bands and the curve.
"""

from __future__ import annotations

from sqlglot import exp

from indb import sqlexpr as S
from indb.plan.assess_scan import (
    AGAINST,
    MEAN,
    RATIO,
    AssessPlan,
    by_mask,
    col_refs,
    part_key,
    part_mask,
    scored_rows,
)

#: ordered roles whose key usually takes about one value per row (a model's score or mean,
#: the ratio of two scores): each gets an order scan of its own, so that one sort of that
#: size at a time shares the engine's memory (three in one query ran out of a 512 MB DuckDB
#: limit at 10^8 rows)
LARGE = (MEAN, AGAINST, RATIO)


def order_scans(plan: AssessPlan) -> list[list[int]]:
    """The ordered parts (indices in ``plan.parts``) of each order scan: the score with the
    actual rate and the banded columns, then each part of :data:`LARGE` alone."""
    ordered = [i for i, p in enumerate(plan.parts) if p.ordered]
    first = [i for i in ordered if plan.parts[i].role not in LARGE]
    return [first] + [[i] for i in ordered if plan.parts[i].role in LARGE]


def _key(j: int) -> str:
    return f"o{j}"


def order_query(plan: AssessPlan, ordered: list[int]) -> exp.Select:
    """The order scan of the ordered parts ``ordered`` (indices in ``plan.parts``, one list
    of :func:`order_scans`): per part and band, ``g`` (the part's GROUPING bitmask among
    ``ordered``: :func:`indb.plan.assess_scan.part_mask` of its position), ``band``, ``lo``,
    ``hi``, ``ng`` and ``ta``.
    The band of a part's NULL keys (a NULL banded value, no ratio of the scores) is NULL."""
    parts = plan.parts
    count = len(ordered)
    inner = S.select(
        [
            *(S.alias(part_key(plan, i), _key(j)) for j, i in enumerate(ordered)),
            S.col("ex"),
            S.col("wt"),
            S.col("ac"),
        ],
        S.subquery(scored_rows(plan), "s"),
    )
    keys = [S.col(_key(j)) for j in range(count)]
    grouped = exp.Select(
        expressions=[
            S.alias(exp.Anonymous(this="GROUPING", expressions=[k.copy() for k in keys]), "g"),
            *(k.copy() for k in keys),
            S.alias(S.psum(S.col("ex")), "ex"),
            S.alias(S.psum(S.col("wt")), "wt"),
            S.alias(S.psum(S.col("ac")), "ac"),
        ]
    ).from_(S.subquery(inner, "r"), copy=False)
    sets = exp.GroupingSets(expressions=[exp.Tuple(expressions=[k.copy()]) for k in keys])
    grouped.set("group", exp.Group(grouping_sets=[sets]))
    masks = [part_mask(j, count) for j in range(count)]
    weighted = [j for j, i in enumerate(ordered) if parts[i].by_weight]
    keyed = S.select(
        [
            S.col("g"),
            S.alias(by_mask(masks, [S.col(_key(j)) for j in range(count)], exp.Null()), "k"),
            S.col("ac"),
            S.alias(
                by_mask([masks[j] for j in weighted], [S.col("wt") for _ in weighted], S.col("ex")),
                "bw",
            ),
        ],
        S.subquery(grouped, "gr"),
    )
    # a NULL key (a NULL banded value, no ratio) adds nothing, wherever the engine sorts NULLs
    has_key = S.not_(S.is_null(S.col("k")))
    keyed_bw = S.case([(has_key.copy(), S.col("bw"))])
    running = S.select(
        [
            *col_refs("g", "k", "ac", "bw"),
            S.alias(S.partition_sum(keyed_bw.copy(), "g", "k"), "cb"),
            S.alias(S.partition_sum(keyed_bw.copy(), "g"), "tb"),
        ],
        S.subquery(keyed, "kr"),
    )
    # the band count rides outside the sort: only g, k, ac and bw are sorted
    nb = by_mask(masks, [exp.Literal.number(parts[i].bands) for i in ordered], S.integer(1))
    mid = S.sub(S.col("cb"), S.div(S.col("bw"), S.num(2.0)))
    cut = S.add(S.floor_(S.div(S.mul(nb.copy(), mid), S.col("tb"))), exp.Literal.number(1))
    band = S.case([(S.and_(has_key.copy(), S.gt(S.col("tb"), S.num(0.0))), S.least(nb, cut))])
    ta = S.mul(S.col("ac"), S.sub(S.mul(S.num(2.0), S.col("cb")), S.col("bw")))
    banded = S.select(
        [*col_refs("g", "k"), S.alias(band, "band"), S.alias(S.case([(has_key, ta)]), "ta")],
        S.subquery(running, "cr"),
    )
    per_band = exp.Select(
        expressions=[
            *col_refs("g", "band"),
            S.alias(S.min_(S.col("k")), "lo"),
            S.alias(S.max_(S.col("k")), "hi"),
            S.alias(S.count_star(), "ng"),
            S.alias(S.sum_(S.col("ta")), "ta"),
        ]
    ).from_(S.subquery(banded, "bd"), copy=False)
    return per_band.group_by(*col_refs("g", "band"), copy=False)
