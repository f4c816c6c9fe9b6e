"""The HTML report in a real browser (issue 17): Chromium from Debian's packages, headless,
with networking disabled.

The test installs nothing: ``.ci/run`` installs Chromium (``bash .ci/services.sh install``);
without it the test is skipped with a message locally and fails under ``CI=true``. For each
report (a Poisson model with a spline and a holdout, alone and against a smaller model; a
binomial model with its calibration; a penalised fit with its lambda path)
Chromium

1. loads the page with its console logged to stderr: no console message at all (the page
   has no script, so any message is an error: a parse error, a blocked load);
2. loads a copy with a probe script appended (the report itself has none), which after the
   load event writes into the page what the layout gave: each chart's SVG size, the page's
   width and scroll width, the resources fetched; ``--dump-dom`` returns it. Every
   expected chart is there, at least 300 x 150 px, inside the page, at a window 720 px wide
   (about an A4 page's text width); the page scrolls no wider than the window; nothing was
   fetched;
3. takes a screenshot that must not be blank (grey-level spread and colours counted with
   Pillow) and prints the page to PDF (several pages); the new charts (the double lift, the
   lambda path) are screenshot on their own too. With ``INDB_SCREENSHOT_DIR`` set, the PNGs
   are kept there for a person to look at.

Networking is off: every host name resolves to nothing (``--host-resolver-rules``) and every
request goes to a proxy on a closed port.
"""

from __future__ import annotations

import html
import json
import os
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from report_cases import SOURCE, build

import indb

BROWSERS = ("chromium", "chromium-browser")
FLAGS = (
    "--headless=new",
    "--no-sandbox",  # CI runs as root, where Chromium's sandbox refuses to start
    "--disable-gpu",
    "--no-first-run",
    "--no-default-browser-check",
    "--disable-extensions",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-default-apps",
    "--hide-scrollbars",
    "--mute-audio",
    # networking off: names resolve to nothing, requests go to a closed port
    "--host-resolver-rules=MAP * ~NOTFOUND",
    "--proxy-server=127.0.0.1:9",
    # the console to stderr: lines with ":CONSOLE"
    "--enable-logging=stderr",
    "--v=0",
)
PROBE = """<script>
window.addEventListener("load", function () {
  var doc = document.documentElement, out = {
    width: doc.clientWidth, scrollWidth: doc.scrollWidth,
    resources: performance.getEntriesByType("resource").length, charts: []};
  document.querySelectorAll("figure[data-chart]").forEach(function (f) {
    var svg = f.querySelector("svg"), r = svg.getBoundingClientRect();
    out.charts.push({key: f.getAttribute("data-chart"), w: r.width, h: r.height,
      left: r.left, right: r.right, table: !!f.querySelector("details table")});
  });
  var pre = document.createElement("pre");
  pre.id = "indb-probe";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>"""
EXPECTED = {
    "children": [
        "iterations",
        "term:rating",
        "term:religious",
        "term:educ",
        "term:religious & educ",
        "term:age",
        "lift",
        "lorenz",
        "ae:rating",
        "ae:religious",
        "ae:educ",
        "ae:age",
    ],
    "had": [
        "iterations",
        "term:rating",
        "term:religious",
        "term:age",
        "lift",
        "lorenz",
        "ae:rating",
        "ae:religious",
        "ae:age",
        "calibration",
    ],
    # the Poisson model against a smaller one (--against): the double lift too
    "children_against": [
        "iterations",
        "term:rating",
        "term:religious",
        "term:educ",
        "term:religious & educ",
        "term:age",
        "double_lift",
        "lift",
        "lorenz",
        "ae:rating",
        "ae:religious",
        "ae:educ",
        "ae:age",
    ],
    # a penalised fit with a lambda path, no holdout
    "children_pen": [
        "iterations",
        "term:rating",
        "term:religious",
        "term:age",
        "term:educ",
        "penalty_path",
    ],
}
#: how each page is made: (model, report_html's options)
PAGES = {
    "children": ("children", {"on": "fair_hold"}),
    "had": ("had", {"on": "fair_hold"}),
    "children_against": ("children", {"on": "fair_hold", "against": "children_small"}),
    "children_pen": ("children_pen", {}),
}
#: the further models (fitted on report_cases' training rows)
MORE = {
    "children_small": {"predictors": ["rating", "religious"]},
    "children_pen": {"predictors": ["rating", "religious", "age", "educ"], "path": 6,
                     "l1_share": 0.5},
}  # fmt: skip
WINDOW = 720  # px: about the text width of an A4 page at 96 px an inch


def _browser() -> str:
    for name in BROWSERS:
        found = shutil.which(name)
        if found:
            return found
    message = (
        "Chromium is not installed; the browser test needs Debian's package "
        "(apt-get install chromium; `bash .ci/services.sh install` installs it)"
    )
    if os.environ.get("CI") == "true":
        pytest.fail(message)
    pytest.skip(message)


