"""Model declarations in TOML spec files, for scheduled fits and retraining.

A spec file has up to four tables::

    [model]      # what to fit: source, response, family, link and the fit options
    [deploy]     # name, view_schema, score_source, intervals, registry_schema
    [gates]      # conditions a retrained version must meet to be promoted
    [engine]     # db, memory_limit, temp_directory, threads

Relative ``db`` and file-source paths are read relative to the spec file's folder.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from typing import Any

from indb.api import ENGINE_OPTIONS, SPEC_OPTIONS
from indb.errors import SpecError
from indb.spec import Source

# the fit options of indb.fit, less start values (a retrain takes them from the live version)
MODEL_KEYS = {"source", "response", "family", "link", *SPEC_OPTIONS} - {"start"}
DEPLOY_KEYS = {"name", "view_schema", "score_source", "intervals", "registry_schema"}
ENGINE_KEYS = {"db", *ENGINE_OPTIONS}
GATE_KEYS = {
    "require_converged",
    "max_relative_change",
    "max_change_in_se",
    "max_deviance_per_row_increase",
    "min_rows",
    "max_excluded_share",
}


@dataclass(frozen=True)
class Gates:
    """Promotion gates for a retrained version (None disables a gate).

    ``max_relative_change``: largest |new - old| / |old| over coefficients present in both;
    ``max_change_in_se``: largest |new - old| / (old standard error);
    ``max_deviance_per_row_increase``: relative increase of deviance per row allowed;
    ``min_rows``: fewest rows used; ``max_excluded_share``: largest share of rows excluded.
    """

    require_converged: bool = True
    max_relative_change: float | None = None
    max_change_in_se: float | None = None
    max_deviance_per_row_increase: float | None = None
    min_rows: int | None = None
    max_excluded_share: float | None = None


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
            raise SpecError(f'{self.path}: [deploy] needs a model name (name = "...")')
        return str(name)


def _check_keys(path: str, table: str, got: dict[str, Any], allowed: set[str]) -> None:
    unknown = sorted(set(got) - allowed)
    if unknown:
        raise SpecError(
            f"{path}: unknown key(s) {unknown} in [{table}]; allowed: {sorted(allowed)}"
        )


def load_spec_file(path: str) -> SpecFile:
    """Read and validate a TOML spec file."""
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise SpecError(f"spec file {path!r} does not exist") from None
    except tomllib.TOMLDecodeError as err:
        raise SpecError(f"spec file {path!r} is not valid TOML: {err}") from None
    _check_keys(path, "top level", data, {"model", "deploy", "engine", "gates"})
    model = dict(data.get("model", {}))
    deploy = dict(data.get("deploy", {}))
    engine = dict(data.get("engine", {}))
    gates = dict(data.get("gates", {}))
    _check_keys(path, "model", model, MODEL_KEYS)
    _check_keys(path, "deploy", deploy, DEPLOY_KEYS)
    _check_keys(path, "engine", engine, ENGINE_KEYS)
    _check_keys(path, "gates", gates, GATE_KEYS)
    for key in ("source", "response"):
        if key not in model:
            raise SpecError(f'{path}: [model] needs {key} = "..."')
    base = os.path.dirname(os.path.abspath(path))
    if "db" in engine and isinstance(engine["db"], str) and "://" not in engine["db"]:
        engine["db"] = _relative_to(base, engine["db"])
    src = Source.parse(model["source"])
    if src.kind == "file":
        model["source"] = _relative_to(base, model["source"])
    return SpecFile(path=path, model=model, deploy=deploy, engine=engine, gates=Gates(**gates))


def _relative_to(base: str, p: str) -> str:
    return p if os.path.isabs(p) or p == ":memory:" else os.path.join(base, p)
