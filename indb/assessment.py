"""An assessment of a stored model on new rows: the result objects and the numpy step that
turns the band and order scans' grouped rows into them (no I/O).

Definitions (``indb assess``; see docs/assessing-models.md):

* ``weight`` sum f pw (f the frequency weight, pw the prior weight, times trials for a
  binomial with trials); ``actual`` sum f pw y and ``expected`` sum f pw mu on the model's
  response scale (successes for a binomial with trials); ``deviance`` sum f pw d(y, mu) with
  the family's unit deviance, not divided by the dispersion; ``mean_deviance`` = deviance /
  weight; ``deviance_explained`` = 1 - deviance / deviance of the best constant rate on the
  same rows (offset included);
* ``gini``: rows in ascending order of the score (the mean without the offset), x the
  cumulative share of exposure (f exp(offset) for a log-link model with an offset, else
  f pw), y the cumulative share of actual, trapezoids over tie groups (ties never split),
  Gini = 1 - 2 area; ``gini_normalized`` divides it by the Gini of the same rows ordered by
  their actual rate (the best possible ordering);
* ``bands``: bands of equal exposure along the same order, a tie group going whole to the
  band that holds the midpoint of its exposure;
* ``against`` (a second model of the same family and response, scored in the same scans on
  the same rows: those where both models give a mean): its expected, deviance and Gini as
  above (along its own score, with the first model's exposure), and ``ratio_bands``, the
  double-lift table: bands of equal exposure along the ratio of the two scores (the second
  model's over the first's), each with actual, expected and expected_against;
* binomial models: a calibration table (the same bands along the predicted probability, of
  equal weight) and the Hosmer-Lemeshow statistic over its bands: sum (O - E)^2 /
  (E (1 - E / n)), n the band's weight, O and E its actual and expected, on G - 2 degrees
  of freedom (G bands with weight); Hosmer and Lemeshow, *Applied Logistic Regression*.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from indb.plan.assess_scan import (
    AGAINST,
    BANDS,
    BEST,
    LEVELS,
    MEAN,
    RATIO,
    SCORE,
    Part,
    part_mask,
)

#: the caution every rendering of an assessment ends with
CAUTION = (
    "These figures support, but do not replace, independent validation, a fairness review "
    "and a regulatory review of the model."
)


@dataclass(frozen=True)
class Band:
    """One band of equal exposure along the score (ascending)."""

    band: int
    rows: int
    weight: float
    exposure: float
    actual: float
    expected: float
    score_low: float
    score_high: float
    #: the second model's expected (``--against``)
    expected_against: float | None = None


@dataclass(frozen=True)
class RatioBand:
    """A band of the double-lift table: equal exposure along the ratio of the second
    model's score to the first model's (ascending: where the second predicts least relative
    to the first come first)."""

    band: int
    rows: int
    weight: float
    exposure: float
    actual: float
    expected: float
    expected_against: float
    ratio_low: float
    ratio_high: float


@dataclass(frozen=True)
class Level:
    """Sums over the rows of one level of a column (or one band of a numeric column's
    values: ``band``, ``low``, ``high``). ``unseen``: a level of a categorical predictor
    that the model's training rows did not have (scored as the reference level)."""

    level: str | None
    rows: int
    weight: float
    exposure: float
    actual: float
    expected: float
    unseen: bool = False
    band: int | None = None
    low: float | None = None
    high: float | None = None
    #: the second model's expected (``--against``)
    expected_against: float | None = None


@dataclass(frozen=True)
class CalibrationBand:
    """A binomial model's band of equal weight along the predicted probability."""

    band: int
    rows: int
    weight: float
    actual: float
    expected: float
    predicted: float  # expected / weight: the mean predicted probability
    observed: float  # actual / weight: the observed rate
    p_low: float
    p_high: float


@dataclass(frozen=True)
class HosmerLemeshow:
    """The Hosmer-Lemeshow statistic over the calibration bands."""

    statistic: float
    df: int
    p_value: float
    groups: int
    grouping: str = (
        "bands of equal weight along the predicted probability, a tie group going whole to "
        "the band holding the midpoint of its weight"
    )


