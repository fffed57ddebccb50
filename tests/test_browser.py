"""The explorer in a real browser: the served app (``qcexplore app``, Voila) and JupyterLab.

Chromium (Debian's, /usr/bin/chromium) is driven by playwright. Nothing is skipped: a
missing browser or package fails with a message that says what to install. One app
server is shared by the Voila steps, one JupyterLab by its check; both are stopped by
process group in the fixture teardown. Each step leaves a screenshot in a temporary
folder whose path is printed.

What is checked, through the page's BokehJS models (``Bokeh.documents``):
- the chart is drawn (a canvas) and its points source ``chart_points`` is in the page,
  within 30 s of opening the page; the time from starting the server is printed;
- a split-by change re-colours the points: one colour per stratum level;
- excluding a point from the limits (selected on the chart, as a tap would) moves the
  limits drawn from ``chart_limits``;
- the findings panel lists the demo's injected effects (crew B's measurement offset, the
  nozzle 4 drift, the autocorrelation), as named by the ground truth of
  ``qcexplore.demo.filling_line``;
- in JupyterLab, ``s.explore()`` run from the page draws the chart and re-colours on a
  split-by change.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import harness
import pytest

from qcexplore.app import serve
from qcexplore.demo import filling_line

pytestmark = pytest.mark.browser

REPO = Path(__file__).resolve().parents[1]


def environment(home: Path) -> dict[str, str]:
    """Jupyter writes only under ``home``; kernels import this checkout."""
    return harness.private_environment(home, python_path=[REPO])


CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
CHART_WAIT_MS = 30_000
UPDATE_WAIT_MS = 30_000
#: The newest BokehJS model of a name (a rebuilt figure lands in a newer document).
FIND = (
    "name => { const found = (window.Bokeh ? Bokeh.documents : [])"
    ".map(d => d.get_model_by_name(name)).filter(m => m);"
    " return found.length ? found[found.length - 1] : null; }"
)


def js(body: str) -> str:
    """A page function with ``find(name)`` in scope."""
    return f"(arg) => {{ const find = {FIND}; {body} }}"


# ---- browser and screenshots ------------------------------------------------------------
@pytest.fixture(scope="module")
def shots() -> Path:
    folder = Path(tempfile.mkdtemp(prefix="qcexplore-browser-shots-"))
    print(f"\nscreenshots: {folder}")
    return folder


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        pytest.fail("the browser tests need playwright: pip install playwright")
    if not CHROMIUM.exists():
        pytest.fail(f"the browser tests need Debian's chromium at {CHROMIUM}: "
                    "apt-get update && apt-get install -y chromium")  # fmt: skip
    with sync_playwright() as driver:
        chromium = driver.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        try:
            yield chromium
        finally:
            chromium.close()


@dataclass
class Tab:
    """A browser page and the script errors it raised."""

    page: Any
    errors: list[str] = field(default_factory=list)
    timing: dict[str, float] = field(default_factory=dict)


def new_tab(browser: Any) -> Tab:
    tab = Tab(browser.new_page(viewport={"width": 1400, "height": 1000}))
    tab.page.on("pageerror", lambda error: tab.errors.append(str(error)))
    return tab


def snap(page: Any, shots: Path, name: str) -> None:
    page.screenshot(path=str(shots / f"{name}.png"), full_page=True)


#: How many BokehJS documents hold a model named ``arg``.
COUNT = (
    "(name) => (window.Bokeh ? Bokeh.documents : []).filter(d => d.get_model_by_name(name)).length"
)


def open_chart_tab(page: Any) -> None:
    """Bring the Chart view to the front and wait until its figure is in the page (the
    findings board holds a chart of its own in a card: the view's is the second, and the
    newest)."""
    page.get_by_role("tab", name="Chart", exact=True).click()
    page.locator(".qcx-split-by select").wait_for(state="visible", timeout=CHART_WAIT_MS)
    page.wait_for_function(f"() => ({COUNT})('chart_points') >= 2", timeout=CHART_WAIT_MS)
    wait_for_chart(page)


def wait_for_board(page: Any) -> None:
    """The findings board is on screen with its first card."""
    page.locator(".qcx-card").first.wait_for(state="visible", timeout=CHART_WAIT_MS)


def wait_for_chart(page: Any) -> None:
    """The Chart view's canvas is on screen and the points source is in BokehJS."""
    page.locator(".qcx-panel-chart canvas").first.wait_for(state="visible", timeout=CHART_WAIT_MS)
    page.wait_for_function(js("const m = find('chart_points'); return m && m.get_length() > 0;"),
                           timeout=CHART_WAIT_MS)  # fmt: skip


