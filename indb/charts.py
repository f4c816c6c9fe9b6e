"""Charts of a model report, drawn with matplotlib and returned as inline SVG text.

matplotlib is a well-kept plotting library with a vector (SVG) output that needs nothing
at view time: no script, no font file and no image is fetched by the page that holds it.
Figures are built as :class:`matplotlib.figure.Figure` objects on the Agg canvas, never
through ``pyplot``: no GUI backend is ever chosen and no global plotting state changes in
the caller's process. Text is drawn as paths (``svg.fonttype = "path"``), so a chart looks
the same on every machine; each SVG carries its title for screen readers, and the report
puts the numbers beside it in a table.

Every chart is readable without colour: the series differ by marker and line style as
well, and the colours differ in lightness. Each function takes plain numbers (no result
objects), so the layout module decides what is drawn.
"""

from __future__ import annotations

import hashlib
import io
import math
import re
from collections.abc import Sequence
from html import escape
from typing import Any

import numpy as np

#: chart width in inches (at 96 px an inch, 729 px: narrower than the report's column)
WIDTH = 7.6
#: the report's own palette (dark teal, burnt orange, plum, and a pale blue-grey for bars);
#: the three line colours differ in lightness too
INK = "#1f2a30"
FITTED = "#0d5c63"
ACTUAL = "#b4531f"
REFERENCE = "#6a3d7c"
BARS = "#c5d3d8"
BAR_EDGE = "#7d959c"
GUIDE = "#6f6f6f"
#: most levels a level chart shows (the table behind it lists all)
MAX_CHART_LEVELS = 40

_STYLE = {
    "svg.fonttype": "path",
    "svg.hashsalt": "indb-report",
    "font.family": "DejaVu Sans",
    "font.size": 9.0,
    "axes.titlesize": 10.0,
    "axes.labelsize": 9.0,
    "axes.edgecolor": "#9aa5ab",
    "axes.labelcolor": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#e3e8ea",
    "grid.linewidth": 0.7,
    "xtick.color": INK,
    "ytick.color": INK,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "figure.dpi": 96.0,
}


# -- public charts ---------------------------------------------------------------------------


#: how each phase of the iteration log is drawn: marker, line style, colour, legend label
PHASES = {
    "fit": ("o", "-", FITTED, "fit scans"),
    "theta": ("^", "-.", REFERENCE, "theta scans"),
    "sample": ("s", ":", GUIDE, "sample-start scans"),
    "null": ("D", "--", ACTUAL, "null-model scans"),
    # scans that fit several models at once report the largest change among them
    "drop_one": ("X", ":", INK, "drop-one scans (largest change of the reduced models)"),
    "cv": ("P", ":", REFERENCE, "cross-validation scans (largest change of the folds)"),
}
#: the phases whose deviance is the model's on all rows (drawn in the upper panel)
FULL_MODEL = ("fit", "theta")


