"""Model declarations as plain, validated, frozen data.

A :class:`ModelSpec` says what to fit; it holds names and user SQL expressions as text and
knows nothing about engines. Family and link objects are resolved from names here, once.
"""

from __future__ import annotations

import math
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from indb import options as O
from indb.errors import SpecError
from indb.families import Family, NegativeBinomial, canonical_link, make_family
from indb.links import Link, make_link

# declared with the max_levels option; checked (and importable) here
from indb.options import MAX_LEVELS_LIMIT

_FILE_SUFFIXES = (".parquet", ".pq", ".csv", ".tsv", ".csv.gz", ".tsv.gz", ".json", ".ndjson")
_QUERY_START = re.compile(r"^\s*(\(|select\b|with\b|from\b|values\b|table\b)", re.IGNORECASE)


@dataclass(frozen=True)
class Source:
    """Where the rows come from: a query, a table/view name or a file path (glob allowed)."""

    kind: str  # "query" | "table" | "file"
    text: str

    @staticmethod
    def parse(text: str) -> Source:
        """Classify ``text`` as a query, a file path or a (possibly qualified) table name."""
        if not isinstance(text, str) or not text.strip():
            raise SpecError("source is empty: give a SELECT query, a table name or a file path")
        t = text.strip()
        if _QUERY_START.match(t):
            return Source("query", t.rstrip().rstrip(";"))
        low = t.lower()
        if low.endswith(_FILE_SUFFIXES) or any(ch in t for ch in "*?") or os.sep in t:
            return Source("file", t)
        return Source("table", t)

    def label(self) -> str:
        return self.text if len(self.text) <= 80 else self.text[:77] + "..."


