"""Tests of the explorer widget, without a browser.

Every number the explorer shows comes from ``Study`` (whose statistics are checked
against handbooks and scipy/statsmodels in their own tests), so the reference here
is ``Study.chart`` called directly with the same arguments: the data sources must
hold exactly its points and limits. Controls are set from Python, as a user's
clicks would set them.
"""

from __future__ import annotations

import datetime as dt
import html
import json

import numpy as np
import pandas as pd
import pytest
from bokeh.models import BoxSelectTool, ColumnDataSource
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcexplore import views
from qcexplore.app import resources
from qcexplore.app.explorer import PAGE_ROWS, Explorer
from qcexplore.demo import filling_line
from qcexplore.errors import QCDataError
from qcexplore.investigation import Investigation
from qcexplore.options import ChartOptions
from qcexplore.spec import Spec
from qcexplore.study import Study
from qcexplore.views.text import WORDS

FACTORS = ["crew", "shift", "nozzle"]


def demo_study(seed: int = 0, days: int = 14) -> Study:
    frame, _truth = filling_line(seed=seed, days=days)
    return Study(
        frame,
        value="net_g",
        subgroup="round",
        time="taken_at",
        factors=FACTORS,
        measured_by=["crew"],
        spec=Spec(lsl=500),
        units="g",
    )


@pytest.fixture(scope="module")
def study() -> Study:
    return demo_study()


@pytest.fixture
def ex(study: Study) -> Explorer:
    explorer = Explorer(study)
    explorer.show_view("chart")
    return explorer


def chart_control(ex: Explorer, name: str):
    """The chart view's control of one option (generated from ChartOptions)."""
    return ex.panels["chart"].controls[name]


def source(ex: Explorer, name: str = "chart_points") -> ColumnDataSource:
    return ex.slots["chart"].layout.select_one({"name": name, "type": ColumnDataSource})


def limit_values(ex: Explorer) -> set[float]:
    data = source(ex, "chart_limits").data
    return {round(float(v), 9) for v in np.concatenate([data["y0"], data["y1"]])}


def result_limit_values(result) -> set[float]:
    cols = result.points[["center", "lcl", "ucl"]].to_numpy(dtype=float).ravel()
    return {round(float(v), 9) for v in cols}


def assert_shows(ex: Explorer, result) -> None:
    """The chart sources hold exactly the result's points and limits."""
    points = source(ex).data
    assert len(points["value"]) == len(result.points)
    np.testing.assert_allclose(points["value"], result.points["stat"].to_numpy(dtype=float))
    assert limit_values(ex) == result_limit_values(result)


def test_opens_on_the_findings_board(study: Study) -> None:
    fresh = Explorer(study)
    assert fresh.visible == "findings" and "What the data say:" in fresh.status.value
    assert set(fresh._shown) == {"findings"}  # the other views wait until their tab is shown
    assert fresh.tabs.titles == tuple(v.title for v in views.VIEWS)
    cards = fresh.panels["findings"].cards.children
    found = study.findings()
    assert len(cards) == len(found)
    for card, finding in zip(cards, found, strict=True):
        assert html.escape(finding.title) in card.children[0].value


def test_builds_the_chart_when_its_tab_opens(ex: Explorer, study: Study) -> None:
    assert ex.status.value.count("Chart:") == 1 and "qcx-ok" in ex.status.value
    assert set(ex._shown) == {"findings", "chart"}
    assert_shows(ex, study.chart())


def test_split_by_gives_one_colour_per_stratum(ex: Explorer, study: Study) -> None:
    chart_control(ex, "by").value = "crew"  # as a user's choice in the dropdown
    assert ex.options("chart").by == "crew"
    assert_shows(ex, study.chart(by="crew"))
    # The points carry codes: stratum text from chart_strata, colour from the mapper's
    # palette (code i is palette[i]; see qcexplore.draw.palette.strata_color_mapper).
    points = source(ex).data
    layout = ex.slots["chart"].layout
    names = np.asarray(source(ex, "chart_strata").data["stratum"], dtype=object)
    palette = np.asarray(layout.select_one({"name": "chart_colors"}).palette, dtype=object)
    data = pd.DataFrame(
        {"stratum": names[points["stratum_code"]], "color": palette[points["color_code"]]}
    )
    per_level = data.groupby("stratum")["color"].nunique()
    assert per_level.to_dict() == {"A": 1, "B": 1, "C": 1}
    assert data["color"].nunique() == 3


def test_per_stratum_limits_equal_study_chart(ex: Explorer, study: Study) -> None:
    assert chart_control(ex, "limits").disabled  # no split: one set of limits is all there is
    ex.set(by="shift", limits="per_stratum")
    expected = study.chart(by="shift", limits="per_stratum")
    assert not chart_control(ex, "limits").disabled
    assert_shows(ex, expected)
    pd.testing.assert_frame_equal(ex.chart().limits, expected.limits)