def iteration_chart(
    deviance: Sequence[float],
    change: Sequence[float],
    halvings: Sequence[int],
    phases: Sequence[str],
) -> str:
    """Above: the deviance of the model's scans on all rows (a step-halving marked); below:
    the relative change in deviance of every scan, phase by phase, on a log scale. Scans of
    other phases (a sample start, the intercept-only model) have deviances of another
    model or of fewer rows, so they are not drawn on the model's deviance axis."""
    fig, (top, bottom) = _figure(4.4, rows=2, ratios=(3, 2), sharex=True)
    scan = np.arange(1, len(deviance) + 1)
    dev = np.asarray(deviance, dtype=float)
    rel = np.asarray(change, dtype=float)
    phase = np.asarray(list(phases), dtype=object)
    known = [p for p in dict.fromkeys(phases)]
    for name in known:
        marker, line, colour, label = PHASES.get(name, ("x", "-", INK, f"{name} scans"))
        at = phase == name
        if name in FULL_MODEL:
            top.plot(scan[at], dev[at], marker=marker, linestyle=line, color=colour, label=label)
        ok = at & np.isfinite(rel) & (rel > 0)
        if ok.any():
            bottom.plot(
                scan[ok],
                rel[ok],
                marker=marker,
                markersize=6 if name not in FULL_MODEL else 4,
                linestyle=line,
                color=colour,
                label=label,
            )
    halved = (np.asarray(halvings) > 0) & np.isin(phase, FULL_MODEL)
    if halved.any():
        top.plot(
            scan[halved],
            dev[halved],
            linestyle="none",
            marker="v",
            markersize=9,
            color=ACTUAL,
            label="step halved",
        )
    top.set_ylabel("deviance")
    top.legend(loc="upper right")
    if bottom.lines:
        bottom.set_yscale("log")
        # where it covers the fewest points (a batch scan's point sits at the right end)
        bottom.legend(loc="best")
    bottom.set_ylabel("relative change\n(log scale)")
    bottom.set_xlabel("scan of the data (number)")
    bottom.xaxis.get_major_locator().set_params(integer=True)
    return _svg(fig, "Deviance and its relative change, scan by scan")


def level_chart(
    labels: Sequence[str],
    value: Sequence[float],
    lower: Sequence[float],
    upper: Sequence[float],
    reference: Sequence[bool],
    counts: Sequence[float],
    *,
    value_label: str,
    count_label: str,
    guide: float,
    title: str,
) -> str:
    """One point per level with its interval, the reference level as an open diamond on
    the guide line, and a bar per level beneath (rows or exposure)."""
    fig, (top, bottom) = _figure(4.4, rows=2, ratios=(3, 1.3), sharex=True)
    x = np.arange(len(labels))
    v, lo, hi = (np.asarray(a, dtype=float) for a in (value, lower, upper))
    ref = np.asarray(reference, dtype=bool)
    top.axhline(guide, color=GUIDE, linestyle=":", linewidth=1.0)
    est = ~ref & np.isfinite(v)
    if est.any() and not np.isfinite(lo[est]).any():
        # a penalised fit has no intervals: points alone, and a legend that promises none
        top.plot(x[est], v[est], linestyle="none", marker="o", color=FITTED, label="estimate")
    elif est.any():
        err = np.vstack([v[est] - lo[est], hi[est] - v[est]])
        err = np.where(np.isfinite(err), err, 0.0)
        top.errorbar(
            x[est],
            v[est],
            yerr=err,
            linestyle="none",
            marker="o",
            color=FITTED,
            ecolor=FITTED,
            elinewidth=1.2,
            capsize=3,
            label="estimate and interval",
        )
    if ref.any():
        top.plot(
            x[ref],
            v[ref],
            linestyle="none",
            marker="D",
            markersize=7,
            color=REFERENCE,
            markerfacecolor="white",
            markeredgewidth=1.5,
            label="reference level",
        )
    top.set_ylabel(value_label)
    top.legend(loc="best")
    _bars(bottom, x, counts, count_label)
    _level_ticks(bottom, labels)
    return _svg(fig, title)


