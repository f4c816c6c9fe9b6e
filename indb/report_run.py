"""Make the HTML report of a registry version (``indb report``).

1. The output path is checked first (a file created and removed in its directory), so a
   report that cannot be written costs no scan.
2. The registry gives the version's result, the model's versions and its events.
3. With a holdout, the version is assessed on it by :func:`indb.assess_run.assess_version`
   (the scans of ``indb assess``), the model's numeric columns among the ``by`` columns so
   that their curves are drawn over the holdout's values with its exposure beneath.
4. :func:`indb.html_report.render_html` lays the page out; it is written to a temporary
   file in the target directory and renamed over the target, so a reader never finds a
   half-written report and a failure leaves nothing behind.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from indb.assess_run import assess_version, chosen_version, load_against
from indb.engines.base_engine import Engine
from indb.errors import RegistryError, SpecError
from indb.html_report import ReportPage, render_html
from indb.registry import Registry
from indb.results import FitResult
from indb.version import __version__


@dataclass(frozen=True)
class ReportFile:
    """A report written: where, of which version, assessed on what, its size and the time
    it took (scans and rendering)."""

    path: str
    model: str
    version: int
    assessed_on: str | None
    #: the second model judged in the same scans (``NAME2:K``), with ``against``
    compared_with: str | None
    bytes: int
    seconds: float
    scans: int


def check_out_path(out: str | os.PathLike[str]) -> Path:
    """The absolute output path, once it is known that a file can be written there."""
    text = os.fspath(out) if out is not None else ""
    if not isinstance(text, str) or not text.strip():
        raise SpecError("out must name the HTML file to write, e.g. out='report.html'")
    path = Path(text).expanduser().absolute()
    if path.is_dir():
        example = str(path / "report.html")
        raise SpecError(f"out {text!r} is a directory; give a file name in it, e.g. {example!r}")
    folder = path.parent
    if not folder.is_dir():
        raise SpecError(f"out {text!r}: the directory {str(folder)!r} does not exist; create it")
    try:
        fd, probe = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    except OSError as err:
        raise SpecError(f"out {text!r}: cannot write in {str(folder)!r} ({err.strerror})") from err
    os.close(fd)
    os.unlink(probe)
    return path


def write_atomically(text: str, path: Path) -> int:
    """Write ``text`` to a temporary file beside ``path`` and rename it over ``path``;
    returns the bytes written. Nothing is left behind when writing fails."""
    data = text.encode("utf-8")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as err:
        raise SpecError(f"out {str(path)!r}: cannot write ({err.strerror})") from err
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except OSError as err:
        _remove(tmp)
        raise SpecError(f"out {str(path)!r}: cannot write ({err.strerror})") from err
    except BaseException:
        _remove(tmp)
        raise
    return len(data)


def _remove(path: str) -> None:
    with contextlib.suppress(OSError):
        os.unlink(path)


def build_page(
    engine: Engine,
    reg: Registry,
    name: str,
    version: int | None = None,
    *,
    on: str | None = None,
    by: Sequence[str] = (),
    bands: int = 10,
    against: str | None = None,
) -> ReportPage:
    """Everything the report of ``name`` (version ``version``, default the live one) shows;
    with ``on``, its assessment on that holdout and, with ``against`` (``NAME2`` or
    ``NAME2:K``), the second model judged in the same scans (:func:`assess_version`)."""
    if against is not None and on is None:
        raise SpecError(f"against={against!r} compares two models on a holdout; give on= too")
    model = reg.model(name)
    version = chosen_version(reg, name, version)
    versions = reg.versions(name)
    row = next((v for v in versions if int(v["version"]) == version), None)
    if row is None:
        known = [int(v["version"]) for v in versions]
        raise RegistryError(f"model {name!r} has no version {version}; versions: {known}")
    result = reg.load(name, version)
    second = load_against(reg, against) if against is not None else None
    assessment = None
    if on is not None:
        columns = [*numeric_columns(result), *(c for c in by if c not in numeric_columns(result))]
        assessment = assess_version(
            engine,
            result,
            model=name,
            version=version,
            on=on,
            by=columns,
            bands=bands,
            against=second,
        )
    return ReportPage(
        name=name,
        version=version,
        result=result,
        version_row=row,
        versions=versions,
        events=reg.events(name),
        recorded=reg.assessments(name, version),
        engine=engine.dialect.name,
        made_at=datetime.now(UTC),
        indb_version=__version__,
        assessment=assessment,
        scoring_view=".".join(p for p in (model.get("view_schema"), model.get("view_name")) if p)
        or None,
    )


def numeric_columns(result: FitResult) -> list[str]:
    """The model's numeric columns that are terms of their own (a line or a spline)."""
    factors = {f["column"] for f in (result.design or {}).get("factors", [])}
    out: list[str] = []
    for c in result.coefficients:
        if len(c.columns) == 1 and c.columns[0] not in factors and c.columns[0] not in out:
            out.append(c.columns[0])
    return out


def make_report(
    engine: Engine,
    reg: Registry,
    name: str,
    out: str | os.PathLike[str],
    *,
    version: int | None = None,
    on: str | None = None,
    by: Sequence[str] = (),
    bands: int = 10,
    against: str | None = None,
) -> ReportFile:
    """Check ``out``, gather the page, render it and write it atomically."""
    t0 = time.perf_counter()
    path = check_out_path(out)
    page = build_page(engine, reg, name, version, on=on, by=by, bands=bands, against=against)
    size = write_atomically(render_html(page), path)
    a = page.assessment
    return ReportFile(
        path=str(path),
        model=name,
        version=page.version,
        assessed_on=a.source if a is not None else None,
        compared_with=(
            f"{a.against.model}:{a.against.version}"
            if a is not None and a.against is not None
            else None
        ),
        bytes=size,
        seconds=time.perf_counter() - t0,
        scans=a.scans if a is not None else 0,
    )