@pytest.mark.parametrize(
    ("changes", "arguments"),
    [
        ({"sigma_level": 2.0}, {"sigma_level": 2.0}),
        ({"sigma_method": "between_means"}, {"sigma_method": "between_means"}),
        ({"rules": "western_electric"}, {"rules": "western_electric"}),
        ({"kind": "xbar_s"}, {"kind": "xbar_s"}),
        ({"kind": "ewma"}, {"kind": "ewma"}),
        ({"center": 503.0}, {"center": 503.0}),
        ({"adjust_for": True}, {"adjust_for": True}),
    ],
)
def test_each_chart_setting(ex: Explorer, study: Study, changes: dict, arguments: dict) -> None:
    ex.set(**changes)
    assert_shows(ex, study.chart(**arguments))


def test_controls_write_the_state(ex: Explorer) -> None:
    chart_control(ex, "sigma_level").value = 2.5
    chart_control(ex, "rules").value = "western_electric"
    chart_control(ex, "kind").value = "xbar_s"
    chart_control(ex, "center").value = "five hundred"  # not a number: reported, nothing breaks
    assert "not a number" in ex.status.value and "qcx-error" in ex.status.value
    chart_control(ex, "center").value = "501,5"  # a decimal comma is read as a point
    options = ex.options("chart")
    assert options.center == 501.5
    assert (options.sigma_level, options.rules, options.kind) == (2.5, "western_electric", "xbar_s")
    assert float(source(ex, "chart_limits").data["y0"][0]) in result_limit_values(ex.chart())


def test_date_window(ex: Explorer, study: Study) -> None:
    ex.roles.start.value = dt.date(2026, 9, 8)
    ex.roles.end.value = dt.date(2026, 9, 9)
    assert (ex.state.start, ex.state.end) == ("2026-09-08", "2026-09-09")
    window = study.restrict("2026-09-08", pd.Timestamp("2026-09-10") - pd.Timedelta(1, "ns"))
    assert len(source(ex).data["value"]) == len(window.subgroups) == 48
    assert_shows(ex, window.chart())


def test_roles_build_a_new_study(ex: Explorer, study: Study) -> None:
    ex.roles.subgroup.value = ""  # individual values
    assert ex.state.subgroup is None
    assert len(source(ex).data["value"]) == len(study.data)
    assert ex.chart().kind == "imr"
    ex.roles.subgroup.value = "day"  # daily subgroups: a new Study from study.data
    assert len(source(ex).data["value"]) == 14
    assert ex.study_for().subgroup == "day" and "day" not in ex.study_for().factors


def test_in_place_refresh_keeps_the_figure(ex: Explorer) -> None:
    layout, points = ex.slots["chart"].layout, source(ex)
    before = list(points.data["value"])
    ex.set(adjust_for=True)
    assert ex.slots["chart"].layout is layout and source(ex) is points
    assert list(points.data["value"]) != before
    ex.set(by="crew")
    crew_layout = ex.slots["chart"].layout
    assert crew_layout is not layout  # a legend appears: draw.needs_rebuild says build
    ex.set(by=None)
    ex.set(by="crew")
    assert ex.slots["chart"].layout is crew_layout  # built once, refreshed after


def test_failing_computation_is_reported_and_view_kept(
    ex: Explorer, monkeypatch: pytest.MonkeyPatch
) -> None:
    before = list(source(ex).data["value"])

    def broken(self, *args, **kwargs):
        raise RuntimeError("the chart engine broke")

    monkeypatch.setattr(Study, "chart_of", broken)
    chart_control(ex, "by").value = "shift"  # must not raise
    assert "the chart engine broke" in ex.status.value and "qcx-error" in ex.status.value
    assert list(source(ex).data["value"]) == before
    monkeypatch.undo()
    ex.set(sigma_level=2.0)  # the next change recomputes the chart
    assert "qcx-ok" in ex.status.value


def test_bad_roles_are_refused_and_controls_go_back(ex: Explorer) -> None:
    ex.roles.subgroup.value = "net_g"  # the value cannot be its own subgroup
    assert "qcx-error" in ex.status.value and "cannot also be the subgroup" in ex.status.value
    assert ex.state.subgroup == "round" and ex.roles.subgroup.value == "round"


def test_tabs_compute_lazily_and_only_what_changed(
    ex: Explorer, study: Study, monkeypatch: pytest.MonkeyPatch
) -> None:
    ex.show_view("variation")
    assert "variation" in ex._shown and "qcx-ok" in ex.status.value
    text = ex.texts["variation"].value
    assert "Variance components" in text and "residual" in text
    assert ex.slots["components"].layout is not None

    def broken(self, *args, **kwargs):
        raise RuntimeError("variation must not be recomputed")

    monkeypatch.setattr(Study, "variation_of", broken)
    ex.set(by="crew")  # the chart changes, the sources of variation do not
    assert "qcx-error" not in ex.status.value
    chart = views.view_named("chart")
    assert ex._shown["chart"] != ex._view_key(chart)  # the hidden chart waits
    monkeypatch.undo()
    ex.show_view("chart")
    assert ex._shown["chart"] == ex._view_key(chart)