@pytest.fixture(scope="module")
def pages(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    browser = _browser()  # skip (or fail under CI) before building anything
    folder = tmp_path_factory.mktemp("browser")
    db = str(build(folder)["db"])
    for name, options in MORE.items():
        indb.fit(SOURCE, db=db, name=name, response="children", family="poisson",
                 offset="ln(years)", **options)  # fmt: skip
    out = {"browser": Path(browser)}
    for key, (name, options) in PAGES.items():
        out[key] = Path(indb.report_html(name, folder / f"{key}.html", db=db, **options).path)
    return out


def _chromium(browser: Path, profile: Path, *args: str) -> subprocess.CompletedProcess:
    done = subprocess.run(
        [str(browser), *FLAGS, f"--user-data-dir={profile}", *args],
        capture_output=True,
        text=True,
        timeout=240,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    return done


def _console(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


@pytest.mark.parametrize("name", list(EXPECTED))
def test_report_loads_cleanly_and_every_chart_is_drawn(
    pages: dict[str, Path], name: str, tmp_path: Path
) -> None:
    browser, page = pages["browser"], pages[name]
    # 1. the page itself: no console message
    plain = _chromium(browser, tmp_path / "p1", "--dump-dom", page.as_uri())
    assert _console(plain.stderr) == []
    assert "indb model report" in plain.stdout
    # 2. a copy with the probe, at a window of about an A4 page's text width
    probe = tmp_path / "probe.html"
    probe.write_text(page.read_text(encoding="utf-8").replace("</body>", PROBE + "</body>"))
    dumped = _chromium(
        browser, tmp_path / "p2", f"--window-size={WINDOW},1200", "--dump-dom", probe.as_uri()
    )
    assert _console(dumped.stderr) == []
    found = re.search(r'<pre id="indb-probe">(.*?)</pre>', dumped.stdout, re.S)
    assert found, dumped.stdout[-2000:]
    seen: dict[str, Any] = json.loads(html.unescape(found.group(1)))
    assert seen["resources"] == 0  # nothing fetched, not even tried
    assert seen["scrollWidth"] <= seen["width"] <= WINDOW  # no sideways scrolling
    assert [c["key"] for c in seen["charts"]] == EXPECTED[name]
    for chart in seen["charts"]:
        assert chart["w"] >= 300 and chart["h"] >= 150, chart  # drawn, at a readable size
        assert chart["left"] >= 0 and chart["right"] <= seen["width"], chart  # inside the page
        assert chart["table"], chart  # its numbers behind it


def test_screenshot_is_not_blank_and_the_page_prints(
    pages: dict[str, Path], tmp_path: Path
) -> None:
    from PIL import Image

    browser, page = pages["browser"], pages["children"]
    shot = tmp_path / "report.png"
    _chromium(browser, tmp_path / "p3", "--window-size=1100,2600", f"--screenshot={shot}",
              page.as_uri())  # fmt: skip
    image = Image.open(shot).convert("RGB")
    assert image.size == (1100, 2600)
    pixels = np.asarray(image)
    _not_blank(pixels, spread=30, colours=200)
    # the masthead band (the report's dark teal) across the top
    top = pixels[10:60, 20:1080].reshape(-1, 3).mean(axis=0)
    assert top[0] < 60 and top[2] < 90
    pdf = tmp_path / "report.pdf"
    _chromium(browser, tmp_path / "p4", "--no-pdf-header-footer", f"--print-to-pdf={pdf}",
              page.as_uri())  # fmt: skip
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF")
    assert len(re.findall(rb"/Type\s*/Page\b", data)) >= 4


def _not_blank(pixels: np.ndarray, *, spread: float, colours: int) -> None:
    """A blank (or all-dark) image has one grey level; a report has text, rules and
    charts: a spread of grey levels, many colours, neither mostly white nor mostly ink."""
    grey = pixels.mean(axis=2)
    assert grey.std() > spread
    assert len(np.unique(pixels.reshape(-1, 3)[::7], axis=0)) > colours
    assert 0.02 < (grey < 200).mean() < 0.6


@pytest.mark.parametrize(("page", "chart"), [("children_against", "double_lift"),
                                             ("children_pen", "penalty_path")])  # fmt: skip
def test_new_charts_screenshot_on_their_own(
    pages: dict[str, Path], page: str, chart: str, tmp_path: Path
) -> None:
    """The chart's box alone (the page's style sheet, its figure): drawn, not blank."""
    from PIL import Image

    text = pages[page].read_text(encoding="utf-8")
    style = re.search(r"<style>.*?</style>", text, re.S)
    box = re.search(rf'<figure class="chart-box" data-chart="{chart}">.*?</figure>', text, re.S)
    assert style and box
    alone = tmp_path / f"{chart}.html"
    alone.write_text(f"<!DOCTYPE html><html><head>{style.group(0)}</head><body><main>"
                     f"{box.group(0)}</main></body></html>", encoding="utf-8")  # fmt: skip
    shot = tmp_path / f"{chart}.png"
    _chromium(pages["browser"], tmp_path / "p5", "--window-size=900,700",
              f"--screenshot={shot}", alone.as_uri())  # fmt: skip
    pixels = np.asarray(Image.open(shot).convert("RGB"))
    _not_blank(pixels, spread=20, colours=60)
    # the series' colours are there: dark teal (the first model / fitted), burnt orange
    # (actual), plum (the second model) in the double lift
    wanted = {"double_lift": ("#0d5c63", "#b4531f", "#6a3d7c"), "penalty_path": ("#0d5c63",)}
    flat = pixels.reshape(-1, 3).astype(int)
    for colour in wanted[chart]:
        rgb = np.array([int(colour[i : i + 2], 16) for i in (1, 3, 5)])
        assert (np.abs(flat - rgb).sum(axis=1) < 40).sum() > 50, colour
    keep = os.environ.get("INDB_SCREENSHOT_DIR")
    if keep:
        shutil.copy(shot, Path(keep) / f"{page}-{chart}.png")
