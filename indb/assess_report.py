"""Text and JSON renderings of an assessment (:class:`~indb.assessment.AssessResult`).

The layout is indb's own: a head of two lines (what was judged, on what), a block of
totals, with a second model its figures side by side and the double-lift table, the score's
bands, a table per column by level, the calibration of a binomial model, notes and the
closing caution. With a second model every table of bands and levels gains its expected and
A/E (columns ``against`` and ``A/E against``). Numbers in a table column share their
decimals; missing or non-finite numbers print as ``n/a``.
"""

from __future__ import annotations

import json
import math
import textwrap
from collections.abc import Sequence
from typing import Any

from indb.assessment import (
    CAUTION,
    AgainstFigures,
    AssessResult,
    Band,
    CalibrationBand,
    Level,
    RatioBand,
)

NA = "n/a"
#: width of wrapped prose
WIDTH = 100


def assess_json(result: AssessResult) -> str:
    """One indented JSON document (non-finite numbers as null)."""
    return json.dumps(result.to_dict(), indent=2, allow_nan=False)


def assess_text(result: AssessResult) -> str:
    """The assessment as plain text, ending with a newline."""
    blocks = [_head(result), _totals(result)]
    if result.against is not None:
        blocks += [_side_by_side(result, result.against), _ratio_bands(result)]
    blocks.append(_bands(result.bands))
    blocks += [_levels(column, levels) for column, levels in result.levels.items()]
    if result.calibration is not None:
        blocks.append(_calibration(result))
    if result.notes:
        blocks.append("\n".join(f"note: {n}" for n in result.notes))
    blocks.append(textwrap.fill(CAUTION, width=WIDTH))
    return "\n\n".join(blocks) + "\n"


# -- numbers ---------------------------------------------------------------------------------


def _finite(v: Any) -> bool:
    return v is not None and isinstance(v, int | float) and math.isfinite(v)


def _count(v: float) -> str:
    return f"{v:,.0f}" if _finite(v) else NA


def _general(v: float, digits: int = 6) -> str:
    if not _finite(v):
        return NA
    if v != 0 and (abs(v) >= 1e9 or abs(v) < 1e-4):
        return f"{v:.{digits - 1}e}"
    return f"{v:,.{digits}g}" if abs(v) < 1e5 else f"{v:,.0f}"


def _percent(v: float) -> str:
    return f"{100 * v:.2f}%" if _finite(v) else NA


def _decimals(values: Sequence[float], significant: int = 5) -> int:
    """Decimals that give the largest value about ``significant`` digits (0 to 6)."""
    finite = [abs(v) for v in values if _finite(v) and v != 0]
    if not finite:
        return 0
    lead = math.floor(math.log10(max(finite)))
    return max(0, min(6, significant - 1 - lead))


def _column(values: Sequence[float], significant: int = 5) -> list[str]:
    places = _decimals(values, significant)
    return [f"{v:,.{places}f}" if _finite(v) else NA for v in values]


def _shared(
    low: Sequence[float], high: Sequence[float], significant: int = 5
) -> tuple[list[str], list[str]]:
    """Two columns (a range's ends) with the same decimals."""
    both = _column([*low, *high], significant)
    return both[: len(low)], both[len(low) :]


def _whole(values: Sequence[float]) -> list[str]:
    """A column of sums that are whole numbers shown without decimals (counts of claims)."""
    if all(not _finite(v) or float(v).is_integer() for v in values):
        return [_count(v) for v in values]
    return _column(values)


def _ratio(a: float, b: float) -> float:
    return a / b if _finite(a) and _finite(b) and b != 0 else math.nan


def _table(headers: Sequence[str], columns: Sequence[Sequence[str]], left: int = 0) -> str:
    """Columns separated by two spaces; the first ``left`` columns left-aligned."""
    rows = list(zip(*columns, strict=True)) if columns else []
    widths = [max([len(h), *(len(r[i]) for r in rows)]) for i, h in enumerate(headers)]

    def line(cells: Sequence[str]) -> str:
        parts = [
            c.ljust(w) if i < left else c.rjust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        ]
        return "  ".join(parts).rstrip()

    return "\n".join([line(headers), *(line(r) for r in rows)])


# -- blocks ----------------------------------------------------------------------------------


def _head(r: AssessResult) -> str:
    offset = f", offset {r.offset}" if r.offset else ""
    return (
        f"Model {r.model}, version {r.version}, judged on {r.source}\n"
        f"{r.family} family, {r.link} link{offset}; {r.engine}, "
        f"{r.scans} scan{'s' if r.scans != 1 else ''}, {r.seconds:.2f} s"
    )


def _totals(r: AssessResult) -> str:
    kept = f"{r.rows:,} of {r.rows_read:,} read"
    if r.rows_excluded:
        reasons = "; ".join(f"{k} {v:,}" for k, v in r.excluded.items())
        kept += f" ({r.rows_excluded:,} set aside: {reasons})"
    pairs = [
        ("rows used", kept),
        ("weight", _general(r.weight)),
        ("exposure", _general(r.exposure)),
        ("actual", _general(r.actual)),
        ("expected", _general(r.expected)),
        ("actual / expected", _general(r.actual_over_expected, 5)),
        ("deviance", _general(r.deviance)),
        ("mean deviance", _general(r.mean_deviance, 5) + "  (per unit of weight)"),
        ("constant-rate deviance", _general(r.null_deviance)),
        ("deviance explained", _percent(r.deviance_explained)),
        ("Gini", _general(r.gini, 4) + f"  (normalized {_general(r.gini_normalized, 4)})"),
    ]
    if r.rows_unseen:
        pairs.append(("rows with unseen levels", f"{r.rows_unseen:,}  (scored as the reference)"))
    width = max(len(k) for k, _ in pairs)
    return "\n".join(f"{k.ljust(width)}  {v}" for k, v in pairs)


