"""The explorer's widgets: built from the roles and from the views' option fields.

Every widget has a plain description and an HTML class ``qcx-...`` (stable, for the served
app and browser tests). :class:`RoleControls` holds the roles and the date window;
:class:`OptionControls` is generated from an options type's fields (``options.controls_of``),
so a new option is one field and needs no edit here. Neither computes anything.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Mapping
from typing import Any

import ipywidgets as widgets
import pandas as pd

from qcexplore.errors import QCDataError
from qcexplore.investigation import Investigation
from qcexplore.options import Control, Options, controls_of

#: Dropdown value standing for "none" (ipywidgets treats a None value as no selection).
NONE = ""

_WIDE = widgets.Layout(width="340px")
_STYLE = {"description_width": "130px"}


def styled(widget: widgets.Widget, css: str) -> widgets.Widget:
    """The widget with its HTML class added (``qcx-`` + ``css``).

    Examples
    --------
    >>> styled(widgets.Button(description="Go"), "go")._dom_classes
    ('qcx-go',)
    """
    widget.add_class(f"qcx-{css}")
    return widget


def _dropdown(description: str, css: str, options: Any, value: Any) -> widgets.Dropdown:
    return styled(
        widgets.Dropdown(
            description=description, options=options, value=value, layout=_WIDE, style=_STYLE
        ),
        css,
    )


def _button(description: str, css: str, tooltip: str) -> widgets.Button:
    return styled(
        widgets.Button(description=description, tooltip=tooltip, layout=widgets.Layout()), css
    )


def role_options(frame: pd.DataFrame) -> dict[str, list[tuple[str, str]]]:
    """Choices for the value, subgroup and time roles from a table's columns.

    Examples
    --------
    >>> f = pd.DataFrame({"w": [1.0], "lot": ["a"]})
    >>> role_options(f)["value"], role_options(f)["time"]
    ([('w', 'w')], [('none (row order)', ''), ('w', 'w')])
    """
    numeric = [c for c in frame.columns if pd.api.types.is_numeric_dtype(frame[c].dtype)]
    timed = [
        c
        for c in frame.columns
        if pd.api.types.is_datetime64_any_dtype(frame[c].dtype) or c in numeric
    ]
    return {
        "value": [(str(c), str(c)) for c in numeric if not pd.api.types.is_bool_dtype(frame[c])],
        "subgroup": [("individual values", NONE)] + [(str(c), str(c)) for c in frame.columns],
        "time": [("none (row order)", NONE)] + [(str(c), str(c)) for c in timed],
    }


class _Muted:
    """Widgets written by the program fire no user callbacks while ``muted`` is set."""

    def __init__(self) -> None:
        self.muted = False
        self._callback: Callable[[str], None] | None = None

    def observe(self, callback: Callable[[str], None]) -> None:
        """Call ``callback(field)`` when the user changes a control."""
        self._callback = callback

    def _changed(self, name: str) -> Callable[[dict], None]:
        def handler(change: dict) -> None:
            if not self.muted and self._callback is not None:
                self._callback(name)

        return handler


class RoleControls(_Muted):
    """The roles of the columns and the date window, mapped to and from the state."""

    def __init__(self, frame: pd.DataFrame, state: Investigation) -> None:
        super().__init__()
        roles = role_options(frame)
        self.value = _dropdown("Measured value", "value", roles["value"], state.value)
        self.subgroup = _dropdown("Subgroup", "subgroup", roles["subgroup"], state.subgroup or NONE)
        self.time = _dropdown("Time", "time", roles["time"], state.time or NONE)
        self.start = styled(widgets.DatePicker(description="From", style=_STYLE), "start")
        self.end = styled(widgets.DatePicker(description="To", style=_STYLE), "end")
        self.fields = {
            "value": self.value,
            "subgroup": self.subgroup,
            "time": self.time,
            "start": self.start,
            "end": self.end,
        }
        for name, widget in self.fields.items():
            widget.observe(self._changed(name), names="value")
        self.box = styled(widgets.VBox(list(self.fields.values())), "roles")

    def write(self, state: Investigation) -> None:
        """Show ``state`` in the widgets without firing callbacks."""
        self.muted = True
        try:
            self.value.value = state.value
            self.subgroup.value = state.subgroup or NONE
            self.time.value = state.time or NONE
            self.start.value = None if state.start is None else dt.date.fromisoformat(state.start)
            self.end.value = None if state.end is None else dt.date.fromisoformat(state.end)
        finally:
            self.muted = False

    def read(self) -> dict[str, Any]:
        """The state fields the widgets hold now."""
        start, end = self.start.value, self.end.value
        return {
            "value": self.value.value,
            "subgroup": self.subgroup.value or None,
            "time": self.time.value or None,
            "start": None if start is None else start.isoformat(),
            "end": None if end is None else end.isoformat(),
        }


def _option_widget(name: str, control: Control) -> widgets.Widget:
    css = control.css or name.replace("_", "-")
    if control.kind == "choice":
        options = [(words, value) for value, words in control.choices.items()]
        if control.none_label:
            options.insert(0, (control.none_label, NONE))
        return _dropdown(control.label, css, options, options[0][1] if options else None)
    if control.kind == "number":
        low, high = control.bounds or (float("-inf"), float("inf"))
        widget = widgets.BoundedFloatText(
            description=control.label, min=low, max=high, step=control.step, layout=_WIDE,
            style=_STYLE,
        )  # fmt: skip
        return styled(widget, css)
    if control.kind in ("optional_number", "text"):
        widget = widgets.Text(
            description=control.label, placeholder=control.none_label, layout=_WIDE,
            continuous_update=False, style=_STYLE,
        )  # fmt: skip
        return styled(widget, css)
    if control.kind == "switch":
        return styled(widgets.Checkbox(description=control.label, indent=False), css)
    raise ValueError(f"No widget for a control of kind {control.kind!r} (option {name}).")


class OptionControls(_Muted):
    """The widgets of one options type, one per shown field, generated from the fields."""

    def __init__(self, options_type: type[Options]) -> None:
        super().__init__()
        self.options_type = options_type
        self.controls = controls_of(options_type)
        self.widgets = {name: _option_widget(name, c) for name, c in self.controls.items()}
        for name, widget in self.widgets.items():
            widget.observe(self._changed(name), names="value")
        self.box = styled(widgets.VBox(list(self.widgets.values())), "options")

    def __getitem__(self, name: str) -> widgets.Widget:
        return self.widgets[name]

    def write(
        self,
        options: Options,
        live: Mapping[str, Mapping[Any, str]],
        inactive: Mapping[str, str],
    ) -> None:
        """Show ``options`` without firing callbacks.

        ``live``: choices that depend on the study (e.g. the factors to split by);
        ``inactive``: fields that would do nothing now, with the reason (shown in the label).
        """
        self.muted = True
        try:
            for name, widget in self.widgets.items():
                control = self.controls[name]
                if name in live:
                    offered = [(control.none_label, NONE)] if control.none_label else []
                    offered += [(words, value) for value, words in live[name].items()]
                    if list(widget.options) != offered:
                        widget.options = offered
                value = getattr(options, name)
                if control.kind == "optional_number":
                    widget.value = "" if value is None else f"{value:g}"
                elif control.kind == "text":
                    widget.value = value or ""
                elif control.kind == "switch":
                    widget.value = bool(value)
                else:
                    widget.value = NONE if value is None else value
                widget.disabled = name in inactive
                reason = inactive.get(name)
                widget.description = f"{control.label} ({reason})" if reason else control.label
        finally:
            self.muted = False

    def read(self, current: Options) -> Options:
        """The options the widgets hold now (fields without a widget kept from ``current``)."""
        values: dict[str, Any] = {}
        for name, widget in self.widgets.items():
            control = self.controls[name]
            if control.kind == "optional_number":
                text = widget.value.strip().replace(",", ".")
                if not text:
                    values[name] = None
                    continue
                try:
                    values[name] = float(text)
                except ValueError:
                    raise QCDataError(
                        f"{control.label}: {widget.value!r} is not a number; type a number, or "
                        f"leave it empty for {control.none_label or 'none'}."
                    ) from None
            elif control.kind == "text":
                values[name] = widget.value.strip() or None
            elif control.kind == "switch":
                values[name] = bool(widget.value)
            elif control.kind == "number":
                values[name] = float(widget.value)
            else:
                values[name] = None if widget.value == NONE else widget.value
        return current.replace(**values)


class Actions:
    """Widgets for selection, exclusions, notes and the investigation log."""

    def __init__(self) -> None:
        self.selection = styled(widgets.HTML(value=""), "selection-table")
        self.previous = _button("Previous rows", "previous-rows", "Show the previous page")
        self.next = _button("Next rows", "next-rows", "Show the next page")
        self.reason = styled(
            widgets.Text(
                description="Reason",
                placeholder="why leave them out of the limits",
                layout=widgets.Layout(width="420px"),
            ),
            "exclude-reason",
        )
        self.exclude = _button(
            "Exclude from limits", "exclude", "Leave the selected subgroups out of the limits"
        )
        self.restore = _button(
            "Put back", "restore", "Put the selected subgroups back into the limits"
        )
        self.restore_all = _button("Put all back", "restore-all", "Clear every exclusion")
        self.exclusions = styled(widgets.HTML(value=""), "exclusions")
        self.note = styled(
            widgets.Textarea(
                description="Note",
                placeholder="what the team saw or decided",
                layout=widgets.Layout(width="520px"),
            ),
            "note",
        )
        self.add_note = _button("Add note", "add-note", "Add the note to the investigation log")
        self.notes = styled(widgets.HTML(value=""), "notes")
        # The log goes to and from the browser (a download link, an upload) or the server's
        # log folder by name: the page never names a path on the server.
        self.download = styled(widgets.HTML(value=""), "log-download")
        self.upload = styled(
            widgets.FileUpload(
                accept=".json,application/json", multiple=False, description="Open a log file"
            ),
            "log-upload",
        )
        self.start_over = _button(
            "Start over", "log-reset", "Clear the exclusions, notes and settings"
        )
        self.saved_logs = _dropdown("Saved logs", "log-saved", [], None)
        self.open = _button("Open", "log-open", "Open the chosen log of the log folder")
        self.log_name = styled(
            widgets.Text(description="Save as", placeholder="a name for the log", style=_STYLE),
            "log-name",
        )
        self.save = _button("Save", "log-save", "Save the log in the log folder under this name")
        self.folder_box = styled(
            widgets.VBox(
                [
                    widgets.HBox([self.saved_logs, self.open]),
                    widgets.HBox([self.log_name, self.save]),
                ],
                layout=widgets.Layout(display="none"),
            ),
            "log-folder",
        )
        self.confirm_text = styled(widgets.HTML(value=""), "log-confirm-text")
        self.confirm = _button("Go ahead", "log-confirm", "Do what is asked above")
        self.cancel = _button("Cancel", "log-cancel", "Leave everything as it is")
        self.confirm_box = styled(
            widgets.VBox(
                [self.confirm_text, widgets.HBox([self.confirm, self.cancel])],
                layout=widgets.Layout(display="none"),
            ),
            "log-confirm-box",
        )
        self.log_status = styled(widgets.HTML(value=""), "log-status")
        self.selection_box = styled(
            widgets.VBox(
                [
                    self.selection,
                    widgets.HBox([self.previous, self.next]),
                    widgets.HBox([self.reason, self.exclude, self.restore, self.restore_all]),
                    self.exclusions,
                ]
            ),
            "selection",
        )
        self.log_box = styled(
            widgets.VBox(
                [
                    widgets.HBox([self.note, self.add_note]),
                    self.notes,
                    widgets.HBox([self.download, self.upload, self.start_over]),
                    self.folder_box,
                    self.confirm_box,
                    self.log_status,
                ]
            ),
            "log",
        )
