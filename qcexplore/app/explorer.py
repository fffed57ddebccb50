"""The explorer: one widget for an investigation, its state held in one place.

Layout: the settings on top, then the panels as tabs ("Chart", "Where the
variation comes from", "Over time", "Against the specification", "What the data
say"), then the selection, exclusions, notes and the investigation log, and a
status line at the bottom.

Flow: a control change makes a new :class:`~qcexplore.app.state.ExplorerState`;
the visible panel is brought up to date and the others are marked stale and
computed when their tab is first shown. Each panel knows which part of the state
it depends on, so a change only recomputes what it affects (and the Study caches
its results). Numbers come from :class:`~qcexplore.study.Study`, figures from
:mod:`qcexplore.draw`; existing figures get new data in place through
``draw.refresh`` and are rebuilt only when ``draw.needs_rebuild`` says so. A
failing computation is reported in the status line and the last good view stays.
"""

from __future__ import annotations

import html
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import ipywidgets as widgets
import numpy as np
import pandas as pd
from bokeh.models import ColumnDataSource, LayoutDOM
from jupyter_bokeh import BokehModel

from qcexplore import draw
from qcexplore.app.controls import Actions, Settings, styled
from qcexplore.app.resources import load_bokehjs
from qcexplore.app.state import (
    ExplorerState,
    chart_arguments,
    fingerprint,
    load_log,
    save_log,
)
from qcexplore.app.text import findings_html, log_html, notes_html, table_html
from qcexplore.errors import QCDataError
from qcexplore.study import Study

#: Rows of the selection table per page: never the whole data set in the page.
PAGE_ROWS = 20
PANELS = (
    ("chart", "Chart"),
    ("variation", "Where the variation comes from"),
    ("time", "Over time"),
    ("capability", "Against the specification"),
    ("findings", "What the data say"),
)


def _draw(name: str) -> Callable[..., Any]:
    function = getattr(draw, name, None)
    if function is None:
        raise QCDataError(f"qcexplore.draw has no {name}() yet: this panel cannot be drawn.")
    return function


@dataclass
class FigureSlot:
    """One bokeh figure place in the widget: figures are built once, then refreshed in place.

    A few built layouts are kept (each in its own BokehModel), one per layout shape
    (for example the overlay split by crew and the one split by shift), so going back
    to a shape seen before swaps the shown model and refreshes its data instead of
    building and sending a whole new figure.
    """

    css: str
    keep: int = 6
    box: widgets.Box = field(init=False)
    built: list[tuple[tuple, LayoutDOM, BokehModel]] = field(default_factory=list)

    def __post_init__(self) -> None:
        self.box = styled(widgets.Box(), f"figure-{self.css}")

    @property
    def layout(self) -> LayoutDOM | None:
        """The layout on show."""
        return self.built[0][1] if self.built else None

    def show(self, result: Any, build: Callable[[], LayoutDOM], options: tuple = ()) -> bool:
        """Put ``result`` on show; returns True when a new figure was built."""
        needs_rebuild = _draw("needs_rebuild")
        for i, (opts, layout, model) in enumerate(self.built):
            if opts == options and not needs_rebuild(layout, result):
                _draw("refresh")(layout, result)
                if i:
                    self.built.insert(0, self.built.pop(i))
                    self.box.children = [model]
                return False
        layout = build()
        model = BokehModel(layout)
        self.built.insert(0, (options, layout, model))
        for _opts, _layout, old in self.built[self.keep :]:
            old.close()
        del self.built[self.keep :]
        self.box.children = [model]
        return True

    def clear(self) -> None:
        """Show nothing (the panel's result is not available)."""
        self.box.children = []
        for _opts, _layout, model in self.built:
            model.close()
        self.built.clear()


