"""Frozen result objects returned by a fit.

A :class:`FitResult` carries everything a report, the registry or a scoring view needs:
coefficients on the original scale of the data, their covariance, goodness-of-fit
statistics and the iteration log. It holds no connection and does no I/O.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from indb.families import Family, make_family
from indb.links import Link, make_link

#: Coefficients up to which a result carries the whole covariance matrix (32 MB of doubles
#: at this size); above, ``covariance`` is None and the standard errors (its diagonal, all
#: that inference needs) are in the coefficient table.
COVARIANCE_MAX_TERMS = 2_000

#: Coefficients up to which the covariance goes into :meth:`FitResult.to_dict` (the JSON
#: output and each registry version): p^2 numbers, about 0.5 MB here but 250 MB at 3,000
#: coefficients. It is also the most a scoring view's interval SQL takes
#: (``writeback.MAX_SE_TERMS``), the one use a stored version has for it.
STORED_COVARIANCE_MAX_TERMS = 150


@dataclass(frozen=True)
class Coefficient:
    """One row of the coefficient table.

    ``term`` is the unique display name (``intercept``, ``age``, ``region=North``,
    ``age & region=North``); ``columns`` and ``levels`` say where it comes from.
    ``aliased`` coefficients are linear combinations of earlier ones: their estimate and
    standard error are NaN.
    """

    term: str
    columns: tuple[str, ...]
    levels: tuple[str | None, ...]
    estimate: float
    std_error: float
    wald: float
    p_two_sided: float
    lower_bound: float
    upper_bound: float
    aliased: bool = False


@dataclass(frozen=True)
class TermTest:
    """The Wald test of one whole model term (all its coefficients are zero): ``wald_chi2``
    on ``df`` degrees of freedom, ``p_value`` its chi-square tail probability."""

    term: str
    df: int
    wald_chi2: float
    p_value: float
    #: with drop_one (indb.batchfit): the deviance of the model without the term less the
    #: full model's (same rows), the difference in estimated coefficients, the test ("chi2"
    #: or "F", :func:`indb.comparison.deviance_test`), its statistic and p-value, and why
    #: a term was not tested or its test is doubtful; None without drop_one
    drop_deviance: float | None = None
    drop_df: int | None = None
    lr_test: str | None = None
    lr_statistic: float | None = None
    lr_p_value: float | None = None
    drop_note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready; the drop-one keys only when the fit ran the drop-one tests."""
        out = _clean(asdict(self))
        if self.drop_df is None and self.drop_note is None:
            for key in _DROP_KEYS:
                del out[key]
        return out

    @staticmethod
    def from_dict(t: dict[str, Any]) -> TermTest:
        """From :meth:`to_dict` (results stored before drop-one tests load without them)."""

        def f(v: Any) -> float:
            return math.nan if v is None else float(v)

        ran = t.get("drop_df") is not None or t.get("drop_note") is not None
        return TermTest(
            t["term"],
            int(t["df"]),
            f(t["wald_chi2"]),
            f(t["p_value"]),
            **(
                {
                    "drop_deviance": f(t.get("drop_deviance")),
                    "drop_df": None if t.get("drop_df") is None else int(t["drop_df"]),
                    "lr_test": t.get("lr_test"),
                    "lr_statistic": f(t.get("lr_statistic")),
                    "lr_p_value": f(t.get("lr_p_value")),
                    "drop_note": t.get("drop_note"),
                }
                if ran
                else {}
            ),
        )


_DROP_KEYS = ("drop_deviance", "drop_df", "lr_test", "lr_statistic", "lr_p_value", "drop_note")


@dataclass(frozen=True)
class Collinearity:
    """The generalized variance-inflation factor of one model term (Fox and Monette, 1992)
    and ``gvif_scaled`` = gvif^(1/(2 df)), which compares terms of different df."""

    term: str
    df: int
    gvif: float
    gvif_scaled: float