#: Stratum label to the distinct colours of its points ("" when there are no strata), read
#: from what BokehJS draws: the fill colour of the glyph that shows ``chart_points``, a
#: colour column or a colour-mapped code column (mapped as BokehJS maps it), or one value.
POINT_COLOURS = """
const src = find('chart_points');
const n = src.get_length();
const renderer = [...src.document.all_models].find(m => m.data_source === src && m.glyph);
const spec = renderer.glyph.properties.fill_color.get_value();
const hex = c => typeof c === 'number'
  ? '#' + ((c >>> 8) & 0xffffff).toString(16).padStart(6, '0').toUpperCase()
  : String(c).toUpperCase();
let colours;
if (spec.field === undefined) {
  colours = Array(n).fill(hex(spec.value));
} else {
  const column = Array.from(src.data[spec.field]);
  colours = (spec.transform ? Array.from(spec.transform.v_compute(column)) : column).map(hex);
}
const strata = src.document.get_model_by_name('chart_strata');
const labels = src.data.stratum !== undefined ? Array.from(src.data.stratum, String)
  : src.data.stratum_code !== undefined
    ? Array.from(src.data.stratum_code, c => strata ? String(strata.data.stratum[c]) : String(c))
    : Array(n).fill('');
const out = {};
labels.forEach((label, i) => {
  out[label] = out[label] || [];
  if (!out[label].includes(colours[i])) out[label].push(colours[i]);
});
return out;
"""


def point_colours(page: Any) -> dict[str, list[str]]:
    """Stratum label to the distinct colours of its points, as drawn in the page."""
    return page.evaluate(js(POINT_COLOURS))


def split_by(page: Any, label: str, levels: int) -> dict[str, list[str]]:
    """Choose a split in the explorer and wait until the points take ``levels`` colours."""
    page.select_option(".qcx-split-by select", label=label)
    page.wait_for_function(
        js(
            "if (!find('chart_points')) return false;"
            f"const colours = (() => {{ {POINT_COLOURS} }})();"
            "const labels = Object.keys(colours);"
            "return new Set(Object.values(colours).flat()).size === arg"
            " && labels.length === arg && !labels.includes('undefined')"
            " || arg === 1 && labels.length === 1 && labels[0] === '';"
        ),
        arg=levels,
        timeout=UPDATE_WAIT_MS,
    )
    return point_colours(page)


# ---- the served app (Voila) ------------------------------------------------------------------
@pytest.fixture(scope="module")
def app(browser: Any, shots: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Tab]:
    """``qcexplore app`` (the demo) on loopback and one page on it, chart drawn."""
    home = tmp_path_factory.mktemp("app-home")
    started = time.perf_counter()
    process, address = harness.launch(["--idle-timeout", "120"], env=environment(home))
    try:
        listening = time.perf_counter() - started
        tab = new_tab(browser)
        tab.page.goto(address, timeout=CHART_WAIT_MS)
        opened = time.perf_counter()
        wait_for_board(tab.page)
        board = time.perf_counter()
        tab.timing = {
            "server start to address": listening,
            "server start to findings board on screen": board - started,
            "page open to findings board on screen": board - opened,
        }
        snap(tab.page, shots, "1-findings-board")
        yield tab
    finally:
        harness.stop(process)


def test_the_findings_board_is_the_first_view(app: Tab, capsys: pytest.CaptureFixture) -> None:
    page = app.page
    with capsys.disabled():
        for what, seconds in app.timing.items():
            print(f"\n{what}: {seconds:.1f} s (target: under 15 s)", end="")
        print()
    selected = page.locator(".qcx-panels .lm-TabBar-tab.lm-mod-current").inner_text()
    assert selected.strip() == "What the data say"
    found = serve.demo_study().findings()
    cards = page.locator(".qcx-card")
    assert cards.count() == len(found)
    for i, finding in enumerate(found):
        assert finding.title in cards.nth(i).locator(".qcx-card-headline").inner_text()
    # Every card's figure holds data: one drawn canvas per card, and each card's document has
    # a data source with rows.
    for i in range(cards.count()):
        cards.nth(i).locator("canvas").first.wait_for(state="visible", timeout=CHART_WAIT_MS)
    filled = page.evaluate(
        "() => Bokeh.documents.filter(d => [...d.all_models].some("
        "m => m.get_length && m.get_length() > 0)).length"
    )
    assert filled >= cards.count()
    assert app.errors == []


