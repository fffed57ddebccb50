"""The explorer's widgets: one place that builds them, names them and reads them.

Every widget has a plain description and an HTML class ``qcx-...`` (stable, for
the served app and browser tests). :class:`Settings` maps the analysis widgets to
the fields of :class:`~qcexplore.app.state.ExplorerState` and back; it never
computes anything.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from typing import Any

import ipywidgets as widgets
import pandas as pd

from qcexplore.app.state import ExplorerState
from qcexplore.errors import QCDataError

#: Dropdown value standing for "none" (ipywidgets treats a None value as no selection).
NONE = ""

KIND_OPTIONS = (
    ("automatic (by subgroup size)", "auto"),
    ("means with ranges", "xbar_r"),
    ("means with standard deviations", "xbar_s"),
    ("single values with moving ranges", "imr"),
    ("EWMA of the means", "ewma"),
    ("CUSUM of the means", "cusum"),
)
LIMIT_OPTIONS = (("one set for all strata", "pooled"), ("separate for each stratum", "per_stratum"))
SIGMA_OPTIONS = (
    ("within subgroups", "within"),
    ("between subgroup means", "between_means"),
    ("overall (for comparison)", "overall"),
)
RULE_OPTIONS = (("Nelson (8 tests)", "nelson"), ("Western Electric (4 tests)", "western_electric"))
CENTER_OPTIONS = (("estimated from the data", "estimated"), ("a target value", "target"))

_WIDE = widgets.Layout(width="300px")
_STYLE = {"description_width": "120px"}


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


class Settings:
    """The analysis controls, mapped to and from :class:`ExplorerState` fields.

    ``write(state, split_choices)`` shows a state without firing callbacks;
    ``read()`` returns the state fields the widgets hold; ``observe(callback)``
    calls ``callback(field)`` when the user changes one.
    """

    def __init__(self, frame: pd.DataFrame, state: ExplorerState) -> None:
        roles = role_options(frame)
        self.value = _dropdown("Measured value", "value", roles["value"], state.value)
        self.subgroup = _dropdown("Subgroup", "subgroup", roles["subgroup"], state.subgroup or NONE)
        self.time = _dropdown("Time", "time", roles["time"], state.time or NONE)
        self.kind = _dropdown("Chart", "kind", KIND_OPTIONS, state.kind)
        self.by = _dropdown("Split by", "split-by", [("no split", NONE)], NONE)
        self.limits = _dropdown("Limits", "limits", LIMIT_OPTIONS, state.limits)
        self.sigma_level = styled(
            widgets.BoundedFloatText(
                description="Limits at ± sigma",
                value=state.sigma_level,
                min=1.0,
                max=6.0,
                step=0.5,
                layout=_WIDE,
                style=_STYLE,
            ),
            "sigma-level",
        )
        self.sigma_method = _dropdown("Sigma from", "sigma-method", SIGMA_OPTIONS, "within")
        self.rules = _dropdown("Run tests", "rules", RULE_OPTIONS, state.rules)
        self.center_mode = _dropdown("Centre line", "center", CENTER_OPTIONS, "estimated")
        self.target = styled(
            widgets.Text(
                description="Target",
                placeholder="type the target value",
                layout=_WIDE,
                continuous_update=False,
                style=_STYLE,
            ),
            "target",
        )
        self.adjust = styled(
            widgets.Checkbox(description="Remove the sampling offsets", value=False, indent=False),
            "adjust",
        )
        self.start = styled(widgets.DatePicker(description="From", style=_STYLE), "start")
        self.end = styled(widgets.DatePicker(description="To", style=_STYLE), "end")
        self._muted = False
        self._callback: Callable[[str], None] | None = None
        self._fields = {
            "value": self.value,
            "subgroup": self.subgroup,
            "time": self.time,
            "kind": self.kind,
            "by": self.by,
            "limits": self.limits,
            "sigma_level": self.sigma_level,
            "sigma_method": self.sigma_method,
            "rules": self.rules,
            "center": self.center_mode,
            "target": self.target,
            "adjust": self.adjust,
            "start": self.start,
            "end": self.end,
        }
        for name, widget in self._fields.items():
            widget.observe(self._changed(name), names="value")
        self.box = styled(
            widgets.HBox(
                [
                    widgets.VBox([self.value, self.subgroup, self.time, self.start, self.end]),
                    widgets.VBox([self.kind, self.by, self.limits, self.rules, self.adjust]),
                    widgets.VBox(
                        [self.sigma_level, self.sigma_method, self.center_mode, self.target]
                    ),
                ]
            ),
            "settings",
        )

    def _changed(self, name: str) -> Callable[[dict], None]:
        def handler(change: dict) -> None:
            if not self._muted and self._callback is not None:
                self._callback(name)

        return handler

    def observe(self, callback: Callable[[str], None]) -> None:
        """Call ``callback(field)`` when the user changes a control."""
        self._callback = callback

    def write(self, state: ExplorerState, split_choices: tuple[str, ...], adjustable: str) -> None:
        """Show ``state`` in the widgets without firing callbacks.

        ``split_choices``: the factors the current study can split by;
        ``adjustable``: the measured_by factors in words (empty: the offset switch is off).
        """
        self._muted = True
        try:
            options = [("no split", NONE)] + [(f, f) for f in split_choices]
            if list(self.by.options) != options:
                self.by.options = options
            self.by.value = state.by if state.by in split_choices else NONE
            self.value.value = state.value
            self.subgroup.value = state.subgroup or NONE
            self.time.value = state.time or NONE
            self.kind.value = state.kind
            self.limits.value = state.limits
            # Limits per stratum need strata: without a split the choice would do nothing.
            self.limits.disabled = self.by.value == NONE
            self.sigma_level.value = state.sigma_level
            self.sigma_method.value = state.sigma_method
            self.rules.value = state.rules
            self.center_mode.value = "estimated" if state.center is None else "target"
            if state.center is not None:
                self.target.value = f"{state.center:g}"
            self.adjust.value = state.adjust
            self.adjust.disabled = not adjustable
            self.adjust.description = (
                f"Remove the sampling offsets ({adjustable})"
                if adjustable
                else "Remove the sampling offsets (no measured_by factor)"
            )
            self.start.value = None if state.start is None else dt.date.fromisoformat(state.start)
            self.end.value = None if state.end is None else dt.date.fromisoformat(state.end)
        finally:
            self._muted = False

    def read(self) -> dict[str, Any]:
        """The state fields the widgets hold now."""
        center = None
        if self.center_mode.value == "target":
            text = self.target.value.strip().replace(",", ".")
            try:
                center = float(text)
            except ValueError:
                raise QCDataError(
                    f"Target {self.target.value!r} is not a number: type the target value "
                    "for the centre line, or choose 'estimated from the data'."
                ) from None
        start, end = self.start.value, self.end.value
        return {
            "value": self.value.value,
            "subgroup": self.subgroup.value or None,
            "time": self.time.value or None,
            "kind": self.kind.value,
            "by": self.by.value or None,
            "limits": self.limits.value,
            "sigma_level": float(self.sigma_level.value),
            "sigma_method": self.sigma_method.value,
            "rules": self.rules.value,
            "center": center,
            "adjust": bool(self.adjust.value),
            "start": None if start is None else start.isoformat(),
            "end": None if end is None else end.isoformat(),
        }


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
        self.path = styled(
            widgets.Text(
                description="Log file",
                value="investigation-log.json",
                layout=widgets.Layout(width="420px"),
            ),
            "log-path",
        )
        self.save = _button("Save log", "save-log", "Write exclusions, notes and settings")
        self.load = _button("Load log", "load-log", "Read a saved investigation log")
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
                    widgets.HBox([self.path, self.save, self.load]),
                ]
            ),
            "log",
        )
