"""Tests of the HTML report: sections, escaping, no external resources, failing sections.

The page is parsed with the standard library's html.parser (the reference for what a
browser would see as tags and attributes); the numbers in it come from Study, which
is checked in its own tests.
"""

from __future__ import annotations

import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from qcexplore.caution import GENERAL, NET_CONTENT, caution
from qcexplore.demo import filling_line
from qcexplore.errors import QCDataError
from qcexplore.investigation import Investigation
from qcexplore.report import write_report
from qcexplore.spec import Spec
from qcexplore.study import Study

EVIL_COLUMN = "<script>alert(1)</script>"
EVIL_LEVEL = "<b>A</b>"
#: The story first: the findings board, then the views, the roles and the log.
SECTIONS = ("findings", "chart", "variation", "time", "capability", "roles", "log")


class Page(HTMLParser):
    """Tags, attributes, section ids and visible text of a page."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag: str, attrs: list) -> None:
        self.tags.append((tag, dict(attrs)))
        self._in_script = tag in ("script", "style")

    def handle_endtag(self, tag: str) -> None:
        self._in_script = False

    def handle_data(self, data: str) -> None:
        if not self._in_script:
            self.text.append(data)

    @property
    def sections(self) -> list[str]:
        return [a.get("id") for t, a in self.tags if t == "section"]

    @property
    def visible(self) -> str:
        return " ".join(self.text)


def parse(path: Path) -> Page:
    page = Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


@pytest.fixture(scope="module")
def study() -> Study:
    frame, _ = filling_line(days=14)
    frame = frame.rename(columns={"shift": EVIL_COLUMN})
    frame["crew"] = frame["crew"].map({"A": EVIL_LEVEL, "B": "B & co", "C": "C"})
    return Study(
        frame,
        value="net_g",
        subgroup="round",
        time="taken_at",
        factors=["crew", EVIL_COLUMN, "nozzle"],
        measured_by=["crew"],
        spec=Spec(lsl=500),
        units="g",
    )


@pytest.fixture(scope="module")
def report(study: Study, tmp_path_factory: pytest.TempPathFactory) -> Path:
    state = (
        Investigation(value="net_g", subgroup="round", time="taken_at")
        .exclude([str(study.subgroups["subgroup"].iloc[0])], "jar <dropped> & refilled")
        .note("Crew <b>B</b> reads high")
    )
    out = tmp_path_factory.mktemp("report") / "report.html"
    return study.report(out, log=state, title="Honey <line> 3")


def test_all_sections_and_caution(report: Path) -> None:
    page = parse(report)
    assert page.sections == list(SECTIONS)
    assert caution("g", Spec(lsl=500)) in page.visible.replace("\n", " ")
    assert "Split by nozzle" in page.visible  # the chart view's variants: one per factor
    titles = [a for t, a in page.tags if t == "title"]
    assert titles and "Honey <line> 3" in page.visible


def test_user_strings_are_escaped(report: Path) -> None:
    raw = report.read_text(encoding="utf-8")
    assert EVIL_COLUMN not in raw  # nowhere unescaped, not even in the figure data
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in raw
    assert "&lt;b&gt;A&lt;/b&gt;" in raw
    assert "<b>A</b>" not in raw
    assert "jar &lt;dropped&gt; &amp; refilled" in raw
    assert "Crew &lt;b&gt;B&lt;/b&gt; reads high" in raw
    page = parse(report)
    scripts = [a for t, a in page.tags if t == "script"]
    # BokehJS inline, the figure data, and the embedding script: no script from the data
    assert all(a.get("src") is None for a in scripts)


def test_no_external_resources(report: Path) -> None:
    page = parse(report)
    for tag, attrs in page.tags:
        for key in ("src", "href"):
            value = attrs.get(key) or ""
            assert not re.match(r"\s*(https?:)?//", value), (tag, key, value)
    assert any(t == "script" for t, _ in page.tags)  # BokehJS is in the file itself
    assert report.stat().st_size > 1_000_000  # about 1 MB of BokehJS inline, at least


def test_log_and_roles_in_report(report: Path, study: Study) -> None:
    text = parse(report).visible
    assert "jar <dropped> & refilled" in text  # the parser unescapes: shown as typed
    assert "Crew <b>B</b> reads high" in text
    assert "lsl 500" in text and "net_g" in text


def test_failing_section_shows_its_message(
    study: Study, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def broken(self, *args, **kwargs):
        raise QCDataError("time structure <unavailable> here")

    monkeypatch.setattr(Study, "time_structure", broken)
    out = write_report(study, tmp_path / "r.html")
    page = parse(out)
    assert page.sections == list(SECTIONS)
    assert "time structure <unavailable> here" in page.visible
    assert "time structure &lt;unavailable&gt; here" in out.read_text(encoding="utf-8")


def test_no_spec_and_log_file(tmp_path: Path) -> None:
    frame, _ = filling_line(days=14)
    s = Study(frame, value="net_g", subgroup="round", time="taken_at", factors=["crew", "shift"])
    from qcexplore.app.explorer import Explorer

    explorer = Explorer(s)
    explorer.set(by="crew")
    log = explorer.save(tmp_path / "log.json")
    out = write_report(s, tmp_path / "r.html", log=log)
    assert out == tmp_path / "r.html"
    assert "No specification was given" in parse(out).visible
    other = Study(filling_line(seed=3, days=14)[0], value="net_g", subgroup="round")
    with pytest.raises(QCDataError, match="other data"):
        write_report(other, tmp_path / "r2.html", log=log)


def test_the_net_content_caution_only_for_fill_quantities(tmp_path: Path) -> None:
    frame, _ = filling_line(days=2)
    torque = Study(frame, value="net_g", subgroup="round", units="N m")
    page = parse(write_report(torque, tmp_path / "torque.html")).visible.replace("\n", " ")
    assert GENERAL in page and NET_CONTENT not in page
    minimum_fill = Study(frame, value="net_g", subgroup="round", spec=Spec(lsl=500))
    page = parse(write_report(minimum_fill, tmp_path / "fill.html")).visible.replace("\n", " ")
    assert NET_CONTENT in page


def test_findings_first_as_cards_then_the_contents(report: Path, study: Study) -> None:
    raw = report.read_text(encoding="utf-8")
    page = parse(report)
    assert page.sections[0] == "findings"
    cards = [a for t, a in page.tags if t == "article" and a.get("class") == "qcx-card"]
    assert len(cards) == len(study.findings())
    links = [a.get("href") for t, a in page.tags if t == "a"]
    assert links[: len(SECTIONS)] == [f"#{s}" for s in SECTIONS]
    assert raw.index("qcx-card") < raw.index("qcx-contents") < raw.index("<section id='chart'>")


def test_the_demo_report_stays_small_and_carries_bokehjs_once(tmp_path: Path) -> None:
    frame, _ = filling_line()  # the whole demo: four weeks, 672 rounds
    from qcexplore.demo import ROLES

    out = Study(frame, **ROLES).report(tmp_path / "demo.html")
    raw = out.read_text(encoding="utf-8")
    assert out.stat().st_size < 6_000_000
    # The core bundle sets bokeh.__bokeh__ once; each further copy would set it again.
    assert raw.count("bokeh.__bokeh__ = true") == 1
    assert "bokeh-mathjax" not in raw  # the typesetting bundle (and its CDN loader) left out


def test_the_report_shows_what_the_explorer_showed(tmp_path: Path) -> None:
    """A saved investigation (a window, a typed specification, an exclusion with its reason,
    a split) prints the explorer's Study and chart: one function builds both Studies."""
    from qcexplore.app.explorer import Explorer
    from qcexplore.demo import ROLES
    from qcexplore.views.text import table_html

    study = Study(filling_line(days=5)[0], **ROLES)
    explorer = Explorer(study)
    explorer.set(start="2026-09-08", end="2026-09-09", by="crew", lsl=495.0, units="g")
    first = str(explorer.study_for().levels(study.subgroup_column)[0])
    explorer.exclude([first], "scale dropped")
    log = explorer.save(tmp_path / "log.json")
    shown = explorer.study_for()
    assert len(shown.subgroups) == 48 < len(study.subgroups)  # the window: two days of hours
    assert shown.spec == Spec(lsl=495.0) != study.spec  # typed in the explorer

    page = write_report(study, tmp_path / "r.html", log=log).read_text(encoding="utf-8")
    limits = explorer.chart().limits
    assert explorer.chart().by == "crew" and list(map(str, explorer.chart().excluded)) == [first]
    assert table_html(limits, "Limits") in page
    visible = parse(tmp_path / "r.html").visible
    assert "lsl 495" in visible and "scale dropped" in visible
    assert re.search(r"subgroups\s+48\b", visible)
    assert "lsl 500" not in visible


def test_an_exclusion_needs_its_reason_in_the_explorer() -> None:
    from qcexplore.app.explorer import Explorer
    from qcexplore.demo import ROLES

    explorer = Explorer(Study(filling_line(days=2)[0], **ROLES))
    with pytest.raises(QCDataError, match="reason"):
        explorer.set(exclude=["1"])
    with pytest.raises(QCDataError, match="reason"):
        explorer.state.with_options("chart", explorer.options("chart").replace(exclude=(1,)))