def test_show_this_sets_the_explorer_to_the_evidence(app: Tab, shots: Path) -> None:
    page = app.page
    found = serve.demo_study().findings()
    index = next(i for i, f in enumerate(found) if f.kind == "measurement_offset")
    before = page.evaluate(COUNT, "chart_points")
    page.locator(".qcx-card").nth(index).locator("button.qcx-show-this").click()
    page.wait_for_function(f"(n) => ({COUNT})('chart_points') > n", arg=before,
                           timeout=CHART_WAIT_MS)  # fmt: skip
    selected = page.locator(".qcx-panels .lm-TabBar-tab.lm-mod-current").inner_text()
    assert selected.strip() == "Chart"
    page.wait_for_function(
        js(f"const c = (() => {{ {POINT_COLOURS} }})(); return Object.keys(c).length === 3;"),
        timeout=UPDATE_WAIT_MS,
    )
    snap(page, shots, "2-show-this-crew")
    assert sorted(point_colours(page)) == ["A", "B", "C"]  # split by crew, as the card said
    assert page.locator(".qcx-split-by select").input_value() == "crew"
    assert app.errors == []


def test_nothing_overflows_at_projector_sizes(app: Tab, shots: Path) -> None:
    page = app.page
    for width, height in ((1024, 768), (1920, 1080)):
        page.set_viewport_size({"width": width, "height": height})
        page.get_by_role("tab", name="What the data say").click()
        wait_for_board(page)
        page.wait_for_timeout(500)
        snap(page, shots, f"3-board-{width}x{height}")
        wide = page.evaluate(
            "() => [...document.querySelectorAll('.qcx-explorer *')]"
            ".filter(e => e.offsetParent !== null && e.getBoundingClientRect().right"
            " > document.documentElement.clientWidth + 1)"
            ".map(e => e.className || e.tagName).slice(0, 5)"
        )
        assert wide == [], (width, wide)
    page.set_viewport_size({"width": 1400, "height": 1000})


def test_presentation_mode_enlarges_the_text(app: Tab, shots: Path) -> None:
    page = app.page
    page.get_by_role("tab", name="What the data say").click()
    headline = page.locator(".qcx-card-headline").first
    size = float(headline.evaluate("e => parseFloat(getComputedStyle(e).fontSize)"))
    page.locator("button.qcx-presentation").click()
    page.wait_for_function(
        "(s) => parseFloat(getComputedStyle(document.querySelector('.qcx-card-headline'))"
        ".fontSize) > s * 1.3",
        arg=size,
        timeout=UPDATE_WAIT_MS,
    )
    snap(page, shots, "4-presentation-mode")
    assert not page.locator(".qcx-log").is_visible()  # the log is out of the way
    page.locator("button.qcx-presentation").click()
    page.locator(".qcx-log").wait_for(state="visible", timeout=UPDATE_WAIT_MS)


def test_a_specification_typed_in_changes_the_capability_card(app: Tab, shots: Path) -> None:
    page = app.page
    page.get_by_role("tab", name="Against the specification").click()
    field = page.locator(".qcx-lsl input")
    field.wait_for(state="visible", timeout=UPDATE_WAIT_MS)
    field.fill("503")
    field.press("Enter")
    page.get_by_role("tab", name="What the data say").click()
    page.locator(".qcx-card-headline", has_text="LSL 503 g").wait_for(timeout=CHART_WAIT_MS)
    snap(page, shots, "5-spec-typed")
    field = page.locator(".qcx-lsl input")
    page.get_by_role("tab", name="Against the specification").click()
    field.fill("500")  # back to the demo's minimum fill for the tests that follow
    field.press("Enter")
    page.get_by_role("tab", name="What the data say").click()
    page.locator(".qcx-card-headline", has_text="LSL 500 g").wait_for(timeout=CHART_WAIT_MS)
    assert app.errors == []


