"""Between an assessment's two grouped scans: the bands' cut points from the order scan,
and the order scan's figures (lowest and highest key, tie groups, the Lorenz sum) joined to
the band scan's rows. numpy on a few rows per part."""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from indb.errors import NondeterministicSourceError
from indb.plan.assess_scan import AssessPlan, Cuts, part_mask

#: the order scan's columns joined to the band scan's rows (NaN for levels, NULL bands)
ORDER_COLUMNS = ("lo", "hi", "ng", "ta")


def order_rows(
    scans: Sequence[tuple[Sequence[int], Mapping[str, np.ndarray]]],
) -> dict[str, np.ndarray]:
    """The order scans' rows in one table, each with ``part`` (its index in ``plan.parts``)
    for the scan's ``g``; ``scans``: (the scan's parts, its columns) per order scan."""
    out: dict[str, list[np.ndarray]] = {k: [] for k in ("part", "band", *ORDER_COLUMNS)}
    for parts, cols in scans:
        g = np.asarray(cols["g"]).astype(np.int64)
        part = np.full(len(g), -1, dtype=np.int64)
        for j, i in enumerate(parts):
            part[g == part_mask(j, len(parts))] = i
        out["part"].append(part)
        for k in ("band", *ORDER_COLUMNS):
            out[k].append(np.asarray(cols[k], dtype=float))
    return {k: np.concatenate(v) if v else np.array([]) for k, v in out.items()}


def _order_rows(order: Mapping[str, np.ndarray]) -> dict[int, dict[int, int]]:
    """Per ordered part (its index in ``plan.parts``): band -> row of :func:`order_rows`."""
    part = np.asarray(order["part"]).astype(np.int64)
    band = np.asarray(order["band"], dtype=float)
    out: dict[int, dict[int, int]] = {}
    for i in np.unique(part):
        rows = np.flatnonzero((part == i) & ~np.isnan(band))
        out[int(i)] = {int(band[r]): int(r) for r in rows}
    return out


def band_cuts(order: Mapping[str, np.ndarray]) -> Cuts:
    """Per ordered part, its bands in order, each with its highest key (a tie group's key
    is in one band only, so cutting at the highest keys reproduces the bands)."""
    hi = np.asarray(order["hi"], dtype=float)
    return {
        i: [(b, float(hi[r])) for b, r in sorted(rows.items())]
        for i, rows in _order_rows(order).items()
    }


def with_order(
    plan: AssessPlan, cols: Mapping[str, np.ndarray], order: Mapping[str, np.ndarray]
) -> dict[str, np.ndarray]:
    """The band scan's columns with ``lo``, ``hi``, ``ng`` and ``ta`` of each ordered part's
    band from the order scan (NaN for levels and for a part's NULL band)."""
    g = np.asarray(cols["g"]).astype(np.int64)
    band = np.asarray(cols["band"], dtype=float)
    extra = {name: np.full(len(g), np.nan) for name in ORDER_COLUMNS}
    count = len(plan.parts)
    for i, rows in _order_rows(order).items():
        for r in np.flatnonzero((g == part_mask(i, count)) & ~np.isnan(band)):
            src = rows.get(int(band[r]))
            if src is None:
                raise NondeterministicSourceError(
                    f"the source {plan.ctx.spec.source.label()!r} is not deterministic: "
                    f"the band scan found band {int(band[r])} of part {i}, which the order "
                    "scan did not; store the rows first (CREATE TABLE ... AS)"
                )
            for name in ORDER_COLUMNS:
                extra[name][r] = float(order[name][src])
    return {**cols, **extra}
