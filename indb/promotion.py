"""Which version goes live when the caller does not say, and what a new live version changes
for the SQL that uses the model (the default of ``promote``; see the registry's ``save``)."""

from __future__ import annotations

import json
from typing import Any

from indb import writeback as W
from indb.engines.base_dialect import Dialect
from indb.results import FitResult


def jsonable(obj: Any) -> Any:
    """``obj`` as JSON reads it back (tuples as lists, keys as text)."""
    return json.loads(json.dumps(obj, sort_keys=True, default=str))


#: spec keys that say how a fit ran, not which model it is (a changed tolerance or warm start
#: does not make a refit another model, nor do standard errors of another covariance kind:
#: the estimates are the same)
_RUN_KEYS = frozenset(
    {
        "start",
        "tol",
        "max_iter",
        "strict",
        "compress",
        "sample_start",
        "confidence",
        "sql_dialect",
        "covariance",
        "cluster",
    }
)


def spec_differences(live: dict[str, Any], new: dict[str, Any]) -> list[str]:
    """The spec keys whose values differ, run settings left out."""
    keys = (set(live) | set(new)) - _RUN_KEYS
    if live.get("estimate_theta") and new.get("estimate_theta"):
        keys.discard("family_params")  # theta estimated afresh from each fit's data
    return sorted(k for k in keys if jsonable(live.get(k)) != jsonable(new.get(k)))


def promote_by_default(
    name: str, version: int, result: FitResult, live: FitResult | None
) -> tuple[bool, str | None]:
    """Whether a version saved without an explicit ``promote`` goes live, and why not."""
    if live is None:
        return True, None
    changed = spec_differences(live.spec, result.spec)
    if not changed:
        return True, None
    return False, (
        f"version {version} of {name!r} was recorded held, not made live: its spec differs "
        f"from the live version's in {', '.join(changed)}; the live version keeps serving. "
        f"To serve it, promote it (CLI: indb promote {name} {version}), or refit with "
        "promote=True (CLI: --promote)"
    )


def signature_changes(name: str, live: FitResult, result: FitResult, dialect: Dialect) -> list[str]:
    """A note when the scoring inputs (the macro's arguments, the columns the view reads)
    of a version made live differ from the live version's."""
    old, new = W.model_inputs(live, dialect), W.model_inputs(result, dialect)
    if old == new:
        return []
    return [
        f"model {name!r}: the scoring inputs change from ({', '.join(old)}) to "
        f"({', '.join(new)}): SQL that calls the scoring macro with the old arguments, or "
        "reads the view's old input columns, must change with it"
    ]