def test_served_chart_is_on_screen(app: Tab) -> None:
    page = app.page
    open_chart_tab(page)
    page.select_option(".qcx-split-by select", label="no split")
    page.wait_for_function(
        js(f"const c = (() => {{ {POINT_COLOURS} }})(); return Object.keys(c)[0] === '';"),
        timeout=UPDATE_WAIT_MS,
    )
    assert page.locator(".qcx-panel-chart canvas").first.is_visible()
    count = page.evaluate(js("return find('chart_points').get_length();"))
    expected = len(serve.demo_study().subgroups)
    assert count == expected  # one point per hourly round of the demo
    colours = point_colours(page)
    assert list(colours) == [""] and len(colours[""]) == 1  # no split: one colour for all
    assert app.errors == []


def test_split_by_recolours_the_points(app: Tab, shots: Path) -> None:
    page = app.page
    colours = split_by(page, "crew", 3)
    snap(page, shots, "2-split-by-crew")
    assert sorted(colours) == ["A", "B", "C"]
    assert all(len(c) == 1 for c in colours.values())  # one colour per crew
    assert len({c[0] for c in colours.values()}) == 3  # and a different one for each
    split_by(page, "shift", 3)  # three crews, three shifts: wait for the shifts' names
    page.wait_for_function(
        js(f"const c = (() => {{ {POINT_COLOURS} }})(); return 'early' in c;"),
        timeout=UPDATE_WAIT_MS,
    )
    colours = point_colours(page)
    snap(page, shots, "3-split-by-shift")
    assert sorted(colours) == ["early", "late", "night"]
    assert all(len(c) == 1 for c in colours.values())
    assert list(split_by(page, "no split", 1)) == [""]
    assert app.errors == []


def test_excluding_a_point_changes_the_limits(app: Tab, shots: Path) -> None:
    page = app.page
    limits = js("const d = find('chart_limits').data; return Array.from(d.y0).map(Number);")
    before = page.evaluate(limits)
    # The point farthest from the centre line, selected as a tap on it would.
    page.evaluate(
        js(
            "const v = Array.from(find('chart_points').data.value);"
            "const mean = v.reduce((a, b) => a + b, 0) / v.length;"
            "let best = 0; v.forEach((x, i) => { if (Math.abs(x - mean) > Math.abs(v[best] - mean))"
            " best = i; });"
            "find('chart_points').selected.indices = [best];"
        )
    )
    table = page.locator(".qcx-selection-table")
    table.get_by_text("selected subgroup").wait_for(timeout=UPDATE_WAIT_MS)
    reason = "browser test: jar knocked off the scale"
    page.locator(".qcx-exclude-reason input").fill(reason)
    page.locator("button.qcx-exclude").click()
    page.wait_for_function(
        js("const d = find('chart_limits'); return d && JSON.stringify(Array.from(d.data.y0)"
           ".map(Number)) !== JSON.stringify(arg);"),
        arg=before,
        timeout=UPDATE_WAIT_MS,
    )  # fmt: skip
    snap(page, shots, "4-excluded")
    after = page.evaluate(limits)
    assert after != before
    listed = page.locator(".qcx-exclusions tbody tr").all_inner_texts()
    assert len(listed) == 1 and reason in listed[0], listed
    assert app.errors == []


def test_a_factor_inside_subgroups_keeps_the_subgroup_chart(app: Tab, shots: Path) -> None:
    # Nozzles change inside each hourly round: the chart of the rounds stays, and each nozzle
    # appears as its own series below it.
    page = app.page
    page.select_option(".qcx-split-by select", label="nozzle")
    levels = page.locator(".qcx-figure-chart_levels canvas").first
    levels.wait_for(state="visible", timeout=UPDATE_WAIT_MS)
    snap(page, shots, "5-nozzle-as-its-own-series")
    assert page.locator(".qcx-figure-chart canvas").first.is_visible()
    assert "each nozzle" in page.locator(".qcx-status").inner_text()
    page.select_option(".qcx-split-by select", label="no split")
    page.locator(".qcx-status", has_text="X-bar and R), 672 points,").wait_for(
        timeout=UPDATE_WAIT_MS
    )
    assert page.locator(".qcx-figure-chart_levels canvas").count() == 0
    assert app.errors == []


