"""The explorer: one widget for an investigation, a host over the registered views.

Layout: the roles and date window on top, then one tab per view of ``qcexplore.views.VIEWS``
(each with its option controls, generated from its options type, its figures and its tables),
then the notes and the investigation log, and a status line at the bottom. Nothing here knows
a particular analysis: a new view shows up as a new tab.

Flow: a control change makes a new :class:`~qcexplore.investigation.Investigation`; the visible
view is brought up to date and the others are computed when their tab is first shown. A view
is recomputed only when what it depends on changed (the Study caches results by options).
Existing figures get new data in place through ``draw.refresh`` and are rebuilt only when
``draw.needs_rebuild`` says so. A failing computation is reported in the status line and the
last good view stays.
"""

from __future__ import annotations

import html
from collections.abc import Callable
from pathlib import Path
from typing import Any

import ipywidgets as widgets
import numpy as np
import pandas as pd
from bokeh.models import ColumnDataSource, LayoutDOM

from qcexplore import views
from qcexplore.app.controls import Actions, RoleControls, styled
from qcexplore.app.logbook import Logbook
from qcexplore.app.panels import FigureSlot, Panel
from qcexplore.app.resources import load_bokehjs
from qcexplore.errors import QCDataError
from qcexplore.investigation import Investigation, study_for
from qcexplore.investigation_file import (
    LogMismatch,
    SavedLog,
    fit_state,
    parse_log,
    read_log_file,
    save_log,
)
from qcexplore.study import Study
from qcexplore.views.base import View
from qcexplore.views.text import log_html, table_html

#: Settings of ``Explorer.set`` that are the investigation's roles and date window.
ROLE_SETTINGS = ("value", "subgroup", "time", "start", "end")
#: Rows of the selection table per page: never the whole data set in the page.
PAGE_ROWS = 20
#: The page's own rules. Tab titles are our view names in plain words: they take the width they
#: need instead of the toolkit's fixed tab width, which cuts them off. Long labels and tables
#: wrap or scroll inside their panel rather than push it wider than the window. Presentation
#: mode enlarges the text for a room and puts the settings and the log out of the way.
PAGE_STYLE = """
.qcx-panels .lm-TabBar-tab { flex: 0 0 auto !important; max-width: none !important; }
.qcx-explorer { max-width: 100%; }
.qcx-explorer .widget-label { white-space: normal; }
.qcx-explorer table { display: block; max-width: 100%; overflow-x: auto; }
.qcx-card { border: 1px solid #ddd; border-radius: 6px; padding: 6px 12px; margin: 8px 0; }
.qcx-card-headline { font-size: 1.25em; font-weight: bold; }
.qcx-presenting { font-size: 150%; }
.qcx-presenting .widget-label, .qcx-presenting .widget-html-content,
.qcx-presenting .lm-TabBar-tabLabel, .qcx-presenting button { font-size: 1.4em !important; }
.qcx-presenting .qcx-card-headline { font-size: 1.8em; }
.qcx-presenting .qcx-roles, .qcx-presenting .qcx-log, .qcx-presenting .qcx-options,
.qcx-presenting .qcx-card-statistics { display: none !important; }
"""