def test_time_and_capability_panels(ex: Explorer, study: Study) -> None:
    ex.show_view("time")
    assert "Ljung-Box" in ex.texts["time"].value
    assert ex.slots["acf"].layout is not None and ex.slots["shifts"].layout is not None
    ex.show_view("capability")
    indices = study.capability().indices
    assert "Capability indices" in ex.texts["capability"].value
    shown = ex.texts["capability"].value
    assert all(f"<td>{WORDS[i]}</td>" in shown for i in indices["index"])  # Cpk, not cpk


def test_findings_panel(ex: Explorer, study: Study) -> None:
    ex.show_view("findings")
    text = ex.texts["findings"].value
    assert "do not decide product disposition" in text and "weights-and-measures" in text
    cards = ex.panels["findings"].cards.children
    for card, finding in zip(cards, study.findings(), strict=True):
        assert html.escape(finding.title) in card.children[0].value


def test_selection_table_and_exclusion(ex: Explorer, study: Study) -> None:
    layout = ex.slots["chart"].layout
    assert layout.select_one({"type": BoxSelectTool}) is not None
    labels = [str(x) for x in study.subgroups["subgroup"][:5]]
    source(ex).selected.indices = [0, 1, 2, 3, 4]  # as a box selection in the page does
    assert ex.selected == tuple(labels)
    rows = int(study.subgroups["n"][:5].sum())
    assert f"Rows 1-{PAGE_ROWS} of {rows}" in ex.actions.selection.value
    assert ex.actions.selection.value.count("<tr") == PAGE_ROWS + 1  # header + one page
    ex.actions.next.click()
    assert f"Rows {PAGE_ROWS + 1}-{rows} of {rows}" in ex.actions.selection.value

    ex.actions.exclude.click()  # no reason typed: refused, nothing excluded
    assert "reason" in ex.status.value and ex.state.exclusions == ()
    source(ex).selected.indices = [0, 1]
    ex.actions.reason.value = "scale recalibrated <that hour>"
    ex.actions.exclude.click()
    assert ex.state.excluded == tuple(labels[:2])
    expected = study.chart(exclude=tuple(study.subgroups["subgroup"][:2]))
    assert_shows(ex, expected)
    assert "&lt;that hour&gt;" in ex.actions.exclusions.value
    ex.actions.restore_all.click()
    assert ex.state.exclusions == ()
    assert_shows(ex, study.chart())


def test_log_round_trip(ex: Explorer, study: Study, tmp_path) -> None:
    ex.set(by="crew", limits="per_stratum", sigma_level=2.5)
    first = ex.chart().points["subgroup"].iloc[:3]
    ex._select(tuple(str(x) for x in first))
    ex.actions.reason.value = "jar dropped"
    ex.exclude_selected()
    ex.add_note("Crew B reads high on its own scale.")
    path = ex.save(tmp_path / "log.json")
    saved = json.loads(path.read_text())
    assert saved["fingerprint"] == study.fingerprint

    again = Explorer(demo_study(), log=path)
    assert again.state == ex.state
    assert "loaded from" in again.status.value and "3 subgroup(s)" in again.status.value
    assert "What the data say:" in again.status.value  # what the view update said stays
    assert again.state.notes[0].text == "Crew B reads high on its own scale."
    pd.testing.assert_frame_equal(again.chart().limits, ex.chart().limits)
    assert list(again.chart().excluded) == list(ex.chart().excluded)
    again.show_view("chart")  # the log opens on the findings board; its chart is as saved
    assert_shows(again, ex.chart())


def test_log_against_other_data_is_refused(ex: Explorer, tmp_path) -> None:
    path = ex.save(tmp_path / "log.json")
    other = Explorer(demo_study(seed=1))
    with pytest.raises(QCDataError, match="other data"):
        other.load(path)
    content = path.read_bytes()
    # From the page: the log is uploaded through the browser; what differs is said, not raised.
    other.actions.upload.value = (
        {
            "name": "log.json",
            "type": "application/json",
            "size": len(content),
            "content": memoryview(content),
            "last_modified": dt.datetime.now(),
        },
    )
    assert "other data" in other.actions.confirm_text.value
    with pytest.raises(QCDataError, match="not a qcexplore investigation log"):
        (tmp_path / "x.json").write_text("{}")
        other.load(tmp_path / "x.json")


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    by=st.sampled_from([None, "crew", "shift"]),
    level=st.floats(1.0, 6.0),
    method=st.sampled_from(["within", "between_means", "overall"]),
    notes=st.lists(st.text(max_size=20), max_size=3),
)
def test_state_json_round_trip(by, level, method, notes) -> None:
    chart = ChartOptions(by=by, sigma_level=level, sigma_method=method)
    state = Investigation(value="net_g", subgroup="round").with_options("chart", chart)
    for text in notes:
        state = state.note(text)
    back = Investigation.from_dict(json.loads(json.dumps(state.to_dict())), views.option_types())
    assert back == state