@dataclass(frozen=True)
class InverseEntries:
    """(X'WX)^-1 at the pairs of design columns one row can use together
    (:func:`indb.colpairs.compatible_pairs`): ``values[i]`` at (``rows[i]``, ``cols[i]``),
    rows <= cols, 0 at aliased columns.

    On the fit's standardized design (each value centred and scaled as ``design["values"]``
    says) and at unit dispersion, on the source's scale: a row's leverage is its working
    weight times x'Ax there, whatever the covariance kind of the standard errors.
    """

    rows: np.ndarray
    cols: np.ndarray
    values: np.ndarray

    def to_dict(self) -> dict[str, list]:
        return {
            "rows": self.rows.tolist(),
            "cols": self.cols.tolist(),
            "values": [_num(v) for v in self.values.tolist()],
        }

    @staticmethod
    def from_dict(d: dict[str, list]) -> InverseEntries:
        return InverseEntries(
            np.asarray(d["rows"], dtype=np.int64),
            np.asarray(d["cols"], dtype=np.int64),
            np.array([math.nan if v is None else float(v) for v in d["values"]], dtype=float),
        )


@dataclass(frozen=True)
class IterationRecord:
    """What one IRLS iteration (one aggregate scan) produced."""

    iteration: int
    deviance: float
    relative_change: float
    step_halvings: int
    seconds: float
    #: fit | sample (the sample start) | theta | null (intercept-only refit, null deviance)
    phase: str = "fit"


#: The text rendering ``str(result)`` uses, registered by :mod:`indb.report` when it is
#: imported (``import indb`` does): the report is a higher layer than the result it renders.
TEXT_RENDERER: dict[str, Callable[[FitResult], str]] = {}