class _Figures:
    """The ratios a model's totals give (a model judged on new rows, or the second one)."""

    deviance: float
    null_deviance: float
    weight: float
    actual: float
    expected: float

    @property
    def mean_deviance(self) -> float:
        return _ratio(self.deviance, self.weight)

    @property
    def deviance_explained(self) -> float:
        return 1.0 - _ratio(self.deviance, self.null_deviance)

    @property
    def actual_over_expected(self) -> float:
        return _ratio(self.actual, self.expected)


@dataclass(frozen=True)
class AgainstFigures(_Figures):
    """The second model's figures on the same rows (``--against``): what differs from the
    first model's (rows, weight, exposure and actual are the same)."""

    model: str
    version: int
    family: str
    link: str
    offset: str | None
    weight: float
    actual: float
    expected: float
    deviance: float
    null_deviance: float
    gini: float
    gini_normalized: float
    rows_unseen: int
    bands: tuple[Band, ...]

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            k: getattr(self, k)
            for k in (
                "model",
                "version",
                "family",
                "link",
                "offset",
                "expected",
                "actual_over_expected",
                "deviance",
                "mean_deviance",
                "deviance_explained",
                "gini",
                "gini_normalized",
                "rows_unseen",
            )
        }
        out["bands"] = [_band_dict(b) for b in self.bands]
        return _clean(out)