@dataclass(frozen=True)
class ModelSpec:
    """A GLM declaration.

    Parameters
    ----------
    source:
        The rows (see :class:`Source`).
    response:
        Response column name. For grouped binomial data it holds successes and ``trials``
        the number of trials.
    family, link:
        Resolved family and link objects (use :meth:`build` to resolve names).
    offset, weight, frequency_weight, trials:
        SQL expressions over the source's columns, or None.
    covariance, cluster:
        Where the standard errors come from (``model``, ``robust`` or ``cluster``) and, for
        ``cluster``, the SQL expression whose value names each row's cluster.
    """

    source: Source
    response: str
    family: Family
    link: Link
    offset: str | None = None
    weight: str | None = None
    frequency_weight: str | None = None
    trials: str | None = None
    intercept: bool = True
    predictors: tuple[str, ...] | None = None
    exclude: tuple[str, ...] = ()
    categorical: tuple[str, ...] = ()
    reference: tuple[tuple[str, str], ...] = ()
    interactions: tuple[tuple[str, ...], ...] = ()
    splines: tuple[tuple[str, int], ...] = ()
    estimate_theta: bool = False
    on_null: str = "exclude"
    tol: float = 1e-8
    max_iter: int = 50
    strict: bool = False
    max_levels: int = 10_000
    confidence: float = 0.95
    start: tuple[tuple[str, float], ...] = field(default=())
    compress: str = "auto"
    sample_start: str = "auto"
    covariance: str = "model"
    cluster: str | None = None
    #: the elastic net (indb.penalty): lambda, the L1 share, standardized columns, per-column
    #: strengths, and a path of N lambdas down to path_ratio x lambda_max
    penalty: float | None = None
    l1_share: float = 0.0
    standardize: bool = False
    penalty_for: tuple[tuple[str, float], ...] = ()
    path: int | None = None
    path_ratio: float = 1e-3
    #: refit without each model term, in shared scans (indb.batchfit)
    drop_one: bool = False
    #: k-fold cross-validation of the path (indb.crossval): K, the per-row fold expression,
    #: and the rule choosing lambda from the fold table ('min' or 'one_se')
    folds: int | None = None
    fold_by: str | None = None
    cv_rule: str = "one_se"

    @property
    def penalised(self) -> bool:
        return self.penalty is not None or self.path is not None

    @staticmethod
    def build(
        source: str,
        response: str,
        family: str | Family = "gaussian",
        link: str | Link | None = None,
        *,
        trials: str | None = None,
        offset: str | None = None,
        weight: str | None = None,
        frequency_weight: str | None = None,
        power: float | None = None,
        theta: float | None = None,
        link_power: float | None = None,
        intercept: bool = True,
        predictors: Sequence[str] | None = None,
        exclude: Sequence[str] = (),
        categorical: Sequence[str] = (),
        reference: Mapping[str, str] | None = None,
        interactions: Sequence[Sequence[str]] = (),
        splines: Mapping[str, int] | None = None,
        on_null: str = "exclude",
        tol: float = 1e-8,
        max_iter: int = 50,
        strict: bool = False,
        max_levels: int = 10_000,
        confidence: float = 0.95,
        start: Mapping[str, float] | None = None,
        compress: str = "auto",
        sample_start: str = "auto",
        covariance: str = "model",
        cluster: str | None = None,
        penalty: float | None = None,
        l1_share: float = 0.0,
        standardize: bool = False,
        penalty_for: Mapping[str, float] | None = None,
        path: int | None = None,
        path_ratio: float = 1e-3,
        drop_one: bool = False,
        folds: int | None = None,
        fold_by: str | None = None,
        cv_rule: str = "one_se",
    ) -> ModelSpec:
        """Validate user options and resolve family/link names into a spec."""
        if not isinstance(response, str) or not response:
            raise SpecError("response must name a column of the source")
        fam = (
            family
            if isinstance(family, Family)
            else make_family(str(family), power=power, theta=theta)
        )
        estimate_theta = (
            isinstance(fam, NegativeBinomial) and theta is None and not isinstance(family, Family)
        )
        if link is None:
            lk = make_link("power", link_power) if link_power is not None else canonical_link(fam)
        elif isinstance(link, Link):
            lk = link
        else:
            lk = make_link(str(link), link_power)
        fam.check_link(lk)
        if trials is not None and fam.name != "binomial":
            raise SpecError(f"trials is for grouped binomial data; family is {fam.name!r}")
        # the enumerated options (on_null, compress, ...) against their declared values;
        # every parameter is a local here under its option's name
        O.check_choices(locals())
        if not (isinstance(tol, int | float) and 0 < tol < 1):
            raise SpecError(f"tol must be a number in (0, 1); got {tol!r}")
        if not (isinstance(max_iter, int) and max_iter >= 1):
            raise SpecError(f"max_iter must be a positive integer; got {max_iter!r}")
        if not (isinstance(max_levels, int) and 2 <= max_levels <= MAX_LEVELS_LIMIT):
            raise SpecError(
                f"max_levels must be an integer from 2 to {MAX_LEVELS_LIMIT:,}; got "
                f"{max_levels!r} (the README's 'Many levels' section gives the limits)"
            )
        if not (0 < confidence < 1):
            raise SpecError(f"confidence must be in (0, 1); got {confidence!r}")
        for name, expr in (
            ("offset", offset),
            ("weight", weight),
            ("frequency_weight", frequency_weight),
            ("trials", trials),
            ("cluster", cluster),
            ("fold_by", fold_by),
        ):
            if expr is not None and (not isinstance(expr, str) or not expr.strip()):
                raise SpecError(f"{name} must be a non-empty SQL expression; got {expr!r}")
        _check_covariance(covariance, cluster)
        inter: list[tuple[str, ...]] = []
        for group in interactions:
            cols = tuple(group.split(",")) if isinstance(group, str) else tuple(group)
            cols = tuple(c.strip() for c in cols)
            if len(cols) < 2 or any(not c for c in cols):
                raise SpecError(f"an interaction needs two or more column names; got {group!r}")
            if len(set(cols)) != len(cols):
                raise SpecError(f"interaction {cols!r} repeats a column")
            inter.append(cols)
        spl: list[tuple[str, int]] = []
        for colname, k in (splines or {}).items():
            if not (isinstance(k, int) and 3 <= k <= 10):
                raise SpecError(f"spline on column {colname!r} needs 3 to 10 knots; got {k!r}")
            spl.append((colname, k))
        check_penalty(penalty, l1_share, path, path_ratio, penalty_for)
        check_folds(folds, fold_by, penalty, path, compress)
        if (penalty is not None or path is not None) and covariance != "model":
            raise SpecError(
                f"covariance={covariance!r} gives standard errors, and a penalised fit reports "
                "none (docs/penalised-fits.md): leave covariance at 'model' (CLI: drop "
                "--covariance), or fit without penalty/path"
            )
        if drop_one and (penalty is not None or path is not None):
            raise SpecError(
                "drop_one=True compares deviances of maximum-likelihood fits, and a penalised "
                "fit has no likelihood-ratio tests: leave out drop_one (CLI: --drop-one), or "
                "fit without penalty/path"
            )
        st = tuple((str(k), float(v)) for k, v in (start or {}).items())
        if any(not math.isfinite(v) for _, v in st):
            raise SpecError("start values must be finite numbers")
        return ModelSpec(
            source=Source.parse(source),
            response=response,
            family=fam,
            link=lk,
            offset=offset,
            weight=weight,
            frequency_weight=frequency_weight,
            trials=trials,
            intercept=bool(intercept),
            predictors=tuple(predictors) if predictors is not None else None,
            exclude=tuple(exclude),
            categorical=tuple(categorical),
            reference=tuple((str(k), str(v)) for k, v in (reference or {}).items()),
            interactions=tuple(inter),
            splines=tuple(spl),
            estimate_theta=estimate_theta,
            on_null=on_null,
            tol=float(tol),
            max_iter=int(max_iter),
            strict=bool(strict),
            max_levels=int(max_levels),
            confidence=float(confidence),
            start=st,
            compress=compress,
            sample_start=sample_start,
            covariance=covariance,
            cluster=cluster,
            penalty=float(penalty) if penalty is not None else None,
            l1_share=float(l1_share),
            standardize=bool(standardize),
            penalty_for=tuple((str(k), float(v)) for k, v in (penalty_for or {}).items()),
            path=int(path) if path is not None else None,
            path_ratio=float(path_ratio),
            drop_one=bool(drop_one),
            folds=int(folds) if folds is not None else None,
            fold_by=fold_by,
            cv_rule=cv_rule,
        )

    def to_dict(self) -> dict[str, Any]:
        """Plain-data form (for reports, the registry and spec files)."""
        return {
            "source": {"kind": self.source.kind, "text": self.source.text},
            "response": self.response,
            "family": self.family.name,
            "family_params": self.family.params(),
            "estimate_theta": self.estimate_theta,
            "link": self.link.describe(),
            **self.link.params(),
            "offset": self.offset,
            "weight": self.weight,
            "frequency_weight": self.frequency_weight,
            "trials": self.trials,
            "intercept": self.intercept,
            "predictors": list(self.predictors) if self.predictors is not None else None,
            "exclude": list(self.exclude),
            "categorical": list(self.categorical),
            "reference": dict(self.reference),
            "interactions": [list(i) for i in self.interactions],
            "splines": dict(self.splines),
            "on_null": self.on_null,
            "tol": self.tol,
            "max_iter": self.max_iter,
            # only when asked for: registry versions hash their spec (registry.spec_hash),
            # and a default written out would make every version stored before it differ
            **(
                {"covariance": self.covariance, "cluster": self.cluster}
                if self.covariance != "model"
                else {}
            ),
            **self._penalty_dict(),
            # only when asked for (registry.spec_hash, as covariance)
            **({"drop_one": True} if self.drop_one else {}),
        }

    def _penalty_dict(self) -> dict[str, Any]:
        """The penalty's keys, only for a penalised fit (unpenalised specs keep their form)."""
        if not self.penalised:
            return {}
        return {
            "penalty": self.penalty,
            "l1_share": self.l1_share,
            "standardize": self.standardize,
            "penalty_for": dict(self.penalty_for),
            "path": self.path,
            "path_ratio": self.path_ratio,
            # only with cross-validation: earlier penalised versions keep their spec hash
            **(
                {"folds": self.folds, "fold_by": self.fold_by, "cv_rule": self.cv_rule}
                if self.folds is not None
                else {}
            ),
        }