def curve_chart(
    x: Sequence[float],
    value: Sequence[float],
    lower: Sequence[float],
    upper: Sequence[float],
    *,
    x_label: str,
    value_label: str,
    guide: float,
    x_ref: float,
    title: str,
    knots: Sequence[float] = (),
    bars: tuple[Sequence[float], Sequence[float], Sequence[float]] | None = None,
    bar_label: str = "",
) -> str:
    """A numeric term's effect as a solid curve with a shaded band between dashed edges,
    the reference point as an open diamond, knots as ticks; with ``bars`` (low and high
    edges, heights) a bar per band beneath."""
    rows = 2 if bars is not None else 1
    fig, axes = _figure(
        4.2 if bars is not None else 3.2,
        rows=rows,
        ratios=(3, 1.3) if bars is not None else None,
        sharex=True,
    )
    top = axes[0] if bars is not None else axes
    xs, v, lo, hi = (np.asarray(a, dtype=float) for a in (x, value, lower, upper))
    top.axhline(guide, color=GUIDE, linestyle=":", linewidth=1.0)
    if np.isfinite(lo).any():
        top.fill_between(
            xs, lo, hi, color=FITTED, alpha=0.15, linewidth=0, label="pointwise interval"
        )
        top.plot(xs, lo, color=FITTED, linestyle="--", linewidth=0.8)
        top.plot(xs, hi, color=FITTED, linestyle="--", linewidth=0.8)
    top.plot(xs, v, color=FITTED, linewidth=2.0, label="estimate")
    top.plot(
        [x_ref],
        [guide],
        linestyle="none",
        marker="D",
        markersize=7,
        color=REFERENCE,
        markerfacecolor="white",
        markeredgewidth=1.5,
        label="reference point",
    )
    for k in knots:
        top.axvline(k, color=GUIDE, linestyle=(0, (1, 3)), linewidth=0.8)
    if knots:
        top.plot([], [], color=GUIDE, linestyle=(0, (1, 3)), label="knot")
    top.set_ylabel(value_label)
    top.legend(loc="best")
    if bars is not None:
        low, high, heights = (np.asarray(a, dtype=float) for a in bars)
        bottom = axes[1]
        # one bar of the same width per band, at the band's middle: bands of equal exposure
        # have unequal widths (a band of one value has none), and a bar's area would
        # suggest a density the figure is not
        mid = (low + high) / 2.0
        gaps = np.diff(np.sort(mid))
        width = 0.7 * float(gaps[gaps > 0].min()) if (gaps > 0).any() else 1.0
        bottom.bar(mid, heights, width=width, color=BARS, edgecolor=BAR_EDGE, linewidth=0.6)
        bottom.set_ylabel(bar_label)
        bottom.set_xlabel(x_label)
        bottom.grid(axis="x", visible=False)
    else:
        top.set_xlabel(x_label)
    return _svg(fig, title)


def points_chart(
    labels: Sequence[str],
    value: Sequence[float],
    lower: Sequence[float],
    upper: Sequence[float],
    *,
    value_label: str,
    guide: float,
    title: str,
) -> str:
    """One point with its interval per coefficient (a horizontal layout: long names)."""
    n = len(labels)
    fig, ax = _figure(min(1.2 + 0.32 * n, 9.0))
    y = np.arange(n)[::-1]
    v, lo, hi = (np.asarray(a, dtype=float) for a in (value, lower, upper))
    ax.axvline(guide, color=GUIDE, linestyle=":", linewidth=1.0)
    ok = np.isfinite(v)
    err = np.vstack([v[ok] - lo[ok], hi[ok] - v[ok]])
    err = np.where(np.isfinite(err), err, 0.0)
    ax.errorbar(v[ok], y[ok], xerr=err, linestyle="none", marker="o", color=FITTED, capsize=3)
    ax.set_yticks(y, [_short(s, 40) for s in labels])
    ax.set_xlabel(value_label)
    ax.grid(axis="y", visible=False)
    return _svg(fig, title)


def lift_chart(
    actual_rate: Sequence[float], expected_rate: Sequence[float], *, rate_label: str, title: str
) -> str:
    """Actual (squares, dashed) and expected (circles, solid) rate per band of equal
    exposure along the score."""
    fig, ax = _figure(3.4)
    band = np.arange(1, len(actual_rate) + 1)
    ax.plot(band, expected_rate, marker="o", color=FITTED, linewidth=1.6, label="expected")
    _actual_line(ax, band, actual_rate)
    ax.set_xlabel("band of equal exposure, lowest score first (number)")
    ax.set_ylabel(rate_label)
    ax.xaxis.get_major_locator().set_params(integer=True)
    ax.legend(loc="upper left")
    return _svg(fig, title)