@dataclass(frozen=True)
class AssessResult(_Figures):
    """A stored model version judged on the rows of a source (see the module docstring)."""

    model: str
    version: int
    source: str
    engine: str
    family: str
    link: str
    offset: str | None
    rows: int
    rows_read: int
    rows_excluded: int
    #: why rows were set aside: NULLs per model input (a row can count under several) and
    #: rows whose inputs give no valid mean (``no valid mean``)
    excluded: dict[str, int]
    rows_unseen: int
    weight: float
    exposure: float
    actual: float
    expected: float
    deviance: float
    null_deviance: float
    gini: float
    gini_normalized: float
    bands: tuple[Band, ...]
    levels: dict[str, tuple[Level, ...]]
    calibration: tuple[CalibrationBand, ...] | None = None
    hosmer_lemeshow: HosmerLemeshow | None = None
    scans: int = 0
    seconds: float = math.nan
    notes: tuple[str, ...] = field(default_factory=tuple)
    #: the second model's figures and the double-lift table (``--against``)
    against: AgainstFigures | None = None
    ratio_bands: tuple[RatioBand, ...] | None = None

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dictionary (non-finite numbers become ``None``)."""
        out: dict[str, Any] = {
            k: getattr(self, k)
            for k in (
                "model",
                "version",
                "source",
                "engine",
                "family",
                "link",
                "offset",
                "rows",
                "rows_read",
                "rows_excluded",
                "excluded",
                "rows_unseen",
                "weight",
                "exposure",
                "actual",
                "expected",
                "actual_over_expected",
                "deviance",
                "mean_deviance",
                "null_deviance",
                "deviance_explained",
                "gini",
                "gini_normalized",
            )
        }
        out["bands"] = [_band_dict(b) for b in self.bands]
        out["levels"] = {c: [_level_dict(lv) for lv in lvs] for c, lvs in self.levels.items()}
        if self.against is not None:
            out["against"] = self.against.to_dict()
            out["ratio_bands"] = [asdict(b) for b in self.ratio_bands or ()]
        if self.calibration is not None:
            out["calibration"] = [asdict(b) for b in self.calibration]
        if self.hosmer_lemeshow is not None:
            out["hosmer_lemeshow"] = asdict(self.hosmer_lemeshow)
        out.update(scans=self.scans, seconds=self.seconds, notes=list(self.notes))
        return _clean(out)


def _level_dict(level: Level) -> dict[str, Any]:
    d = asdict(level)
    if level.band is None:
        for k in ("band", "low", "high"):
            d.pop(k)
    if level.expected_against is None:
        d.pop("expected_against")
    return d


def _band_dict(band: Band) -> dict[str, Any]:
    d = asdict(band)
    if band.expected_against is None:
        d.pop("expected_against")
    return d


def _clean(v: Any) -> Any:
    if isinstance(v, dict):
        return {k: _clean(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [_clean(x) for x in v]
    if isinstance(v, float | np.floating):
        return float(v) if math.isfinite(v) else None
    if isinstance(v, np.integer):
        return int(v)
    return v


def _ratio(a: float, b: float) -> float:
    return a / b if b != 0 and math.isfinite(a) and math.isfinite(b) else math.nan


@dataclass(frozen=True)
class LevelDeviation:
    """The worst |actual / expected - 1| over the levels (and bands of values) of every
    column an assessment reports, among those with an exposure of at least ``min_exposure``
    and an expected above 0; NaN, with ``column`` None, when no level qualifies."""

    value: float
    column: str | None
    level: str | None
    min_exposure: float
    levels: int  # levels that qualified

    def describe(self) -> str:
        if self.column is None:
            return f"no level has an exposure of at least {self.min_exposure:g}"
        level = "NULL" if self.level is None else self.level
        return f"{self.column} = {level}"


def worst_level_deviation(
    result: AssessResult, min_exposure: float = 0.0, *, against: bool = False
) -> LevelDeviation:
    """:class:`LevelDeviation` of the first model (of the second with ``against``)."""
    worst, where, count = math.nan, (None, None), 0
    for column, levels in result.levels.items():
        for lv in levels:
            expected = lv.expected_against if against else lv.expected
            if expected is None or not (expected > 0 and lv.exposure >= min_exposure):
                continue
            count += 1
            dev = abs(lv.actual / expected - 1.0)
            if count == 1 or dev > worst:
                worst, where = dev, (column, lv.level)
    return LevelDeviation(worst, where[0], where[1], float(min_exposure), count)


# -- the numpy step --------------------------------------------------------------------------


@dataclass(frozen=True)
class PartRows:
    """The band scan's rows of one part, with the order scan's ``lo``, ``hi``, ``ng`` and
    ``ta``, as numpy arrays (see
    :func:`indb.plan.assess_scan.assess_query` for the columns)."""

    part: Part
    cols: dict[str, np.ndarray]

    def __len__(self) -> int:
        return len(self.cols["n"])

    def total(self, name: str) -> float:
        return float(np.sum(_zero_nan(self.cols[name])))


def _zero_nan(a: np.ndarray) -> np.ndarray:
    out = np.asarray(a, dtype=float)
    return np.where(np.isnan(out), 0.0, out)


def split_parts(parts: Sequence[Part], cols: Mapping[str, np.ndarray]) -> list[PartRows]:
    """The fetched rows of the band scan, per part (rows in band, then level order)."""
    g = np.asarray(cols["g"]).astype(np.int64)
    out = []
    for i, part in enumerate(parts):
        idx = np.flatnonzero(g == part_mask(i, len(parts)))
        sub = {k: np.asarray(v)[idx] for k, v in cols.items()}
        order = np.lexsort((_sort_text(sub["lv"]), _band_key(sub["band"])))
        out.append(PartRows(part, {k: v[order] for k, v in sub.items()}))
    return out


def _band_key(band: np.ndarray) -> np.ndarray:
    b = np.asarray(band, dtype=float)
    return np.where(np.isnan(b), np.inf, b)  # the NULL band (a NULL value) last


def _sort_text(values: np.ndarray) -> np.ndarray:
    keys = [(1, "") if _missing(v) else (0, str(v)) for v in values]
    rank = {k: i for i, k in enumerate(sorted(set(keys)))}
    return np.array([rank[k] for k in keys])


def _missing(v: Any) -> bool:
    return v is None or (isinstance(v, float) and math.isnan(v))


def gini_of(rows: PartRows) -> float:
    """1 - 2 x the area under the ordered Lorenz curve of an ordered part, from the order
    scan's ``ta`` (:mod:`indb.plan.assess_order`): Gini = sum(ta) / (X Y) - 1."""
    keyed = ~np.isnan(np.asarray(rows.cols["band"], dtype=float))
    x = float(np.sum(_zero_nan(rows.cols["ex"])[keyed]))
    y = float(np.sum(_zero_nan(rows.cols["ac"])[keyed]))
    if not (x > 0 and y > 0):
        return math.nan
    return float(np.sum(_zero_nan(rows.cols["ta"])[keyed])) / (x * y) - 1.0