@dataclass(frozen=True)
class FitResult:
    """The outcome of fitting one model.

    Attributes are named in the trade's terms. ``wald`` in the coefficient table is a
    z statistic when the dispersion is fixed and a t statistic (``residual_df`` degrees of
    freedom) when it is estimated; ``test`` says which. ``covariance`` is the coefficients'
    covariance matrix (NaN rows and columns at aliased terms) for models of up to
    :data:`COVARIANCE_MAX_TERMS` coefficients and ``None`` above; a result read back from
    JSON or the registry has it up to :data:`STORED_COVARIANCE_MAX_TERMS` coefficients.

    ``covariance_kind`` says where ``covariance`` and the standard errors, Wald
    statistics, p-values and intervals come from: ``model`` (the inverse information times
    the dispersion), ``robust`` (a sandwich of the rows' scores, no small-sample factor) or
    ``cluster`` (of the scores summed by cluster, over ``clusters`` clusters; a t statistic
    is then referred to ``clusters - 1`` degrees of freedom, :attr:`wald_df`).
    """

    family: str
    link: str
    response: str
    source: str
    coefficients: tuple[Coefficient, ...]
    covariance: np.ndarray | None
    deviance: float
    null_deviance: float
    pearson_chi2: float
    dispersion: float
    dispersion_estimated: bool
    log_likelihood: float
    aic: float
    bic: float
    model_df: int
    residual_df: float
    n_used: int
    n_excluded: int
    n_weighted: float
    iterations: int
    converged: bool
    iteration_log: tuple[IterationRecord, ...]
    test: str
    path: str
    seconds: float
    family_params: dict[str, float] = field(default_factory=dict)
    #: standard errors of estimated family parameters (the negative binomial theta)
    family_param_errors: dict[str, float] = field(default_factory=dict)
    excluded_by_column: dict[str, int] = field(default_factory=dict)
    aliased_terms: tuple[str, ...] = ()
    condition_number: float = math.nan
    warnings: tuple[str, ...] = ()
    confidence: float = 0.95
    spec: dict[str, Any] = field(default_factory=dict)
    design: dict[str, Any] = field(default_factory=dict)
    fingerprint: dict[str, Any] = field(default_factory=dict)
    deployment: dict[str, Any] = field(default_factory=dict)
    #: one Wald test per whole term, and each term's generalized VIF (no scan; NaN where
    #: the covariance is not kept)
    term_tests: tuple[TermTest, ...] = ()
    collinearity: tuple[Collinearity, ...] = ()
    #: (X'WX)^-1 where the diagnostics view's leverage reads it (None: more pairs than
    #: ``indb.colpairs.MAX_PAIRS``, or a result stored before results carried it)
    inverse_entries: InverseEntries | None = None
    covariance_kind: str = "model"
    clusters: int | None = None
    #: a penalised fit (indb.pathfit): lambda, the L1 share, lambda_max of a path, the
    #: penalised coefficients left non-zero and the note that no standard errors are
    #: reported; empty for an unpenalised fit
    penalty: dict[str, Any] = field(default_factory=dict)
    #: a lambda path: one {penalty, deviance, nonzero, coefficients} per lambda, largest first
    penalty_path: tuple[dict[str, Any], ...] = ()
    #: k-fold cross-validation of the path (indb.crossval): one {penalty, mean_deviance,
    #: se, per_fold} per lambda, the lambda the rule chose (the reported model's) and the rule
    cv: tuple[dict[str, Any], ...] = ()
    chosen_penalty: float | None = None
    chosen_rule: str | None = None

    # -- the model as objects ------------------------------------------------------------
    @property
    def family_object(self) -> Family:
        """The family as an object, with its fitted parameters (``family_params``)."""
        return make_family(self.family, **self.family_params)

    @property
    def link_object(self) -> Link:
        """The link as an object, from the canonical spec: its name and, for a power link
        without a name of its own, ``spec['link_power']`` (the display name ``power(p)``
        rounds the exponent, so it is never read back)."""
        power = self.spec.get("link_power")
        return make_link("power", power) if power is not None else make_link(self.link)

    # -- convenience views ---------------------------------------------------------------
    @property
    def terms(self) -> list[str]:
        """Term names in design order."""
        return [c.term for c in self.coefficients]

    @property
    def estimates(self) -> np.ndarray:
        """Estimates in design order (NaN for aliased terms)."""
        return np.array([c.estimate for c in self.coefficients])

    @property
    def std_errors(self) -> np.ndarray:
        """Standard errors in design order (NaN for aliased terms)."""
        return np.array([c.std_error for c in self.coefficients])

    def coef(self, term: str) -> Coefficient:
        """Return the coefficient row named ``term`` (raises ``KeyError`` if absent)."""
        for c in self.coefficients:
            if c.term == term:
                return c
        raise KeyError(f"no term named {term!r}; terms are {self.terms}")

    @property
    def wald_df(self) -> float:
        """Degrees of freedom of the t distribution the Wald statistics are referred to
        (``test == "t"``): the residual df, or the clusters less one with cluster-robust
        errors; NaN for z statistics."""
        if self.test != "t":
            return math.nan
        if self.covariance_kind == "cluster" and self.clusters is not None:
            return self.clusters - 1.0
        return self.residual_df

    @property
    def seconds_per_iteration(self) -> float:
        """Mean wall time of one IRLS iteration on the fitted table (phase ``fit``; the
        sample start's, theta's and the null model's scans are in ``iteration_log``)."""
        fit = [r.seconds for r in self.iteration_log if r.phase == "fit"]
        return sum(fit) / len(fit) if fit else math.nan

    def __str__(self) -> str:
        """The text report (:func:`indb.report.render_report`); ``repr`` keeps the fields."""
        render = TEXT_RENDERER.get("report")
        return render(self) if render is not None else repr(self)

    def to_dict(self, *, storage: bool = False) -> dict[str, Any]:
        """A JSON-ready dictionary (non-finite numbers become ``None``).

        ``storage=True`` (a registry version) adds what only the write-back reads:
        ``inverse_entries``, thousands of numbers for a model of many levels."""
        out: dict[str, Any] = {
            "family": self.family,
            "link": self.link,
            "response": self.response,
            "source": self.source,
            "coefficients": [_clean(asdict(c)) for c in self.coefficients],
            "covariance": (
                [[_num(v) for v in row] for row in self.covariance.tolist()]
                if self.covariance is not None
                and len(self.coefficients) <= STORED_COVARIANCE_MAX_TERMS
                else None
            ),
            "deviance": _num(self.deviance),
            "null_deviance": _num(self.null_deviance),
            "pearson_chi2": _num(self.pearson_chi2),
            "dispersion": _num(self.dispersion),
            "dispersion_estimated": self.dispersion_estimated,
            "log_likelihood": _num(self.log_likelihood),
            "aic": _num(self.aic),
            "bic": _num(self.bic),
            "model_df": self.model_df,
            "residual_df": _num(self.residual_df),
            "n_used": self.n_used,
            "n_excluded": self.n_excluded,
            "excluded_by_column": dict(self.excluded_by_column),
            "n_weighted": _num(self.n_weighted),
            "iterations": self.iterations,
            "converged": self.converged,
            "seconds": _num(self.seconds),
            "seconds_per_iteration": _num(self.seconds_per_iteration),
            "iteration_log": [_clean(asdict(r)) for r in self.iteration_log],
            "test": self.test,
            "path": self.path,
            "family_params": {k: _num(v) for k, v in self.family_params.items()},
            "family_param_errors": {k: _num(v) for k, v in self.family_param_errors.items()},
            "aliased_terms": list(self.aliased_terms),
            "condition_number": _num(self.condition_number),
            "warnings": list(self.warnings),
            "confidence": self.confidence,
            "covariance_kind": self.covariance_kind,
            "clusters": self.clusters,
            "spec": self.spec,
            "design": self.design,
            "fingerprint": self.fingerprint,
            "term_tests": [t.to_dict() for t in self.term_tests],
            "collinearity": [_clean(asdict(t)) for t in self.collinearity],
        }
        if storage and self.inverse_entries is not None:
            out["inverse_entries"] = self.inverse_entries.to_dict()
        if self.penalty:
            out["penalty"] = _clean(dict(self.penalty))
            out["penalty_path"] = [
                {
                    **_clean({k: v for k, v in r.items() if k != "coefficients"}),
                    "coefficients": _clean(dict(r["coefficients"])),
                }
                for r in self.penalty_path
            ]
        if self.cv:
            out["cv"] = [
                {
                    **_clean({k: v for k, v in r.items() if k != "per_fold"}),
                    "per_fold": [_num(v) for v in r["per_fold"]],
                }
                for r in self.cv
            ]
            out["chosen_penalty"] = _num(self.chosen_penalty)
            out["chosen_rule"] = self.chosen_rule
        if self.deployment:
            out["deployment"] = dict(self.deployment)
            out["scoring_view"] = self.deployment.get("scoring_view")
            out["mean_column"] = self.deployment.get("mean_column")
        return out

    @staticmethod
    def from_dict(d: dict[str, Any]) -> FitResult:
        """Rebuild a result from :meth:`to_dict` output (``None`` numbers become NaN)."""

        def f(v: Any) -> float:
            return math.nan if v is None else float(v)

        coefs = tuple(
            Coefficient(
                term=c["term"],
                columns=tuple(c["columns"]),
                levels=tuple(c["levels"]),
                estimate=f(c["estimate"]),
                std_error=f(c["std_error"]),
                wald=f(_stored(c, "wald")),
                p_two_sided=f(_stored(c, "p_two_sided")),
                lower_bound=f(_stored(c, "lower_bound")),
                upper_bound=f(_stored(c, "upper_bound")),
                aliased=bool(c.get("aliased", False)),
            )
            for c in d["coefficients"]
        )
        log = tuple(
            IterationRecord(
                iteration=int(r["iteration"]),
                deviance=f(r["deviance"]),
                relative_change=f(r["relative_change"]),
                step_halvings=int(r["step_halvings"]),
                seconds=f(r["seconds"]),
                phase=r.get("phase", "fit"),
            )
            for r in d.get("iteration_log", [])
        )
        stored = d.get("covariance")
        cov = (
            np.array([[f(v) for v in row] for row in stored], dtype=float).reshape(
                len(coefs), len(coefs)
            )
            if stored is not None
            else None
        )
        return FitResult(
            family=d["family"],
            link=d["link"],
            response=d["response"],
            source=d["source"],
            coefficients=coefs,
            covariance=cov,
            deviance=f(d["deviance"]),
            null_deviance=f(d["null_deviance"]),
            pearson_chi2=f(d["pearson_chi2"]),
            dispersion=f(d["dispersion"]),
            dispersion_estimated=bool(d["dispersion_estimated"]),
            log_likelihood=f(d["log_likelihood"]),
            aic=f(d["aic"]),
            bic=f(d["bic"]),
            model_df=int(_stored(d, "model_df")),
            residual_df=f(_stored(d, "residual_df")),
            n_used=int(d["n_used"]),
            n_excluded=int(d["n_excluded"]),
            n_weighted=f(d["n_weighted"]),
            iterations=int(d["iterations"]),
            converged=bool(d["converged"]),
            iteration_log=log,
            test=d["test"],
            path=d["path"],
            seconds=f(d["seconds"]),
            family_params={k: f(v) for k, v in d.get("family_params", {}).items()},
            family_param_errors={k: f(v) for k, v in d.get("family_param_errors", {}).items()},
            excluded_by_column=dict(d.get("excluded_by_column", {})),
            aliased_terms=tuple(d.get("aliased_terms", [])),
            condition_number=f(d.get("condition_number")),
            warnings=tuple(d.get("warnings", [])),
            confidence=float(d.get("confidence", 0.95)),
            # results stored before covariance kinds existed are model-based
            covariance_kind=d.get("covariance_kind", "model"),
            clusters=None if d.get("clusters") is None else int(d["clusters"]),
            spec=d.get("spec", {}),
            design=d.get("design", {}),
            fingerprint=d.get("fingerprint", {}),
            term_tests=tuple(TermTest.from_dict(t) for t in d.get("term_tests", [])),
            collinearity=tuple(
                Collinearity(t["term"], int(t["df"]), f(t["gvif"]), f(t["gvif_scaled"]))
                for t in d.get("collinearity", [])
            ),
            inverse_entries=(
                InverseEntries.from_dict(d["inverse_entries"]) if d.get("inverse_entries") else None
            ),
            penalty={k: (math.nan if v is None else v) for k, v in d.get("penalty", {}).items()},
            penalty_path=tuple(d.get("penalty_path", [])),
            cv=tuple({**r, "per_fold": [f(v) for v in r["per_fold"]]} for r in d.get("cv", [])),
            chosen_penalty=f(d["chosen_penalty"]) if d.get("cv") else None,
            chosen_rule=d.get("chosen_rule"),
        )


#: Keys under which results stored by indb 0.1 (registry versions written before the
#: coefficient table got its own names) hold these fields; read back, never written.
_STORED_BEFORE = {
    "wald": "statistic",
    "p_two_sided": "p_value",
    "lower_bound": "ci_low",
    "upper_bound": "ci_high",
    "model_df": "df_model",
    "residual_df": "df_resid",
}


def _stored(d: dict[str, Any], key: str) -> Any:
    """``d[key]``, or the value under the key an earlier indb stored it as."""
    return d[key] if key in d else d[_STORED_BEFORE[key]]


def _num(v: Any) -> Any:
    if isinstance(v, float | np.floating):
        v = float(v)
        return v if math.isfinite(v) else None
    if isinstance(v, np.integer):
        return int(v)
    return v


def _clean(d: dict[str, Any]) -> dict[str, Any]:
    return {k: (list(v) if isinstance(v, tuple) else _num(v)) for k, v in d.items()}
