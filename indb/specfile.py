"""Model declarations in TOML spec files, for scheduled fits and retraining.

A spec file has up to four tables::

    [model]      # what to fit: source, response, family, link and the fit options
    [deploy]     # name, view_schema, score_source, intervals, registry_schema
    [gates]      # conditions a retrained version must meet to be promoted
    [engine]     # db, memory_limit, temp_directory, threads

Relative ``db`` and file-source paths are read relative to the spec file's folder. Every key
is checked, before anything else runs, against the kind of value its option declares
(``indb.options.OPTIONS`` and the fields of :class:`Gates`).
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Sequence
from dataclasses import dataclass, field, fields
from typing import Any

from indb import options as O
from indb.errors import SpecError
from indb.options import Kind
from indb.spec import Source


def _gate(kind: Kind, default: Any = None) -> Any:
    return field(default=default, metadata={"kind": kind})


@dataclass(frozen=True)
class Gates:
    """Promotion gates for a retrained version (None disables a gate).

    ``max_relative_change``: largest |new - old| / |old| over coefficients present in both;
    ``max_change_in_se``: largest |new - old| / (old standard error);
    ``max_deviance_per_row_increase``: relative increase of deviance per row allowed;
    ``min_rows``: fewest rows used; ``max_excluded_share``: largest share of rows excluded.

    Holdout gates judge the new and the live version on the rows of ``holdout`` (a table,
    query or file), both in the same scans (:func:`indb.assess_run.assess_version`):
    ``max_holdout_deviance_increase``: (new - live) / live holdout deviance;
    ``max_gini_drop``: live Gini - new Gini on the holdout; ``max_level_ae_deviation``:
    the new version's worst |actual / expected - 1| over the levels (of its categorical
    predictors and the ``holdout_by`` columns) with an exposure of at least
    ``min_level_exposure`` (default 0).
    """

    require_converged: bool = _gate(O.BOOLEAN, True)
    max_relative_change: float | None = _gate(O.NUMBER)
    max_change_in_se: float | None = _gate(O.NUMBER)
    max_deviance_per_row_increase: float | None = _gate(O.NUMBER)
    min_rows: int | None = _gate(O.WHOLE)
    max_excluded_share: float | None = _gate(O.NUMBER)
    holdout: str | None = _gate(O.TEXT)
    holdout_by: Sequence[str] | None = _gate(O.NAMES)
    max_holdout_deviance_increase: float | None = _gate(O.NUMBER)
    max_gini_drop: float | None = _gate(O.NUMBER)
    max_level_ae_deviation: float | None = _gate(O.NUMBER)
    min_level_exposure: float | None = _gate(O.NUMBER)

    def __post_init__(self) -> None:
        # a gate of the wrong kind would otherwise fail only after the whole refit
        O.check_options(
            {f.name: getattr(self, f.name) for f in fields(self)},
            gate_kinds(),
            label=lambda key: f"gate {key}",
        )
        if self.holdout is not None and not self.holdout.strip():
            raise SpecError('gate holdout must name a table, query or file; got ""')
        for name in HOLDOUT_GATES:
            if getattr(self, name) is not None and self.holdout is None:
                raise SpecError(
                    f'gate {name} judges rows the fit did not see: give holdout = "SOURCE" '
                    "in [gates] (a table, query or file with the model's columns)"
                )
        for name in ("max_level_ae_deviation", "min_level_exposure"):
            value = getattr(self, name)
            if value is not None and not value >= 0:
                raise SpecError(f"gate {name} must be 0 or more; got {value!r}")


#: the gates (and settings) that need ``holdout``
HOLDOUT_GATES = (
    "holdout_by",
    "max_holdout_deviance_increase",
    "max_gini_drop",
    "max_level_ae_deviation",
    "min_level_exposure",
)


def gate_kinds() -> dict[str, Kind]:
    """Each gate and the kind of value it takes (declared on the fields of :class:`Gates`)."""
    return {f.name: f.metadata["kind"] for f in fields(Gates)}


# The keys of each table and the kind of value each takes, from the options' own
# declarations (indb.options.OPTIONS: an option's group is its table; start values, promote
# and new_version are not keys, see Option.in_file) and the fields of Gates.
TABLES: dict[str, dict[str, Kind]] = {
    "model": O.file_keys("model"),
    "deploy": O.file_keys("deploy"),
    "gates": gate_kinds(),
    "engine": O.file_keys("engine"),
}


@dataclass(frozen=True)
class SpecFile:
    """A parsed spec file."""

    path: str
    model: dict[str, Any]
    deploy: dict[str, Any] = field(default_factory=dict)
    engine: dict[str, Any] = field(default_factory=dict)
    gates: Gates = field(default_factory=Gates)

    @property
    def name(self) -> str:
        name = self.deploy.get("name")
        if not name:
            raise SpecError(f'spec file {self.path}: [deploy] needs a model name (name = "...")')
        return str(name)


def _check_keys(path: str, table: str, got: dict[str, Any], allowed: set[str]) -> None:
    unknown = sorted(set(got) - allowed)
    if unknown:
        raise SpecError(
            f"spec file {path}: unknown key(s) {unknown} in [{table}]; allowed: {sorted(allowed)}"
        )


def _tables(path: str, data: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """The four tables of a spec file, each checked for unknown keys and value kinds."""
    _check_keys(path, "top level", data, set(TABLES))
    out: dict[str, dict[str, Any]] = {}
    for table, declared in TABLES.items():
        got = data.get(table, {})
        # `model = "pol"` at the top level is a key, not the [model] table
        header = O.Kind(f"a table ([{table}] with its keys on the lines below)", O.TABLE.accepts)
        O.check_options(
            {table: got},
            {table: header},
            label=lambda key: f"spec file {path}: top-level key {key}",
            show=O.toml_text,
        )
        _check_keys(path, table, got, set(declared))
        O.check_options(
            got,
            declared,
            label=lambda key, table=table: f"spec file {path}: [{table}] {key}",
            show=O.toml_text,
        )
        out[table] = dict(got)
    return out


def load_spec_file(path: str) -> SpecFile:
    """Read and validate a TOML spec file.

    Raises
    ------
    SpecError
        For a missing file, invalid TOML, an unknown table or key, a value of the wrong
        kind (naming the table, key, expected kind and value), or a missing source/response.
    """
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise SpecError(f"spec file {path!r} does not exist") from None
    except tomllib.TOMLDecodeError as err:
        raise SpecError(f"spec file {path!r} is not valid TOML: {err}") from None
    tables = _tables(path, data)
    model, engine = tables["model"], tables["engine"]
    for key in ("source", "response"):
        if key not in model:
            raise SpecError(f'spec file {path}: [model] needs {key} = "..."')
    base = os.path.dirname(os.path.abspath(path))
    if engine.get("db", "").strip() and not _is_engine_url(engine["db"]):
        # normalised, so a message about the file shows where it was looked for
        engine["db"] = os.path.normpath(_relative_to(base, engine["db"]))
    for table, key in (("model", "source"), ("gates", "holdout")):
        text = tables[table].get(key)
        if isinstance(text, str) and text.strip() and Source.parse(text).kind == "file":
            tables[table][key] = _relative_to(base, text)
    return SpecFile(
        path=path,
        model=model,
        deploy=tables["deploy"],
        engine=engine,
        gates=Gates(**tables["gates"]),
    )


def _is_engine_url(db: str) -> bool:
    # postgresql://..., sc://host:port and spark:local[N] name servers, not files
    return "://" in db or db.strip().lower().startswith("spark:")


def _relative_to(base: str, p: str) -> str:
    return p if os.path.isabs(p) or p == ":memory:" else os.path.join(base, p)