def _against(rows: PartRows, j: int) -> float | None:
    """The second model's expected in row ``j`` (None without a second model)."""
    ep2 = rows.cols.get("ep2")
    return None if ep2 is None else float(ep2[j])


def bands_of(rows: PartRows) -> tuple[Band, ...]:
    c = rows.cols
    return tuple(
        Band(
            band=int(c["band"][j]),
            rows=int(c["n"][j]),
            weight=float(c["wt"][j]),
            exposure=float(c["ex"][j]),
            actual=float(c["ac"][j]),
            expected=float(c["ep"][j]),
            score_low=float(c["lo"][j]),
            score_high=float(c["hi"][j]),
            expected_against=_against(rows, j),
        )
        for j in range(len(rows))
        if not _missing(c["band"][j])
    )


def ratio_bands_of(rows: PartRows) -> tuple[RatioBand, ...]:
    """The double-lift table from the ratio part (its key is ln of the ratio)."""
    c = rows.cols
    return tuple(
        RatioBand(
            band=int(c["band"][j]),
            rows=int(c["n"][j]),
            weight=float(c["wt"][j]),
            exposure=float(c["ex"][j]),
            actual=float(c["ac"][j]),
            expected=float(c["ep"][j]),
            expected_against=float(c["ep2"][j]),
            ratio_low=_exp(float(c["lo"][j])),
            ratio_high=_exp(float(c["hi"][j])),
        )
        for j in range(len(rows))
        if not _missing(c["band"][j])
    )


def _exp(x: float) -> float:
    return math.exp(x) if x < 709.0 else math.inf


def unordered_rows(rows: PartRows) -> int:
    """Rows of an ordered part with no key (NULL: no ratio of the scores)."""
    c = rows.cols
    return sum(int(c["n"][j]) for j in range(len(rows)) if _missing(c["band"][j]))


def levels_of(rows: PartRows, training_levels: Sequence[str] | None) -> tuple[Level, ...]:
    """A level part's rows, or a banded column's bands (and its NULL row), as levels;
    ``training_levels``: the model's levels of the column (None: not a model factor)."""
    c = rows.cols
    known = set(training_levels) if training_levels is not None else None
    out = []
    for j in range(len(rows)):
        common = {
            "rows": int(c["n"][j]),
            "weight": float(c["wt"][j]),
            "exposure": float(c["ex"][j]),
            "actual": float(c["ac"][j]),
            "expected": float(c["ep"][j]),
            "expected_against": _against(rows, j),
        }
        if rows.part.role == BANDS:
            if _missing(c["band"][j]):
                out.append(Level(level=None, **common))
                continue
            lo, hi = float(c["lo"][j]), float(c["hi"][j])
            out.append(
                Level(
                    level=f"{lo:.6g}" if lo == hi else f"{lo:.6g} .. {hi:.6g}",
                    band=int(c["band"][j]),
                    low=lo,
                    high=hi,
                    **common,
                )
            )
            continue
        value = None if _missing(c["lv"][j]) else str(c["lv"][j])
        unseen = known is not None and (value is None or value not in known)
        out.append(Level(level=value, unseen=unseen, **common))
    return tuple(out)


def calibration_of(rows: PartRows) -> tuple[CalibrationBand, ...]:
    c = rows.cols
    out = []
    for j in range(len(rows)):
        if _missing(c["band"][j]):
            continue
        wt, ac, ep = float(c["wt"][j]), float(c["ac"][j]), float(c["ep"][j])
        # the part's key is the predicted probability (the score, without an offset)
        lo, hi = float(c["lo"][j]), float(c["hi"][j])
        out.append(
            CalibrationBand(
                band=int(c["band"][j]),
                rows=int(c["n"][j]),
                weight=wt,
                actual=ac,
                expected=ep,
                predicted=_ratio(ep, wt),
                observed=_ratio(ac, wt),
                p_low=lo,
                p_high=hi,
            )
        )
    return tuple(out)