def test_findings_list_the_injected_effects(app: Tab, shots: Path) -> None:
    page = app.page
    _, truth = filling_line()
    found = serve.demo_study().findings()

    def title(kinds: set[str], factor: str | None = None, level: str | None = None) -> str:
        matches = [
            f.title for f in found
            if f.kind in kinds and (factor is None or (f.factor, str(f.level)) == (factor, level))
        ]  # fmt: skip
        assert matches, f"no {kinds} finding for {factor} {level} among {found}"
        return matches[0]

    # The injected effects, named by the demo's ground truth.
    expected = [
        title({"measurement_offset"}, "crew", truth["crew_offset"]["crew"]),
        title({"stream_difference", "process_shift"}, "nozzle", truth["nozzle_drift"]["nozzle"]),
        title({"autocorrelation"}),
    ]
    page.get_by_role("tab", name="What the data say").click()
    titles = page.locator(".qcx-card-headline")
    titles.first.wait_for(timeout=60_000)
    snap(page, shots, "5-findings")
    shown = titles.all_inner_texts()
    for wanted in expected:
        assert wanted in shown, (wanted, shown)
    assert app.errors == []


# ---- JupyterLab ----------------------------------------------------------------------------------
NOTEBOOK_CELLS = [
    "from qcexplore.app.serve import demo_study\n\ns = demo_study()  # the demo in its roles",
    "s.explore()",
]


def _write_notebook(path: Path) -> None:
    cells = [
        {"cell_type": "code", "execution_count": None, "id": f"cell{i}", "metadata": {},
         "outputs": [], "source": source}
        for i, source in enumerate(NOTEBOOK_CELLS)
    ]  # fmt: skip
    notebook = {
        "cells": cells,
        "metadata": {"kernelspec": {"name": "python3", "display_name": "Python 3",
                                    "language": "python"}},
        "nbformat": 4,
        "nbformat_minor": 5,
    }  # fmt: skip
    path.write_text(json.dumps(notebook), encoding="utf-8")


@pytest.fixture(scope="module")
def lab(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """JupyterLab on loopback in a temporary folder with the demo notebook; its address."""
    if shutil.which("jupyter") is None:
        pytest.fail("the JupyterLab check needs jupyterlab: pip install jupyterlab")
    root = tmp_path_factory.mktemp("lab")
    home = tmp_path_factory.mktemp("lab-home")
    _write_notebook(root / "explore.ipynb")
    port = serve.free_port()
    log = (home / "lab.log").open("w")
    process = subprocess.Popen(
        [sys.executable, "-m", "jupyter", "lab", "--no-browser", "--allow-root",
         "--ip=127.0.0.1", f"--port={port}", "--IdentityProvider.token=",
         "--LabApp.expose_app_in_browser=True", "--ServerApp.port_retries=0",
         "--LabApp.news_url=", "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate",
         f"--ServerApp.root_dir={root}"],
        cwd=root, env=environment(home), stdout=log, stderr=subprocess.STDOUT,
        start_new_session=True,
    )  # fmt: skip
    address = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 90
        while True:
            try:
                with urllib.request.urlopen(f"{address}/api/status", timeout=5):
                    break
            except OSError:
                if process.poll() is not None or time.monotonic() > deadline:
                    log.flush()
                    tail = (home / "lab.log").read_text()[-1500:]
                    pytest.fail(f"JupyterLab did not start on {address}:\n{tail}")
                time.sleep(0.5)
        yield address
    finally:
        harness.stop(process)
        log.close()


def test_explorer_renders_and_updates_in_jupyterlab(
    lab: str, browser: Any, shots: Path, capsys: pytest.CaptureFixture
) -> None:
    tab = new_tab(browser)
    page = tab.page
    try:
        page.goto(f"{lab}/lab/tree/explore.ipynb", timeout=60_000)
        page.wait_for_function(
            "() => { const w = window.jupyterapp && window.jupyterapp.shell.currentWidget;"
            " return !!(w && w.sessionContext && w.sessionContext.session"
            " && w.sessionContext.session.kernel"
            " && w.sessionContext.session.kernel.status === 'idle'); }",
            timeout=90_000,
        )
        started = time.perf_counter()
        page.evaluate("() => window.jupyterapp.commands.execute('notebook:run-all-cells')")
        wait_for_board(page)
        open_chart_tab(page)
        with capsys.disabled():
            print(f"\nJupyterLab: run all cells to chart on screen: "
                  f"{time.perf_counter() - started:.1f} s")  # fmt: skip
        snap(page, shots, "6-jupyterlab-chart")
        colours = split_by(page, "crew", 3)
        snap(page, shots, "7-jupyterlab-split-by-crew")
        assert sorted(colours) == ["A", "B", "C"]
        assert len({c[0] for c in colours.values()}) == 3
        assert tab.errors == []
    finally:
        page.close()
