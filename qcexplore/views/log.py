"""The investigation log: the state of an investigation, saved with the data it was made on.

``ExplorerState`` is a frozen dataclass of plain values and options objects, so it can be
compared, hashed, written to JSON and read back. The explorer derives every view from it; a
control change makes a new state. The report prints the views of a saved state.

The log is the state saved to a JSON file together with a fingerprint of the data it was made
on (``Study.fingerprint``: a hash of the analysed values and the roles), so that loading it
against other data is refused.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from qcexplore.errors import QCDataError
from qcexplore.options import Options

LOG_FORMAT = "qcexplore investigation log"
LOG_VERSION = 2


@dataclass(frozen=True)
class Exclusion:
    """A subgroup left out of the limit estimate, and why (the subgroup's text label)."""

    subgroup: str
    reason: str


@dataclass(frozen=True)
class Note:
    """A free-text note of the investigation, with the time it was written (ISO 8601)."""

    text: str
    at: str


@dataclass(frozen=True)
class ExplorerState:
    """Every choice of an investigation, as plain values and options objects.

    The roles (``value``, ``subgroup``, ``time``) and the date window (``start``, ``end``:
    ISO dates, inclusive, or ``None``) decide the Study; ``options`` holds each view's
    options object by view name (views not listed use their defaults); ``choices`` holds
    what a view shows of its result (e.g. the factor whose levels are compared), by view name;
    ``view`` is the view on show.

    Examples
    --------
    >>> from qcexplore.options import ChartOptions
    >>> s = ExplorerState(value="net_g", subgroup="round", time="taken_at")
    >>> s.with_options("chart", ChartOptions(by="crew")).options_for("chart", ChartOptions).by
    'crew'
    >>> ExplorerState.from_dict(s.to_dict(), {"chart": ChartOptions}) == s
    True
    """

    value: str
    subgroup: str | None = None
    time: str | None = None
    start: str | None = None
    end: str | None = None
    options: tuple[tuple[str, Options], ...] = ()
    choices: tuple[tuple[str, str], ...] = ()
    view: str | None = None
    exclusions: tuple[Exclusion, ...] = ()
    notes: tuple[Note, ...] = field(default=())

    def replace(self, **changes: Any) -> ExplorerState:
        """A copy with some fields changed."""
        return dataclasses.replace(self, **changes)

    @property
    def roles_key(self) -> tuple[Any, ...]:
        """What decides the Study: the roles and the date window."""
        return (self.value, self.subgroup, self.time, self.start, self.end)

    def options_for(self, view: str, kind: type[Options]) -> Options:
        """The options of one view (its defaults when none were set)."""
        return dict(self.options).get(view) or kind()

    def with_options(self, view: str, options: Options) -> ExplorerState:
        """The state with one view's options replaced."""
        kept = tuple((name, o) for name, o in self.options if name != view)
        return self.replace(options=(*kept, (view, options)))

    def choice_for(self, view: str) -> str | None:
        """What the view shows of its result (None: its first choice)."""
        return dict(self.choices).get(view)

    def with_choice(self, view: str, choice: str | None) -> ExplorerState:
        """The state with one view's choice replaced."""
        kept = tuple((name, c) for name, c in self.choices if name != view)
        return self.replace(choices=kept if choice is None else (*kept, (view, choice)))

    @property
    def excluded(self) -> tuple[str, ...]:
        """Labels of the excluded subgroups, in the order they were excluded."""
        return tuple(e.subgroup for e in self.exclusions)

    def exclude(self, labels: list[str], reason: str) -> ExplorerState:
        """The state with these subgroups added to the exclusions (a reason is required)."""
        reason = reason.strip()
        if not reason:
            raise QCDataError(
                "Give a reason for leaving subgroups out of the limits (type it in the reason box)."
            )
        known = set(self.excluded)
        new = tuple(Exclusion(label, reason) for label in labels if label not in known)
        return self.replace(exclusions=self.exclusions + new)

    def restore(self, labels: list[str] | None = None) -> ExplorerState:
        """The state with these subgroups (all when ``None``) back in the limits."""
        if labels is None:
            return self.replace(exclusions=())
        drop = set(labels)
        return self.replace(exclusions=tuple(e for e in self.exclusions if e.subgroup not in drop))

    def note(self, text: str, at: datetime | None = None) -> ExplorerState:
        """The state with a note added (empty text is ignored)."""
        text = text.strip()
        if not text:
            return self
        stamp = (at or datetime.now(timezone.utc)).isoformat(timespec="seconds")
        return self.replace(notes=self.notes + (Note(text, stamp),))

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready data."""
        return {
            "value": self.value,
            "subgroup": self.subgroup,
            "time": self.time,
            "start": self.start,
            "end": self.end,
            "options": {name: options.to_dict() for name, options in self.options},
            "choices": dict(self.choices),
            "view": self.view,
            "exclusions": [dataclasses.asdict(e) for e in self.exclusions],
            "notes": [dataclasses.asdict(n) for n in self.notes],
        }

    @classmethod
    def from_dict(
        cls, data: Mapping[str, Any], option_types: Mapping[str, type[Options]]
    ) -> ExplorerState:
        """The state from :meth:`to_dict` output; unknown settings are refused.

        ``option_types``: the options type of each view (``views.option_types()``).
        """
        if not isinstance(data, Mapping):
            raise QCDataError("The investigation log's state is not a table of settings.")
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(map(str, set(data) - names))
        if unknown:
            raise QCDataError(f"The investigation log has unknown settings {unknown}.")
        values = dict(data)
        stored = values.get("options") or {}
        if not isinstance(stored, Mapping) or set(stored) - set(option_types):
            raise QCDataError(
                "The investigation log has options of views this version does not have: "
                f"{sorted(map(str, set(stored) - set(option_types)))}."
            )
        values["options"] = tuple(
            (name, option_types[name].from_dict(options)) for name, options in stored.items()
        )
        values["choices"] = tuple(dict(values.get("choices") or {}).items())
        try:
            values["exclusions"] = tuple(Exclusion(**e) for e in values.get("exclusions", ()))
            values["notes"] = tuple(Note(**n) for n in values.get("notes", ()))
        except TypeError:
            raise QCDataError(
                "The investigation log's exclusions or notes are not in the saved form."
            ) from None
        return cls(**values)


#: Chart settings of a version 1 log, kept flat in its state: read into the chart options.
_V1_CHART = ("kind", "by", "limits", "sigma_level", "sigma_method", "rules", "center")


def _from_version_1(state: Mapping[str, Any]) -> dict[str, Any]:
    values = {k: v for k, v in state.items() if k not in (*_V1_CHART, "adjust")}
    chart = {k: state[k] for k in _V1_CHART if k in state}
    chart["adjust_for"] = bool(state.get("adjust", False))
    values["options"] = {"chart": chart}
    return values


def save_log(path: str | Path, state: ExplorerState, *, data_id: str, roles: dict) -> Path:
    """Write the investigation log (state, data fingerprint, roles) to a JSON file.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.options import ChartOptions
    >>> state = ExplorerState(value="net_g").exclude(["3"], "scale dropped")
    >>> path = save_log(Path(tempfile.mkdtemp()) / "log.json", state, data_id="abc",
    ...                 roles={"value": "net_g"})
    >>> load_log(path, data_id="abc", option_types={"chart": ChartOptions}) == state
    True
    """
    path = Path(path)
    payload = {
        "format": LOG_FORMAT,
        "version": LOG_VERSION,
        "saved_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "fingerprint": data_id,
        "roles": roles,
        "state": state.to_dict(),
    }
    path.write_text(json.dumps(payload, indent=2, default=str), encoding="utf-8")
    return path


def load_log(
    path: str | Path, *, data_id: str, option_types: Mapping[str, type[Options]]
) -> ExplorerState:
    """Read an investigation log; refuse it when it was made on other data.

    ``option_types``: the options type of each view (``views.option_types()``). Logs of
    version 1 (chart settings kept flat) are read into the chart options.

    Raises
    ------
    QCDataError
        When the file is not a log, or its fingerprint differs from ``data_id``.

    Examples
    --------
    >>> import tempfile
    >>> path = save_log(Path(tempfile.mkdtemp()) / "log.json", ExplorerState(value="w"),
    ...                 data_id="abc", roles={"value": "w"})
    >>> load_log(path, data_id="other", option_types={})  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: The investigation log ... was made on other data ...
    """
    path = Path(path)
    try:
        payload = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, RecursionError) as error:
        raise QCDataError(f"Cannot read the investigation log {str(path)!r}: {error}.") from None
    if not isinstance(payload, dict) or payload.get("format") != LOG_FORMAT:
        raise QCDataError(f"{str(path)!r} is not a qcexplore investigation log.")
    if payload.get("fingerprint") != data_id:
        raise QCDataError(
            f"The investigation log {str(path)!r} was made on other data "
            f"(fingerprint {payload.get('fingerprint')}, these data {data_id}; roles "
            f"{payload.get('roles')}); load it with the data and roles it was saved with."
        )
    state = payload.get("state")
    if payload.get("version") == 1 and isinstance(state, Mapping):
        state = _from_version_1(state)
    return ExplorerState.from_dict(state, option_types)