def double_lift_chart(
    actual_rate: Sequence[float],
    expected_rate: Sequence[float],
    against_rate: Sequence[float],
    *,
    names: tuple[str, str],
    rate_label: str,
    title: str,
) -> str:
    """The double lift: per band of equal exposure along the ratio of the second model's
    score to the first's, the actual rate (squares, dashed) and each model's expected
    (circles, solid; triangles, dash-dot)."""
    fig, ax = _figure(3.6)
    band = np.arange(1, len(actual_rate) + 1)
    ax.plot(band, expected_rate, marker="o", color=FITTED, linewidth=1.6, label=names[0])
    ax.plot(
        band,
        against_rate,
        marker="^",
        color=REFERENCE,
        linestyle="-.",
        linewidth=1.5,
        label=names[1],
    )
    _actual_line(ax, band, actual_rate)
    ax.set_xlabel(f"band of equal exposure along {names[1]} / {names[0]}, lowest first (number)")
    ax.set_ylabel(rate_label)
    ax.xaxis.get_major_locator().set_params(integer=True)
    # above the axes: the lines of a double lift run from corner to corner
    ax.legend(loc="lower center", bbox_to_anchor=(0.5, 1.0), ncol=3)
    return _svg(fig, title)


#: line styles and markers cycled over a path's coefficients (told apart without colour)
_PATH_STYLES = ("-", "--", "-.", ":")
_PATH_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "*")


def path_chart(
    log_lambda: Sequence[float],
    estimates: Sequence[Sequence[float]],
    labels: Sequence[str],
    *,
    chosen: float | None,
    title: str,
) -> str:
    """A lambda path: each coefficient's estimate against log lambda (one line each, its
    style and marker cycled), the guide at 0 and the reported lambda as a vertical line."""
    fig, ax = _figure(4.2)
    x = np.asarray(log_lambda, dtype=float)
    ax.axhline(0.0, color=GUIDE, linestyle=":", linewidth=1.0)
    colours = (FITTED, ACTUAL, REFERENCE, INK, BAR_EDGE)
    for i, (label, ys) in enumerate(zip(labels, estimates, strict=True)):
        ax.plot(
            x,
            np.asarray(ys, dtype=float),
            linestyle=_PATH_STYLES[i % len(_PATH_STYLES)],
            marker=_PATH_MARKERS[i % len(_PATH_MARKERS)],
            markersize=3.5,
            linewidth=1.2,
            color=colours[i % len(colours)],
            label=_short(label, 28),
        )
    if chosen is not None and math.isfinite(chosen):
        ax.axvline(chosen, color=GUIDE, linestyle="--", linewidth=1.0)
    ax.set_xlabel("log lambda (natural log of the penalty strength)")
    ax.set_ylabel("coefficient (link units)")
    if labels:
        ax.legend(loc="center left", bbox_to_anchor=(1.0, 0.5), fontsize=7.5)
    return _svg(fig, title)


def cv_chart(
    log_lambda: Sequence[float],
    mean: Sequence[float],
    se: Sequence[float],
    *,
    chosen: float | None,
    best: float | None,
    title: str,
) -> str:
    """k-fold cross-validation of a lambda path: the mean out-of-fold deviance per unit
    weight against log lambda, one standard error either side as bars; the chosen lambda as
    a dashed vertical line and, where the rule chose another, the least mean as a dotted
    one."""
    fig, ax = _figure(4.2)
    x, y = np.asarray(log_lambda, dtype=float), np.asarray(mean, dtype=float)
    ax.errorbar(
        x,
        y,
        yerr=np.asarray(se, dtype=float),
        color=FITTED,
        marker="o",
        markersize=4,
        linewidth=1.2,
        capsize=3,
        label="mean over the folds, +/- 1 standard error",
    )
    if chosen is not None and math.isfinite(chosen):
        ax.axvline(chosen, color=GUIDE, linestyle="--", linewidth=1.0, label="chosen lambda")
    if best is not None and math.isfinite(best) and best != chosen:
        ax.axvline(best, color=ACTUAL, linestyle=":", linewidth=1.2, label="least mean")
    ax.set_xlabel("log lambda (natural log of the penalty strength)")
    ax.set_ylabel("out-of-fold deviance\n(per unit of weight)")
    ax.legend(loc="best", fontsize=8)
    return _svg(fig, title)