def check_penalty(
    penalty: float | None,
    l1_share: float,
    path: int | None,
    path_ratio: float,
    penalty_for: Mapping[str, float] | None,
) -> None:
    """One-line input errors for the penalty options (indb.penalty)."""
    if penalty is not None and not (math.isfinite(penalty) and penalty >= 0):
        raise SpecError(
            f"penalty must be a number >= 0 (lambda of the elastic net); got {penalty!r}"
        )
    if not (math.isfinite(l1_share) and 0.0 <= l1_share <= 1.0):
        raise SpecError(f"l1_share must be in [0, 1] (0 = ridge, 1 = lasso); got {l1_share!r}")
    if path is not None and path < 2:
        raise SpecError(f"path must be a whole number >= 2 (values of lambda); got {path!r}")
    if path is not None and penalty is not None:
        raise SpecError(
            f"give penalty ({penalty!r}) or path ({path!r}), not both: a path chooses its own "
            "lambdas from lambda_max down"
        )
    if not (math.isfinite(path_ratio) and 0.0 < path_ratio < 1.0):
        raise SpecError(
            f"path_ratio must be in (0, 1) (smallest lambda / lambda_max); got {path_ratio!r}"
        )
    for column, factor in (penalty_for or {}).items():
        if not (math.isfinite(factor) and factor >= 0):
            raise SpecError(
                f"penalty_for {column!r} must be a number >= 0 (0 leaves it unpenalised); "
                f"got {factor!r}"
            )