def test_stable_classes_and_bokehjs_outside_kernel(ex: Explorer) -> None:
    assert "qcx-explorer" in ex._dom_classes
    assert "qcx-split-by" in chart_control(ex, "by")._dom_classes
    assert "qcx-exclude" in ex.actions.exclude._dom_classes
    assert "qcx-panel-findings" in ex.panels["findings"].box._dom_classes
    assert "qcx-status" in ex.status._dom_classes
    assert resources.load_bokehjs() is False  # no kernel, no page: nothing sent
    bundle = ex._repr_mimebundle_()
    assert "application/vnd.jupyter.widget-view+json" in bundle


def test_comparison_chart_is_drawn_without_a_choice(ex: Explorer) -> None:
    # The "Compare levels of" dropdown starts on the first factor, so the analysis of
    # means is on show as soon as the panel opens.
    ex.show_view("variation")
    assert ex.panels["variation"].choice.value == FACTORS[0]
    assert ex.slots["anom"].layout is not None
    assert f"Comparisons of the levels of {FACTORS[0]}" in ex.texts["variation"].value
    ex.panels["variation"].choice.value = FACTORS[1]  # the comparison follows the choice
    assert f"Comparisons of the levels of {FACTORS[1]}" in ex.texts["variation"].value
    assert ex.state.choice_for("variation") == FACTORS[1]


def test_selection_tools_are_added_before_the_figure_goes_to_the_page(
    study: Study, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Tools added to a figure already on show leave BokehJS without its legend and
    # toolbar (seen in the served app): they must be there when BokehModel wraps it.
    from qcexplore.app import panels as module

    seen: list[bool] = []
    real = module.BokehModel

    def recording(layout, **kwargs):
        if layout.name == "chart_layout":
            seen.append(layout.select_one({"type": BoxSelectTool}) is not None)
        return real(layout, **kwargs)

    monkeypatch.setattr(module, "BokehModel", recording)
    fresh = Explorer(study)  # the findings board may draw the chart too, in a card
    fresh.show_view("chart")
    fresh.set(by="crew")
    assert len(seen) >= 2 and all(seen)


def test_split_by_a_derived_factor(ex: Explorer, study: Study) -> None:
    # weekday and hour come from the time column (qcexplore.data.derive), not the data.
    offered = [value for _label, value in chart_control(ex, "by").options]
    assert {"weekday", "hour"} <= set(offered) and offered[0] == ""  # "" is "no split"
    chart_control(ex, "by").value = "weekday"
    assert_shows(ex, study.chart(by="weekday"))
    assert "split by weekday" in ex.status.value


def test_show_this_opens_the_view_that_shows_the_finding(study: Study) -> None:
    fresh = Explorer(study)
    found = study.findings()
    index = next(i for i, f in enumerate(found) if f.kind == "measurement_offset")
    card = fresh.panels["findings"].cards.children[index]
    card.children[-1].click()  # "Show this"
    assert fresh.visible == "chart" and fresh.options("chart").by == found[index].factor
    assert_shows(fresh, study.chart(by=found[index].factor))


def test_a_refused_choice_is_explained_beside_its_control_and_taken_back(ex: Explorer) -> None:
    before = list(source(ex).data["value"])
    chart_control(ex, "kind").value = "p"  # fill weights are no counts of defectives
    assert "whole-number counts" in ex.panels["chart"].message.value
    assert chart_control(ex, "kind").value == "auto" and ex.options("chart").kind == "auto"
    assert list(source(ex).data["value"]) == before
    chart_control(ex, "kind").value = "xbar_s"  # a good choice clears the explanation
    assert ex.panels["chart"].message.value == ""


def test_a_specification_typed_in_changes_capability_and_the_findings(study: Study) -> None:
    fresh = Explorer(study)
    fresh.show_view("capability")
    fresh.panels["capability"].controls["lsl"].value = "503"
    assert fresh.study_for().spec == Spec(lsl=503)
    expected = study.capability(spec=Spec(lsl=503)).indices
    assert all(f"{v:.4g}" in fresh.texts["capability"].value for v in expected["value"])
    fresh.show_view("findings")
    cards = [c.children[0].value for c in fresh.panels["findings"].cards.children]
    assert any("LSL 503 g" in c for c in cards)