def lorenz_chart(
    exposure_share: Sequence[float], actual_share: Sequence[float], *, title: str, label: str
) -> str:
    """The ordered Lorenz curve through the band ends (solid, circles) under the line of
    equality (dotted)."""
    fig, ax = _figure(4.6)
    ax.plot(
        [0, 100],
        [0, 100],
        color=GUIDE,
        linestyle=":",
        linewidth=1.2,
        label="no ordering (equality)",
    )
    xs = 100.0 * np.asarray(exposure_share, dtype=float)
    ys = 100.0 * np.asarray(actual_share, dtype=float)
    ax.plot(xs, ys, marker="o", markersize=4, color=FITTED, linewidth=1.8, label=label)
    ax.fill_between(xs, ys, xs, color=FITTED, alpha=0.08, linewidth=0)
    ax.set_xlim(0, 100)
    ax.set_ylim(0, 100)
    ax.set_aspect("equal")
    ax.set_xlabel("share of exposure, lowest score first (%)")
    ax.set_ylabel("share of actual (%)")
    ax.legend(loc="upper left")
    return _svg(fig, title)


def calibration_chart(predicted: Sequence[float], observed: Sequence[float], *, title: str) -> str:
    """Observed rate against mean predicted probability per band, beside the diagonal."""
    fig, ax = _figure(4.6)
    p, o = np.asarray(predicted, dtype=float), np.asarray(observed, dtype=float)
    top = float(np.nanmax(np.concatenate([p, o, [0.0]]))) if len(p) else 1.0
    top = min(1.0, top * 1.08) if top > 0 else 1.0
    ax.plot(
        [0, top], [0, top], color=GUIDE, linestyle=":", linewidth=1.2, label="perfect calibration"
    )
    ax.plot(
        p,
        o,
        marker="s",
        color=ACTUAL,
        linestyle="--",
        markerfacecolor="white",
        markeredgewidth=1.4,
        label="observed rate per band",
    )
    ax.set_xlim(0, top)
    ax.set_ylim(0, top)
    ax.set_aspect("equal")
    ax.set_xlabel("mean predicted probability (proportion)")
    ax.set_ylabel("observed rate (proportion)")
    ax.legend(loc="upper left")
    return _svg(fig, title)


def ratio_chart(
    labels: Sequence[str],
    ratio: Sequence[float],
    exposure: Sequence[float],
    *,
    title: str,
    exposure_label: str,
) -> str:
    """Actual over expected per level (circles) about the guide at 1, exposure beneath."""
    fig, (top, bottom) = _figure(4.2, rows=2, ratios=(3, 1.3), sharex=True)
    x = np.arange(len(labels))
    r = np.asarray(ratio, dtype=float)
    top.axhline(1.0, color=GUIDE, linestyle=":", linewidth=1.0)
    # one series, named by its axis: no legend to cover a point
    top.plot(x, r, marker="o", color=ACTUAL, linestyle="none")
    top.set_ylabel("actual / expected (ratio)")
    _bars(bottom, x, exposure, exposure_label)
    _level_ticks(bottom, labels)
    return _svg(fig, title)


def pick_levels(
    counts: Sequence[float],
    keep: Sequence[bool],
    limit: int = MAX_CHART_LEVELS,
) -> np.ndarray:
    """Positions (in their order) of at most ``limit`` levels for a chart: those marked
    ``keep`` (the reference), then those with the most rows."""
    n = len(counts)
    if n <= limit:
        return np.arange(n)
    c = np.nan_to_num(np.asarray(counts, dtype=float), nan=-1.0)
    order = sorted(range(n), key=lambda i: (not keep[i], -c[i], i))
    return np.array(sorted(order[:limit]))