def check_folds(
    folds: int | None,
    fold_by: str | None,
    penalty: float | None,
    path: int | None,
    compress: str,
) -> None:
    """One-line input errors for k-fold cross-validation (indb.crossval)."""
    if folds is None:
        if fold_by is not None:
            raise SpecError(
                f"fold_by={fold_by!r} is read only with folds=K (CLI --folds K): add it, or "
                "leave fold_by out"
            )
        return
    if isinstance(folds, bool) or not isinstance(folds, int) or folds < 2:
        raise SpecError(
            f"folds must be a whole number >= 2 (K of k-fold cross-validation); got {folds!r}"
        )
    if fold_by is None:
        raise SpecError(
            f"folds={folds} needs fold_by, a per-row integer SQL expression whose value mod "
            f"{folds} is the row's fold (CLI --fold-by EXPR), e.g. 'policy_id'"
        )
    if path is None:
        hint = f" instead of penalty={penalty!r}" if penalty is not None else ""
        raise SpecError(
            f"folds={folds} cross-validates the lambdas of a path: give path=N (CLI --path N){hint}"
        )
    if compress == "always":
        raise SpecError(
            "compress='always' groups rows by their design values and loses each row's fold; "
            "cross-validation reads the rows: leave compress at 'auto' (or 'never')"
        )


def _check_covariance(covariance: str, cluster: str | None) -> None:
    """A cluster expression goes with covariance 'cluster', and that kind needs one."""
    if covariance == "cluster" and cluster is None:
        raise SpecError(
            "covariance 'cluster' needs the cluster expression: cluster='policy_id' (CLI "
            "--cluster EXPR), any per-row SQL expression whose value names the row's cluster"
        )
    if cluster is not None and covariance != "cluster":
        raise SpecError(
            f"cluster={cluster!r} is read only with covariance='cluster' (CLI --covariance "
            f"cluster); got covariance={covariance!r}: add it, or leave the cluster out"
        )