def hosmer_lemeshow(bands: Sequence[CalibrationBand]) -> HosmerLemeshow:
    """sum (O - E)^2 / (E (1 - E / n)) over the bands with weight, on G - 2 df.

    A band whose expected count is 0 or its whole weight (E (1 - E/n) = 0) adds nothing and
    is not counted in G: its term is 0/0 when O = E, and only rounding separates them.
    """
    from scipy import stats

    terms = []
    for b in bands:
        n, o, e = b.weight, b.actual, b.expected
        var = e * (1.0 - e / n) if n > 0 else 0.0
        if var > 0:
            terms.append((o - e) ** 2 / var)
    groups = len(terms)
    df = groups - 2
    stat = float(sum(terms))
    p = float(stats.chi2.sf(stat, df)) if df >= 1 else math.nan
    return HosmerLemeshow(statistic=stat, df=df, p_value=p, groups=groups)


@dataclass(frozen=True)
class Header:
    """What the numpy step is told besides the grouped rows."""

    model: str
    version: int
    source: str
    engine: str
    family: str
    link: str
    offset: str | None
    rows_read: int
    rows_kept: int
    nulls: dict[str, int]
    #: each level part's column -> the model's training levels (None: not a model factor)
    training_levels: dict[str, Sequence[str] | None]
    #: the second model (``--against``): model, version, family, link, offset
    against: Mapping[str, Any] | None = None


def finish(
    header: Header,
    parts: Sequence[PartRows],
    null_deviance: float,
    *,
    scans: int,
    seconds: float,
    notes: Sequence[str] = (),
) -> AssessResult:
    """The assessment from the scan's rows per part (:func:`split_parts`)."""
    by_role: dict[str, PartRows] = {}
    for p in parts:
        if p.part.role in (SCORE, BEST, MEAN, AGAINST, RATIO):
            by_role[p.part.role] = p
    score = by_role[SCORE]
    gini = gini_of(score)
    best = gini_of(by_role[BEST])
    rows = int(score.total("n"))
    excluded = {f"NULL in {k}": v for k, v in header.nulls.items() if v}
    if header.rows_kept > rows:
        excluded["no valid mean"] = header.rows_kept - rows
    levels: dict[str, tuple[Level, ...]] = {}
    for p in parts:
        if p.part.role in (LEVELS, BANDS):
            levels[str(p.part.column)] = levels_of(
                p, header.training_levels.get(str(p.part.column))
            )
    calibration = hl = None
    if header.family == "binomial":
        calibration = calibration_of(by_role.get(MEAN, score))
        hl = hosmer_lemeshow(calibration)
    against = ratio = None
    if header.against is not None:
        second = by_role[AGAINST]
        against = AgainstFigures(
            **header.against,
            weight=score.total("wt"),
            actual=score.total("ac"),
            expected=score.total("ep2"),
            deviance=score.total("dv2"),
            null_deviance=null_deviance,
            gini=gini_of(second),
            gini_normalized=_ratio(gini_of(second), best),
            rows_unseen=int(score.total("nu2")),
            bands=bands_of(second),
        )
        ratio = ratio_bands_of(by_role[RATIO])
        no_ratio = unordered_rows(by_role[RATIO])
        if no_ratio:
            notes = [
                *notes,
                f"{no_ratio:,} rows have a score of 0 or less under one of the models: they "
                "have no ratio of the scores and are left out of the double-lift table",
            ]
    return AssessResult(
        model=header.model,
        version=header.version,
        source=header.source,
        engine=header.engine,
        family=header.family,
        link=header.link,
        offset=header.offset,
        rows=rows,
        rows_read=header.rows_read,
        rows_excluded=header.rows_read - rows,
        excluded=excluded,
        rows_unseen=int(score.total("nu")),
        weight=score.total("wt"),
        exposure=score.total("ex"),
        actual=score.total("ac"),
        expected=score.total("ep"),
        deviance=score.total("dv"),
        null_deviance=null_deviance,
        gini=gini,
        gini_normalized=_ratio(gini, best),
        bands=bands_of(score),
        levels=levels,
        calibration=calibration,
        hosmer_lemeshow=hl,
        scans=scans,
        seconds=seconds,
        notes=tuple(notes),
        against=against,
        ratio_bands=ratio,
    )