# -- shared pieces ---------------------------------------------------------------------------


def _figure(
    height: float, *, rows: int = 1, ratios: Sequence[float] | None = None, sharex: bool = False
) -> tuple[Any, Any]:
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    with matplotlib.rc_context(_STYLE):
        fig = Figure(figsize=(WIDTH, height), layout="constrained")
        FigureCanvasAgg(fig)
        kw = {"height_ratios": list(ratios)} if ratios else {}
        axes = fig.subplots(rows, 1, sharex=sharex, gridspec_kw=kw)
    return fig, axes


def _actual_line(ax: Any, x: np.ndarray, rate: Sequence[float]) -> None:
    """The actual rate of a lift chart: open squares on a dashed line."""
    ax.plot(
        x,
        rate,
        marker="s",
        color=ACTUAL,
        linestyle="--",
        linewidth=1.4,
        markerfacecolor="white",
        markeredgewidth=1.4,
        label="actual",
    )


def _bars(ax: Any, x: np.ndarray, heights: Sequence[float], label: str) -> None:
    h = np.nan_to_num(np.asarray(heights, dtype=float), nan=0.0)
    ax.bar(x, h, width=0.6, color=BARS, edgecolor=BAR_EDGE, linewidth=0.6)
    ax.set_ylabel(label)
    ax.grid(axis="x", visible=False)


def _level_ticks(ax: Any, labels: Sequence[str]) -> None:
    shown = [_short(str(s), 18) for s in labels]
    crowded = len(shown) > 8 or max((len(s) for s in shown), default=0) > 9
    ax.set_xticks(
        np.arange(len(shown)),
        shown,
        rotation=45 if crowded else 0,
        ha="right" if crowded else "center",
    )


def _short(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[: limit - 1] + "\u2026"


_COMMENT = re.compile(r"<!--.*?-->\n?", re.S)
_ID = re.compile(r'\bid="([^"]+)"')
_SVG_SIZE = re.compile(r'<svg([^>]*?)\swidth="([\d.]+)pt"\s+height="([\d.]+)pt"')


def _svg(fig: Any, title: str) -> str:
    """The figure as an ``<svg>`` element for inlining: no XML prolog, ids made unique in
    the page (several charts share one document), sizes in px, a title for screen
    readers."""
    import matplotlib

    buf = io.StringIO()
    with matplotlib.rc_context(_STYLE):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    text = buf.getvalue()
    text = text[text.index("<svg") :]
    # matplotlib notes each text as an (escaped) XML comment beside its glyph paths: the
    # page carries the text in its tables, so the comments only add weight
    text = _COMMENT.sub("", text)
    # a prefix from the content: the same chart gets the same ids on every run, and two
    # charts share ids only where they are the same drawing
    prefix = "c" + hashlib.sha1(text.encode()).hexdigest()[:8] + "-"
    ids = set(_ID.findall(text))
    if ids:
        names = "|".join(re.escape(i) for i in sorted(ids, key=len, reverse=True))
        refs = re.compile(rf'(id="|#)({names})(?=["\)])')
        text = refs.sub(lambda m: m.group(1) + prefix + m.group(2), text)
    text = _SVG_SIZE.sub(_px_size, text, count=1)
    head_end = text.index(">") + 1
    label = escape(title, quote=True)
    text = (
        text[: head_end - 1]
        + f' role="img" aria-label="{label}" class="chart">'
        + f"<title>{escape(title)}</title>"
        + text[head_end:]
    )
    return text


def _px_size(m: re.Match) -> str:
    # points to CSS px (96 / 72); the page's CSS lets a chart shrink with its column
    w, h = float(m.group(2)) * 4 / 3, float(m.group(3)) * 4 / 3
    return f'<svg{m.group(1)} width="{math.floor(w)}" height="{math.floor(h)}"'
