"""Bookkeeping of one fit: the engine it runs on, the iteration log, its temporary tables
and what the route did (fold, sample start)."""

from __future__ import annotations

import contextlib
import dataclasses
import math
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from indb import solver
from indb.design import Scaling
from indb.engines.base_engine import Engine
from indb.errors import NondeterministicSourceError
from indb.plan.context import PlanContext
from indb.results import IterationRecord

Progress = Callable[[IterationRecord], None] | None


@dataclass
class FitRun:
    """Mutable bookkeeping for one fit."""

    engine: Engine
    progress: Progress
    log: list[IterationRecord]

    def query(self, tree) -> dict[str, np.ndarray]:
        t0 = time.perf_counter()
        out = self.engine.fetch_columns(self.engine.dialect.render(tree))
        if self.phase == "prepare":
            self.prepared(time.perf_counter() - t0)
        return out

    def prepared(self, seconds: float) -> None:
        """Tell ``progress`` that one pre-fit scan (profile, levels, fold...) took
        ``seconds``; the iteration log keeps the fit's own scans only."""
        self.prepare_scans += 1
        if self.progress is not None:
            self.progress(
                IterationRecord(
                    iteration=self.prepare_scans,
                    deviance=math.nan,
                    relative_change=math.nan,
                    step_halvings=0,
                    seconds=seconds,
                    phase="prepare",
                )
            )

    def one_row(self, tree) -> dict[str, object]:
        cols = self.query(tree)
        return {k: (v[0] if len(v) else None) for k, v in cols.items()}

    phase: str = "fit"
    temp_tables: list[str] = dataclasses.field(default_factory=list)
    compressed: tuple[int, int, float] | None = None
    original_ctx: PlanContext | None = None  # the uncompressed source, for the log-lik
    fit_ybar: float | None = None  # weighted mean response of the folded problem
    fold_seconds: float = 0.0
    #: the sample start: (rows in the sample, its IRLS scans, seconds), or why it was skipped
    sample: tuple[int, int, float] | str | None = None
    #: the fit's first scan summed only the gradient, X'WX taken from the sample's
    chord_start: bool = False
    #: the internal rescaling of response and weights (the scans' numbers -> the source's)
    scaling: Scaling = dataclasses.field(default_factory=Scaling)
    #: warnings found before the fit (digits lost to magnitudes), given with the result
    notes: list[str] = dataclasses.field(default_factory=list)
    #: doubts about the design found before the fit (an identifier taken as a predictor)
    design_notes: list[str] = dataclasses.field(default_factory=list)
    #: pre-fit scans so far (phase ``prepare``: told to ``progress``, not logged)
    prepare_scans: int = 0
    #: (rows, frequency-weighted rows) every IRLS scan of the fit's table must count
    expected: tuple[int, float] | None = None

    def drop_temp(self) -> None:
        for name in self.temp_tables:
            with contextlib.suppress(Exception):
                self.engine.execute(self.engine.dialect.drop_materialized(name))
        self.temp_tables.clear()

    def record(self, dev: float, change: float, halvings: int, seconds: float) -> None:
        rec = IterationRecord(
            iteration=len(self.log) + 1,
            deviance=self.scaling.unscale(dev),
            relative_change=change,
            step_halvings=halvings,
            seconds=seconds,
            phase=self.phase,
        )
        self.log.append(rec)
        if self.progress is not None:
            self.progress(rec)

    def check_rows(self, sums: solver.Sums) -> None:
        """Raise when a scan of the fit's table counts other rows than the profile did:
        the source returns different rows each time it is read."""
        if self.expected is None or self.phase == "sample":
            return
        rows, weighted = self.expected
        if sums.n == rows and abs(sums.n_weighted - weighted) <= 1e-9 * abs(weighted):
            return
        what = "rows" if sums.n != rows else "frequency-weighted rows"
        seen, before = (sums.n, rows) if sums.n != rows else (sums.n_weighted, weighted)
        raise NondeterministicSourceError(
            f"the source is not deterministic: IRLS scan {len(self.log) + 1} counted "
            f"{seen:,.6g} {what} where the profile scan counted {before:,.6g}. indb reads "
            "the source once per iteration, so it must return the same rows every time; "
            "a sample (USING SAMPLE, TABLESAMPLE), random(), a LIMIT without ORDER BY or a "
            "table written to during the fit breaks that. Store the rows first (CREATE "
            "TABLE ... AS SELECT ...) or make the sample repeatable (REPEATABLE (seed))"
        )


def fetched_count(v: object) -> int:
    """A count from a fetched aggregate: a SUM over no rows is NULL (None, or NaN after a
    driver's float conversion)."""
    return 0 if v is None or (isinstance(v, float) and math.isnan(v)) else int(v)