class Explorer(widgets.VBox):
    """The interactive explorer of a Study (an ipywidgets VBox).

    Parameters
    ----------
    study : the Study to explore; changing the value, subgroup or time control
        builds a new Study from ``study.data`` with the new roles
    state : an Investigation to start from (default: the study's roles, default options)
    log : path of an investigation log to load (refused for other data)

    Examples
    --------
    >>> from qcexplore.demo import filling_line
    >>> frame, truth = filling_line(days=3)
    >>> ex = Explorer(Study(frame, value="net_g", subgroup="round", time="taken_at",
    ...                     factors=["crew", "nozzle"], measured_by=["crew"]))
    >>> ex.set(by="crew")
    >>> ex.options("chart").by
    'crew'
    """

    def __init__(
        self,
        study: Study,
        *,
        state: Investigation | None = None,
        log: str | Path | None = None,
    ) -> None:
        self.study = study
        self._studies: dict[tuple, Study] = {}
        self.state = state or Investigation.of(study)
        self.roles = RoleControls(study.data, self.state)
        self.actions = Actions()
        self.status = styled(widgets.HTML(value=""), "status")
        self.views = list(views.VIEWS)
        self.panels = {
            v.name: Panel.of(v, [self.actions.selection_box] if v.uses_exclusions else [])
            for v in self.views
        }
        self.tabs = styled(
            widgets.Tab(
                children=[p.box for p in self.panels.values()],
                titles=[v.title for v in self.views],
            ),
            "panels",
        )
        self._shown: dict[str, tuple] = {}
        self._page = 0
        self._selected: tuple[str, ...] = ()
        self._selected_rows: pd.DataFrame = pd.DataFrame()
        self._selection_source: ColumnDataSource | None = None
        self._points: dict[int, ColumnDataSource] = {}
        # Tab titles are our view names in plain words: let them take the width they need
        # instead of the toolkit's fixed tab width, which cuts them off.
        page_style = widgets.HTML(f"<style>{PAGE_STYLE}</style>")
        self.presenting = styled(
            widgets.ToggleButton(
                description="Presentation mode",
                tooltip="Larger text for a room; settings and the log out of the way",
                layout=widgets.Layout(width="auto"),
            ),
            "presentation",
        )
        self.presenting.observe(lambda change: self.present(bool(change["new"])), "value")
        super().__init__(
            [
                page_style,
                self.presenting,
                self.roles.box,
                self.tabs,
                self.actions.log_box,
                self.status,
            ]
        )
        styled(self, "explorer")
        self._wire()
        if log is not None:
            self.load(log)
        else:
            self._apply(self.state)

    def present(self, on: bool = True) -> None:
        """Presentation mode on or off: larger text, settings and the log out of the way."""
        if on:
            self.add_class("qcx-presenting")
        else:
            self.remove_class("qcx-presenting")
        if self.presenting.value != on:
            self.presenting.value = on

    # ---- display ---------------------------------------------------------------
    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        load_bokehjs()
        return super()._repr_mimebundle_(**kwargs)

    # ---- wiring ------------------------------------------------------------------
    def _wire(self) -> None:
        a = self.actions
        self.roles.observe(lambda _f: self._guard("settings", self._from_roles))
        for name, panel in self.panels.items():
            if panel.controls is not None:
                panel.controls.observe(
                    lambda _f, name=name: self._guard("settings", lambda: self._from_options(name))
                )
            if panel.choice is not None:
                panel.choice.observe(
                    lambda _c, name=name: self._guard("view", lambda: self._from_choice(name)),
                    "value",
                )
        self.tabs.observe(lambda _change: self._guard("view", self._refresh), "selected_index")
        a.exclude.on_click(lambda _b: self._guard("exclusion", self.exclude_selected))
        a.restore.on_click(lambda _b: self._guard("exclusion", self.restore_selected))
        a.restore_all.on_click(lambda _b: self._guard("exclusion", self.restore_all))
        a.previous.on_click(lambda _b: self._guard("selection", lambda: self._turn(-1)))
        a.next.on_click(lambda _b: self._guard("selection", lambda: self._turn(1)))
        a.add_note.on_click(lambda _b: self._guard("note", self.add_note))
        # The log's buttons (download, upload, log folder, autosave) are the logbook's.
        self.logbook = Logbook(self, a)

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
    def options(self, view: str, state: Investigation | None = None) -> Any:
        """The options a view computes with now (None for a view without options)."""
        state = state or self.state
        return views.view_named(view).options_for(self.study_for(state), state)

    def set(self, **changes: Any) -> None:
        """Change roles, the date window or any view's options from Python, as the controls
        would, and update the view.

        Returns nothing, so that a cell ending in ``explorer.set(...)`` does not show
        the explorer a second time.
        """
        if "exclude" in changes:
            raise QCDataError(
                "An exclusion needs its reason: use explorer.exclude(labels, reason) to leave "
                "subgroups out of the limits."
            )
        rest = dict(changes)
        state = self.state.replace(**{k: rest.pop(k) for k in ROLE_SETTINGS if k in rest})
        for view in self.views:
            if view.options_type is None or not rest:
                continue
            own = {
                k: rest.pop(k) for k in list(rest) if k in view.options_type.__dataclass_fields__
            }
            if own:
                current = view.settings(self.study_for(state), state)
                assert current is not None
                state = state.with_options(view.name, current.replace(**own))
        if rest:
            raise QCDataError(f"The explorer has no setting {', '.join(sorted(rest))}.")
        self._apply(state)

    def exclude(self, labels: list[str], reason: str) -> None:
        """Leave these subgroups (their text labels) out of the limits, with the reason."""
        self._apply(self.state.exclude(list(labels), reason))

    def _from_roles(self) -> None:
        self._apply(self.state.replace(**self.roles.read()))

    def _from_options(self, name: str) -> None:
        panel = self.panels[name]
        assert panel.controls is not None and panel.view.options_type is not None
        current = panel.view.settings(self.study_for(), self.state)
        try:
            options = panel.controls.read(current)
        except QCDataError as error:
            self._write_controls(self.state)
            self._explain(name, str(error))
            raise
        self._apply(self.state.with_options(name, options))

    def _from_choice(self, name: str) -> None:
        choice = self.panels[name].choice
        assert choice is not None
        self._apply(self.state.with_choice(name, choice.value or None))

    def _apply(self, state: Investigation) -> None:
        """Make ``state`` the current one, show it in the controls, update the view."""
        try:
            study = self.study_for(state)
            for view in self.views:  # every options object must hold for the new study
                view.options_for(study, state)
        except Exception:
            self._write_controls(self.state)  # the controls go back to the last good state
            raise
        previous, self.state = self.state, state
        self._write_controls(state)
        self._show_log()
        failure = self._refresh()
        if failure is not None and previous != state and self.visible in self._shown:
            # What cannot be shown is not kept: the controls go back to what is on show, and
            # the reason stands next to them.
            self.state = previous
            self._write_controls(previous)
            self._show_log()
            self._explain(self.visible, f"This cannot be shown: {failure}")

    def _explain(self, view: str, text: str) -> None:
        self.panels[
            view
        ].message.value = (
            f"<span class='qcx-error' style='color:#b00020'>{html.escape(text)}</span>"
        )

    def _write_controls(self, state: Investigation) -> None:
        study = self.study_for(state)
        self.roles.write(state)
        for view in self.views:
            controls = self.panels[view.name].controls
            if controls is not None:
                options = view.options_for(study, state)
                live = view.live_choices(study, options)
                controls.write(options, live, view.inactive(study, options))

    def study_for(self, state: Investigation | None = None) -> Study:
        """The Study of an investigation (``investigation.study_for``, built once, then reused)."""
        state = state or self.state
        key = state.study_key
        if key not in self._studies:
            self._studies[key] = study_for(self.study, state)
        return self._studies[key]

    def chart(self) -> Any:
        """The ChartResult of the subgroups on show (from the Study's cache): the chart whose
        points can be selected and left out of the limits."""
        study = self.study_for()
        return views.view_named("chart").compute(study, self.options("chart")).main

    # ---- views -------------------------------------------------------------------
    @property
    def visible(self) -> str:
        """The name of the view on show."""
        return self.views[self.tabs.selected_index or 0].name

    def _view_key(self, view: View) -> tuple:
        """What decides what a view shows: roles, its options, its choice, the exclusions."""
        return (
            self.state.study_key,
            self.options(view.name),
            self.state.choice_for(view.name),
            self.state.excluded if view.uses_exclusions else (),
        )

    def _refresh(self) -> BaseException | None:
        """Bring the visible view up to date if the state changed what it shows; return the
        error that kept it from being shown (it is also reported in the status line)."""
        view = self.views[self.tabs.selected_index or 0]
        key = self._view_key(view)
        if self._shown.get(view.name) == key:
            return None
        try:
            summary = self._show(view)
        except Exception as error:
            self._report_error(view.title, error)
            return error
        self._shown[view.name] = key
        self.panels[view.name].message.value = ""
        self._say(f"{view.title}: {summary}.")
        return None

    def _show(self, view: View) -> str:
        panel = self.panels[view.name]
        study = self.study_for()
        why_not = view.available(study)
        if why_not:
            for slot in panel.slots.values():
                slot.clear()
            panel.text.value = f"<p>{html.escape(why_not)}</p>"
            return why_not.split(":")[0].lower()
        result = view.compute(study, view.options_for(study, self.state))
        shown = view.show(study, result)
        if shown.cards or panel.cards.children:
            panel.cards.children = [self._card_box(panel, c) for c in shown.cards]
        choice = self._choice(panel, study, result)
        chosen = view.show_choice(study, result, choice) if choice is not None else None
        figures = shown.figures + (chosen.figures if chosen else ())
        wanted = {f.slot for f in figures}
        for name, slot in panel.slots.items():  # a figure this result has not: none on show
            if not slot.in_card and name not in wanted:
                slot.clear()
        for figure in figures:
            slot = panel.slot(figure.slot)
            if slot.show(figure.result, figure.build, figure.variant):
                self._watch_selection(slot.layout)
        if view.uses_exclusions:
            self._attach_selection(panel)
        panel.text.value = shown.html + (chosen.html if chosen else "")
        return shown.summary

    def _card_box(self, panel: Panel, card: Any) -> widgets.Widget:
        parts: list[widgets.Widget] = [widgets.HTML(card.html)]
        if card.figure is not None:
            slot = panel.slot(card.figure.slot, in_card=True)
            slot.show(card.figure.result, card.figure.build, card.figure.variant)
            parts.append(slot.box)
        parts.append(widgets.HTML(card.details))
        if card.action:
            button = styled(
                widgets.Button(description="Show this", tooltip="Open the view that shows it"),
                "show-this",
            )
            button.on_click(lambda _b: self._guard("view", lambda: self.open_view(card.action)))
            parts.append(button)
        return styled(widgets.VBox(parts), "card")

    def show_view(self, name: str) -> None:
        """Bring the view of this name to the front."""
        self.tabs.selected_index = [v.name for v in self.views].index(name)

    def open_view(self, settings: tuple[tuple[str, Any], ...]) -> None:
        """Set the explorer to the settings that show a finding (``Finding.view``): the view
        named first, with the given options and choice."""
        values = dict(settings)
        name = values.pop("view")
        view = views.view_named(name)
        state = self.state
        if "choice" in values:
            state = state.with_choice(name, values.pop("choice"))
        if values and view.options_type is not None:
            current = view.settings(self.study_for(state), state)
            assert current is not None
            state = state.with_options(name, current.replace(**values))
        self._apply(state)
        self.show_view(name)

    def _choice(self, panel: Panel, study: Study, result: Any) -> str | None:
        choices = panel.view.choices(study, result)
        if panel.choice is None or not choices:
            return None
        wanted = self.state.choice_for(panel.view.name)
        chosen = wanted if wanted in choices else choices[0]
        panel.choice.unobserve_all("value")
        try:
            if list(panel.choice.options) != list(choices):
                panel.choice.options = list(choices)
            # ipywidgets leaves a Dropdown empty when its options change: set it, or the
            # comparison chart would never be drawn.
            panel.choice.value = chosen
        finally:
            name = panel.view.name
            panel.choice.observe(
                lambda _c: self._guard("view", lambda: self._from_choice(name)), "value"
            )
        return chosen

    @property
    def slots(self) -> dict[str, FigureSlot]:
        """Every figure place of every view, by slot name."""
        return {name: s for p in self.panels.values() for name, s in p.slots.items()}

    @property
    def texts(self) -> dict[str, widgets.HTML]:
        """The HTML of every view, by view name."""
        return {name: p.text for name, p in self.panels.items()}

    # ---- selection and exclusions -----------------------------------------------
    def _attach_selection(self, panel: Panel) -> None:
        """Point the selection at the chart on show, starting with nothing selected."""
        sources = [self._points.get(id(s.layout)) for s in panel.slots.values()]
        source = next((s for s in sources if s is not None), None)
        self._selection_source = source
        if source is not None and source.selected.indices:
            source.selected.indices = []
        self._select(())

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
        # On a long chart the points source is a display reduction: its "point" column holds
        # each row's position in the result's points.
        rows = np.asarray(self._selection_source.data["point"])[list(indices)]
        subgroup = self.chart().points["subgroup"].iloc[rows]
        if isinstance(subgroup.dtype, pd.CategoricalDtype):
            labels = subgroup.cat.categories.astype(str)[subgroup.cat.codes.to_numpy()]
        else:
            labels = subgroup.astype(str)
        self._select(tuple(dict.fromkeys(labels)))

    def _select(self, labels: tuple[str, ...]) -> None:
        self._selected = labels
        self._page = 0
        self._selected_rows = self.study_for().rows_of(labels) if labels else pd.DataFrame()
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
        self.exclude(list(self._selected), self.actions.reason.value)
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
        self.logbook.changed(self.state)

    # ---- the investigation log ----------------------------------------------------
    def save(self, path: str | Path) -> Path:
        """Save settings, exclusions and notes with a description of the data (JSON), whole
        or not at all: a failed save leaves a log saved there before as it was."""
        written = save_log(path, self.state, self.logbook.data)
        self.logbook.saved(self.state)
        self._say(f"Investigation log saved to {written}.")
        return written

    def load(
        self, source: str | Path | bytes | SavedLog | Investigation, *, fit: bool = False
    ) -> None:
        """Load an investigation log: a file's path, its content, a log read already, or a state.

        A log made on other data is refused with what differs (``investigation_file.LogMismatch``);
        ``fit=True`` applies what still fits these data instead (``investigation_file.fit_state``).
        A log that cannot be applied raises a QCDataError and changes nothing.
        """
        left_out: tuple[str, ...] | None = None  # None: made on these data
        if isinstance(source, Investigation):
            state, origin = source, "the given state"
        else:
            if isinstance(source, SavedLog):
                log = source
            elif isinstance(source, (bytes, bytearray, memoryview)):
                log = parse_log(bytes(source), "the uploaded log")
            else:
                log = parse_log(read_log_file(source), str(source))
            state, origin = log.state(views.option_types()), log.source
            try:
                log.check(self.logbook.data)
            except LogMismatch:
                if not fit:
                    raise
                state, left_out = fit_state(state, self.state, self.views, self.study_for)
        previous = self.state
        try:
            # The view on show is computed first, so that a log it cannot show is refused
            # before anything changes.
            study = self.study_for(state)
            visible = self.views[self.tabs.selected_index or 0]
            if not visible.available(study):
                visible.compute(study, visible.options_for(study, state))
            self._apply(state)
        except Exception as error:
            if self.state != previous:
                self.state = previous
                self._write_controls(previous)
                self._show_log()
            if isinstance(error, QCDataError):
                raise
            # A state from a file that these data cannot take: refused like any bad input.
            raise QCDataError(
                f"The investigation log {origin!r} does not fit these data "
                f"({type(error).__name__}: {error})."
            ) from None
        if self.state != state:
            raise QCDataError(
                f"The investigation log {origin!r} cannot be shown here (the reason is next to "
                "the view's settings)."
            )
        loaded = (
            f"Investigation log loaded from {origin}: {len(state.exclusions)} subgroup(s) left "
            f"out of the limits, {len(state.notes)} note(s)."
        )
        if left_out is not None:
            kept = f"; left out: {'; '.join(left_out)}" if left_out else ": all of it"
            loaded += f" It was made on other data. Applied what fits these data{kept}."
        # Said before what the panel update reported (which may be an error), not instead.
        self.status.value = f"<span class='qcx-ok'>{html.escape(loaded)}</span> {self.status.value}"