class Explorer(widgets.VBox):
    """The interactive explorer of a Study (an ipywidgets VBox).

    Parameters
    ----------
    study : the Study to explore; changing the value, subgroup or time control
        builds a new Study from ``study.data`` with the new roles
    state : an ExplorerState to start from (default: the study's roles, no split)
    log : path of an investigation log to load (refused for other data)

    Examples
    --------
    >>> from qcexplore.demo import filling_line
    >>> frame, truth = filling_line(days=3)
    >>> ex = Explorer(Study(frame, value="net_g", subgroup="round", time="taken_at",
    ...                     factors=["crew", "nozzle"], measured_by=["crew"]))
    >>> ex.set(by="crew")
    >>> ex.state.by
    'crew'
    """

    def __init__(
        self,
        study: Study,
        *,
        state: ExplorerState | None = None,
        log: str | Path | None = None,
    ) -> None:
        self.study = study
        self.data_id = fingerprint(study.frame, study.roles())
        self._frame = study.data
        self._studies: dict[tuple, Study] = {}
        self.state = state or ExplorerState(
            value=study.value, subgroup=study.subgroup, time=study.time
        )
        self.settings = Settings(self._frame, self.state)
        self.actions = Actions()
        self.status = styled(widgets.HTML(value=""), "status")
        self.slots = {
            "chart": FigureSlot("chart"),
            "multivari": FigureSlot("multivari"),
            "components": FigureSlot("components"),
            "anom": FigureSlot("anom"),
            "acf": FigureSlot("acf"),
            "shifts": FigureSlot("shifts"),
            "capability": FigureSlot("capability"),
        }
        self.texts = {
            name: styled(widgets.HTML(value=""), f"{name}-text")
            for name in ("chart", "variation", "comparisons", "time", "capability", "findings")
        }
        self.anom_factor = styled(
            widgets.Dropdown(
                description="Compare levels of", options=[], style={"description_width": "130px"}
            ),
            "anom-factor",
        )
        self.panels = {
            "chart": widgets.VBox(
                [self.slots["chart"].box, self.texts["chart"], self.actions.selection_box]
            ),
            "variation": widgets.VBox(
                [
                    self.texts["variation"],
                    self.slots["components"].box,
                    self.slots["multivari"].box,
                    self.anom_factor,
                    self.slots["anom"].box,
                    self.texts["comparisons"],
                ]
            ),
            "time": widgets.VBox(
                [self.slots["acf"].box, self.slots["shifts"].box, self.texts["time"]]
            ),
            "capability": widgets.VBox([self.slots["capability"].box, self.texts["capability"]]),
            "findings": widgets.VBox([self.texts["findings"]]),
        }
        for name, panel in self.panels.items():
            styled(panel, f"panel-{name}")
        self.tabs = styled(
            widgets.Tab(
                children=[self.panels[name] for name, _ in PANELS],
                titles=[title for _, title in PANELS],
            ),
            "panels",
        )
        self._shown: dict[str, tuple] = {}
        self._page = 0
        self._selected: tuple[str, ...] = ()
        self._selected_rows: pd.DataFrame = pd.DataFrame()
        self._selection_source: ColumnDataSource | None = None
        self._points: dict[int, ColumnDataSource] = {}
        # Tab titles are our panel names in plain words: let them take the width they need
        # instead of the toolkit's fixed tab width, which cuts them off.
        tab_style = widgets.HTML(
            "<style>.qcx-panels .lm-TabBar-tab "
            "{ flex: 0 0 auto !important; max-width: none !important; }</style>"
        )
        super().__init__(
            [tab_style, self.settings.box, self.tabs, self.actions.log_box, self.status]
        )
        styled(self, "explorer")
        self._wire()
        if log is not None:
            self.load(log)
        else:
            self._apply(self.state)

    # ---- display ---------------------------------------------------------------
    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        load_bokehjs()
        return super()._repr_mimebundle_(**kwargs)

    # ---- wiring ------------------------------------------------------------------
    def _wire(self) -> None:
        a = self.actions
        self.settings.observe(lambda _field: self._guard("settings", self._from_controls))
        self.tabs.observe(lambda _change: self._guard("panel", self._refresh), "selected_index")
        self.anom_factor.observe(
            lambda _change: self._guard("comparison", self._show_anom), "value"
        )
        a.exclude.on_click(lambda _b: self._guard("exclusion", self.exclude_selected))
        a.restore.on_click(lambda _b: self._guard("exclusion", self.restore_selected))
        a.restore_all.on_click(lambda _b: self._guard("exclusion", self.restore_all))
        a.previous.on_click(lambda _b: self._guard("selection", lambda: self._turn(-1)))
        a.next.on_click(lambda _b: self._guard("selection", lambda: self._turn(1)))
        a.add_note.on_click(lambda _b: self._guard("note", self.add_note))
        a.save.on_click(lambda _b: self._guard("log", lambda: self.save(a.path.value)))
        a.load.on_click(lambda _b: self._guard("log", lambda: self.load(a.path.value)))

    def _guard(self, what: str, action: Callable[[], Any]) -> None:
        """Run a callback; report any error in the status line and keep the last view."""
        try:
            action()
        except Exception as error:  # a callback must never kill the widget
            self._report_error(what, error)

    def _report_error(self, what: str, error: BaseException) -> None:
        kind = "" if isinstance(error, QCDataError) else f"{type(error).__name__}: "
        self.status.value = (
            f"<span class='qcx-error' style='color:#b00020'>Could not update the {what}: "
            f"{html.escape(kind + str(error))}</span> (the last good view is kept)"
        )

    def _say(self, text: str) -> None:
        self.status.value = f"<span class='qcx-ok'>{html.escape(text)}</span>"

    # ---- state -------------------------------------------------------------------
    def set(self, **changes: Any) -> None:
        """Change state fields from Python (as the controls would) and update the view.

        Returns nothing, so that a cell ending in ``explorer.set(...)`` does not show
        the explorer a second time.
        """
        self._apply(self.state.replace(**changes))

    def _from_controls(self) -> None:
        self._apply(self.state.replace(**self.settings.read()))

    def _apply(self, state: ExplorerState) -> None:
        """Make ``state`` the current one, show it in the controls, update the view."""
        try:
            study = self.study_for(state)
        except Exception:
            self._write_controls(self.state)  # the controls go back to the last good state
            raise
        if state.by is not None and state.by not in study.available_factors:
            state = state.replace(by=None)
        self.state = state
        self._write_controls(state)
        choices = list(study.factors)
        if list(self.anom_factor.options) != choices:
            self.anom_factor.options = choices
        if self.anom_factor.value not in choices and choices:
            # ipywidgets leaves a Dropdown empty when its options change: without a factor
            # the comparison chart (analysis of means) would never be drawn.
            self.anom_factor.value = choices[0]
        self._show_log()
        self._refresh()

    def _write_controls(self, state: ExplorerState) -> None:
        study = self.study_for(state)
        self.settings.write(state, study.available_factors, ", ".join(study.measured_by))

    def study_for(self, state: ExplorerState | None = None) -> Study:
        """The Study for a state's roles and date window (built once, then reused)."""
        state = state or self.state
        key = state.roles_key
        if key not in self._studies:
            base = self.study
            if (state.value, state.subgroup, state.time) == (base.value, base.subgroup, base.time):
                study = base
            else:
                taken = {state.value, state.subgroup, state.time}
                factors = [f for f in base.factors if f not in taken]
                study = Study(
                    self._frame,
                    value=state.value,
                    subgroup=state.subgroup,
                    time=state.time,
                    factors=factors,
                    measured_by=[m for m in base.measured_by if m in factors],
                    shifts=base.shifts,
                    spec=base.spec if state.value == base.value else None,
                    units=base.units if state.value == base.value else None,
                )
            if state.start is not None or state.end is not None:
                end = None
                if state.end is not None:
                    end = pd.Timestamp(state.end) + pd.Timedelta(days=1) - pd.Timedelta(1, "ns")
                study = study.restrict(state.start, end)
            self._studies[key] = study
        return self._studies[key]

    def chart_options(self, state: ExplorerState | None = None) -> dict[str, Any]:
        """The arguments of ``Study.chart`` that a state stands for."""
        state = state or self.state
        return chart_arguments(state, self.study_for(state))

    def chart(self) -> Any:
        """The ChartResult on show (from the Study's cache)."""
        return self.study_for().chart(**self.chart_options())

    # ---- panels ------------------------------------------------------------------
    @property
    def visible(self) -> str:
        """The name of the panel on show."""
        return PANELS[self.tabs.selected_index or 0][0]

    def _panel_key(self, name: str) -> tuple:
        return self.state.chart_key if name == "chart" else self.state.roles_key

    def _refresh(self) -> None:
        """Bring the visible panel up to date if the state changed what it shows."""
        name = self.visible
        key = self._panel_key(name)
        if self._shown.get(name) == key:
            return
        began = time.perf_counter()
        try:
            summary = getattr(self, f"_show_{name}")()
        except Exception as error:
            self._report_error(dict(PANELS)[name], error)
            return
        self._shown[name] = key
        ms = (time.perf_counter() - began) * 1000
        self._say(f"{dict(PANELS)[name]}: {summary} ({ms:.0f} ms).")

    def _show_chart(self) -> str:
        result = self.chart()
        slot = self.slots["chart"]
        if slot.show(result, lambda: _draw("chart_figure")(result)):
            self._watch_selection(slot.layout)
        source = self._points.get(id(slot.layout))
        self._selection_source = source
        if source is not None and source.selected.indices:
            source.selected.indices = []
        self._select(())
        self.texts["chart"].value = table_html(result.limits, "Limits") + notes_html(result.notes)
        split = f", split by {result.by}" if result.by else ""
        signals = int(result.points["signal"].sum())
        return f"{result.kind} chart of {len(result.points)} points{split}, {signals} signals"

    def _show_variation(self) -> str:
        result = self.study_for().variation()
        parts = [
            table_html(result.structure, "How the factors relate to the subgroups"),
            table_html(result.anova, "Analysis of variance (with the error term each test uses)"),
            table_html(result.components, "Variance components"),
        ]
        if len(result.offsets):
            parts.append(table_html(result.offsets, "Sampling and measurement offsets"))
        if len(result.spread):
            parts.append(table_html(result.spread, "Equal spread between levels?"))
        self.texts["variation"].value = "".join(parts) + notes_html(result.notes)
        self.slots["components"].show(result, lambda: _draw("components_figure")(result))
        self.slots["multivari"].show(result, lambda: _draw("multivari_figure")(result))
        self._show_anom()
        return f"{len(result.components)} variance components"

    def _show_anom(self) -> None:
        factor = self.anom_factor.value
        if factor is None or self.visible != "variation":
            return
        result = self.study_for().variation()
        self.slots["anom"].show(
            result, lambda: _draw("anom_figure")(result, factor), options=(factor,)
        )
        comparison = result.comparisons.get(factor)
        self.texts["comparisons"].value = (
            "" if comparison is None else table_html(comparison, f"Comparisons of {factor}")
        )

    def _show_time(self) -> str:
        result = self.study_for().time_structure()
        self.slots["acf"].show(result, lambda: _draw("acf_figure")(result))
        self.slots["shifts"].show(result, lambda: _draw("shifts_figure")(result))
        ar1 = pd.DataFrame([result.ar1])
        self.texts["time"].value = (
            table_html(result.ljung_box, "Ljung-Box tests of autocorrelation")
            + table_html(ar1, "First-order autoregressive fit")
            + table_html(result.shifts, "Step changes")
            + notes_html(result.notes)
        )
        return f"{len(result.acf)} lags, {len(result.shifts)} step changes"

    def _show_capability(self) -> str:
        study = self.study_for()
        if study.spec is None:
            self.slots["capability"].clear()
            self.texts["capability"].value = (
                "<p>No specification: build the Study with spec=Spec(lsl=..., usl=...) "
                "to see capability.</p>"
            )
            return "no specification"
        result = study.capability()
        self.slots["capability"].show(result, lambda: _draw("capability_figure")(result))
        self.texts["capability"].value = (
            table_html(result.indices, "Capability indices")
            + table_html(result.ppm, "Parts per million outside the specification")
            + table_html(result.normality, "Normality")
            + notes_html(result.warnings)
        )
        return f"{len(result.indices)} indices"

    def _show_findings(self) -> str:
        found = self.study_for().findings()
        self.texts["findings"].value = findings_html(found)
        return f"{len(found)} findings"

    # ---- selection and exclusions -----------------------------------------------
    def _watch_selection(self, layout: LayoutDOM) -> None:
        # draw.chart_figure puts the box and tap selection tools on the chart's points.
        points = layout.select_one({"name": "chart_points", "type": ColumnDataSource})
        if points is None:
            return
        self._points[id(layout)] = points
        points.selected.on_change(
            "indices", lambda _a, _o, new: self._guard("selection", lambda: self.select(new))
        )

    def select(self, indices: list[int]) -> None:
        """Show the data rows of the selected chart points (as a box or tap selection does)."""
        if self._selection_source is None:
            raise QCDataError("The chart has no points to select.")
        # The source's rows are the chart's points in order; its subgroup column may hold
        # codes or times, so the labels come from the result, written as _select reads them.
        subgroup = self.chart().points["subgroup"].iloc[list(indices)]
        if isinstance(subgroup.dtype, pd.CategoricalDtype):
            labels = subgroup.cat.categories.astype(str)[subgroup.cat.codes.to_numpy()]
        else:
            labels = subgroup.astype(str)
        self._select(tuple(dict.fromkeys(labels)))

    def _select(self, labels: tuple[str, ...]) -> None:
        self._selected = labels
        self._page = 0
        if not labels:
            self._selected_rows = pd.DataFrame()
        else:
            study = self.study_for()
            column = study.frame[study.subgroup_column]
            names = column.cat.categories.astype(str)
            chosen = np.flatnonzero(np.isin(np.asarray(names, dtype=object), labels))
            rows = np.isin(column.cat.codes.to_numpy(), chosen)
            self._selected_rows = study.data.loc[rows]
        self._show_page()

    @property
    def selected(self) -> tuple[str, ...]:
        """Labels of the selected subgroups."""
        return self._selected

    def _turn(self, step: int) -> None:
        pages = max(1, -(-len(self._selected_rows) // PAGE_ROWS))
        self._page = min(max(self._page + step, 0), pages - 1)
        self._show_page()

    def _show_page(self) -> None:
        rows = self._selected_rows
        if rows.empty:
            self.actions.selection.value = (
                "<p>Select points on the chart (box or tap) to see their rows here.</p>"
            )
            return
        first = self._page * PAGE_ROWS
        page = rows.iloc[first : first + PAGE_ROWS]
        caption = (
            f"Rows {first + 1}-{first + len(page)} of {len(rows)} in "
            f"{len(self._selected)} selected subgroup(s)"
        )
        self.actions.selection.value = table_html(page, caption)

    def exclude_selected(self) -> None:
        """Leave the selected subgroups out of the limits, with the reason typed."""
        if not self._selected:
            raise QCDataError("Select the subgroups on the chart first, then exclude them.")
        self._apply(self.state.exclude(list(self._selected), self.actions.reason.value))
        self.actions.reason.value = ""

    def restore_selected(self) -> None:
        """Put the selected subgroups back into the limits."""
        self._apply(self.state.restore(list(self._selected)))

    def restore_all(self) -> None:
        """Put every excluded subgroup back into the limits."""
        self._apply(self.state.restore())

    def add_note(self, text: str | None = None) -> None:
        """Add a note to the investigation log (the note box's text by default)."""
        text = self.actions.note.value if text is None else text
        self._apply(self.state.note(text))
        self.actions.note.value = ""

    def _show_log(self) -> None:
        self.actions.exclusions.value = log_html(self.state.exclusions, ())
        self.actions.notes.value = log_html((), self.state.notes) if self.state.notes else ""

    # ---- the investigation log ----------------------------------------------------
    def save(self, path: str | Path) -> Path:
        """Save settings, exclusions and notes with a fingerprint of the data (JSON)."""
        written = save_log(path, self.state, data_id=self.data_id, roles=self.study.roles())
        self._say(f"Investigation log saved to {written}.")
        return written

    def load(self, path: str | Path) -> None:
        """Load an investigation log saved on the same data (other data are refused)."""
        state = load_log(path, data_id=self.data_id)
        self._shown.clear()
        self._apply(state)
        # Said before what the panel update reported (which may be an error), not instead.
        loaded = (
            f"Investigation log loaded from {path}: {len(state.exclusions)} subgroup(s) left "
            f"out of the limits, {len(state.notes)} note(s)."
        )
        self.status.value = f"<span class='qcx-ok'>{html.escape(loaded)}</span> {self.status.value}"