def _label(model: str, version: int) -> str:
    return f"{model} v{version}" if version else f"{model} (new)"


def _side_by_side(r: AssessResult, two: AgainstFigures) -> str:
    offset = f", offset {two.offset}" if two.offset else ""
    title = (
        f"Against {_label(two.model, two.version)} ({two.family} family, {two.link} link"
        f"{offset}): the same scans, the same rows"
    )
    pairs = [
        ("expected", r.expected, two.expected, _general),
        ("actual / expected", r.actual_over_expected, two.actual_over_expected, _general),
        ("deviance", r.deviance, two.deviance, _general),
        ("mean deviance", r.mean_deviance, two.mean_deviance, _general),
        ("deviance explained", r.deviance_explained, two.deviance_explained, _percent),
        ("Gini", r.gini, two.gini, _general),
        ("Gini normalized", r.gini_normalized, two.gini_normalized, _general),
        ("rows with unseen levels", r.rows_unseen, two.rows_unseen, _count),
    ]
    headers = ["", _label(r.model, r.version), _label(two.model, two.version)]
    columns = [[k for k, *_ in pairs], [f(a) for _, a, _, f in pairs]]
    columns.append([f(b) for _, _, b, f in pairs])
    return title + "\n" + _table(headers, columns, left=1)


def _ratio_bands(r: AssessResult) -> str:
    bands: Sequence[RatioBand] = r.ratio_bands or ()
    two = r.against
    assert two is not None
    title = (
        f"Double lift: {len(bands)} bands of equal exposure along the ratio of the scores, "
        f"{_label(two.model, two.version)} over {_label(r.model, r.version)}, lowest first"
    )
    headers = ["band", "rows", "exposure", "actual", "expected", "A/E", "against"]
    headers += ["A/E against", "ratio from", "to"]
    columns = [
        [str(b.band) for b in bands],
        [_count(b.rows) for b in bands],
        _column([b.exposure for b in bands]),
        _whole([b.actual for b in bands]),
        *_expected_columns(bands),
        *_shared([b.ratio_low for b in bands], [b.ratio_high for b in bands], 4),
    ]
    return title + "\n" + _table(headers, columns)


def _expected_columns(rows: Sequence[Band | Level | RatioBand]) -> list[list[str]]:
    """expected and A/E, and the second model's where there is one."""
    out = [
        _column([b.expected for b in rows]),
        _column([_ratio(b.actual, b.expected) for b in rows], 4),
    ]
    if rows and rows[0].expected_against is not None:
        against = [math.nan if b.expected_against is None else b.expected_against for b in rows]
        out += [
            _column(against),
            _column([_ratio(b.actual, e) for b, e in zip(rows, against, strict=True)], 4),
        ]
    return out


def _against_headers(rows: Sequence[Band | Level]) -> list[str]:
    return ["against", "A/E against"] if rows and rows[0].expected_against is not None else []


def _bands(bands: Sequence[Band]) -> str:
    title = (
        f"Score in {len(bands)} bands of equal exposure, lowest first\n"
        "(score: the predicted mean without the offset; rows of one score share a band)"
    )
    headers = ["band", "rows", "exposure", "actual", "expected", "A/E", *_against_headers(bands)]
    headers += ["score from", "to"]
    columns = [
        [str(b.band) for b in bands],
        [_count(b.rows) for b in bands],
        _column([b.exposure for b in bands]),
        _whole([b.actual for b in bands]),
        *_expected_columns(bands),
        *_shared([b.score_low for b in bands], [b.score_high for b in bands]),
    ]
    return title + "\n" + _table(headers, columns)


def _levels(column: str, levels: Sequence[Level]) -> str:
    banded = any(lv.band is not None for lv in levels)
    if banded:
        title = f"By {column}, in bands of equal exposure along its values"
    else:
        title = f"By level of {column}"
    shown = [
        ("NULL" if lv.level is None else lv.level) + (" *" if lv.unseen else "") for lv in levels
    ]
    headers = ["values" if banded else "level", "rows", "exposure", "actual", "expected", "A/E"]
    headers += _against_headers(levels)
    columns = [
        shown,
        [_count(lv.rows) for lv in levels],
        _column([lv.exposure for lv in levels]),
        _whole([lv.actual for lv in levels]),
        *_expected_columns(levels),
    ]
    text = title + "\n" + _table(headers, columns, left=1)
    if any(lv.unseen for lv in levels):
        text += "\n* not a level of the model's training rows: scored as the reference level"
    return text


def _calibration(r: AssessResult) -> str:
    bands: Sequence[CalibrationBand] = r.calibration or ()
    title = f"Calibration in {len(bands)} bands of equal weight along the predicted probability"
    headers = ["band", "rows", "weight", "predicted", "observed", "probability from", "to"]
    columns = [
        [str(b.band) for b in bands],
        [_count(b.rows) for b in bands],
        _column([b.weight for b in bands]),
        _column([b.predicted for b in bands], 4),
        _column([b.observed for b in bands], 4),
        *_shared([b.p_low for b in bands], [b.p_high for b in bands], 4),
    ]
    text = title + "\n" + _table(headers, columns)
    hl = r.hosmer_lemeshow
    if hl is not None:
        text += (
            f"\nHosmer-Lemeshow chi-square {_general(hl.statistic, 5)}, {hl.df} df, "
            f"p = {_general(hl.p_value, 3)} ({hl.groups} bands)"
        )
    return text
