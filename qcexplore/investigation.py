"""One investigation state, and the one function that builds its Study.

An :class:`Investigation` holds every choice of an investigation as plain values and options
objects: the roles (``value``, ``subgroup``, ``time``), the date window, the specification, each
view's options, what each view shows of its result, the subgroups left out of the limits and the
notes. It is frozen, so it can be compared, hashed, written to JSON and read back.

:func:`study_for` builds the Study of an investigation from the Study of the data as given (its
table and its other roles: factors, measured_by, shifts). The explorer, the report and the
command line all build Studies through it, so the report prints what the explorer showed: the
same window, specification, exclusions and options.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import pandas as pd

from qcexplore.data.coding import shorten
from qcexplore.errors import QCDataError
from qcexplore.options import ChartOptions, Options, SpecOptions
from qcexplore.study import Study


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
class Investigation:
    """Every choice of an investigation, as plain values and options objects.

    The roles (``value``, ``subgroup``, ``time``), the date window (``start``, ``end``: ISO
    dates, inclusive, or ``None``) and the specification (``spec``: ``None`` keeps the data's
    own) decide the Study (:func:`study_for`); ``options`` holds each view's options object by
    view name (views not listed use their defaults); ``choices`` what a view shows of its result
    (e.g. the factor whose levels are compared); ``view`` the view on show. The exclusions are
    kept here and nowhere else: a chart's options never carry them.

    Examples
    --------
    >>> s = Investigation(value="net_g", subgroup="round", time="taken_at")
    >>> s.with_options("chart", ChartOptions(by="crew")).options_for("chart", ChartOptions).by
    'crew'
    >>> Investigation.from_dict(s.to_dict(), {"chart": ChartOptions}) == s
    True
    """

    value: str
    subgroup: str | None = None
    time: str | None = None
    start: str | None = None
    end: str | None = None
    spec: SpecOptions | None = None
    options: tuple[tuple[str, Options], ...] = ()
    choices: tuple[tuple[str, str], ...] = ()
    view: str | None = None
    exclusions: tuple[Exclusion, ...] = ()
    notes: tuple[Note, ...] = field(default=())

    @classmethod
    def of(cls, study: Study) -> Investigation:
        """The investigation that shows a Study as it is (its roles, default options)."""
        return cls(value=study.value, subgroup=study.subgroup, time=study.time)

    def replace(self, **changes: Any) -> Investigation:
        """A copy with some fields changed."""
        return dataclasses.replace(self, **changes)

    @property
    def study_key(self) -> tuple[Any, ...]:
        """What decides the Study: the roles, the date window and the specification."""
        return (self.value, self.subgroup, self.time, self.start, self.end, self.spec)

    def options_for(self, view: str, kind: type[Options]) -> Options:
        """The options of one view (its defaults when none were set)."""
        return dict(self.options).get(view) or kind()

    def with_options(self, view: str, options: Options) -> Investigation:
        """The investigation with one view's options replaced.

        A specification is a role of the Study, so it is kept as ``spec``; exclusions need a
        reason and are made with :meth:`exclude`.
        """
        if isinstance(options, SpecOptions):
            return self.replace(spec=options)
        if isinstance(options, ChartOptions) and options.exclude:
            raise QCDataError(
                "Subgroups are left out of the limits with a reason: use exclude(labels, reason) "
                "instead of the chart's exclude option."
            )
        kept = tuple((name, o) for name, o in self.options if name != view)
        return self.replace(options=(*kept, (view, options)))

    def choice_for(self, view: str) -> str | None:
        """What the view shows of its result (None: its first choice)."""
        return dict(self.choices).get(view)

    def with_choice(self, view: str, choice: str | None) -> Investigation:
        """The investigation with one view's choice replaced."""
        kept = tuple((name, c) for name, c in self.choices if name != view)
        return self.replace(choices=kept if choice is None else (*kept, (view, choice)))

    @property
    def excluded(self) -> tuple[str, ...]:
        """Labels of the excluded subgroups, in the order they were excluded."""
        return tuple(e.subgroup for e in self.exclusions)

    def exclude(self, labels: list[str], reason: str) -> Investigation:
        """The investigation with these subgroups added to the exclusions (a reason is
        required)."""
        reason = reason.strip()
        if not reason:
            raise QCDataError(
                "Give a reason for leaving subgroups out of the limits (type it in the reason box)."
            )
        known = set(self.excluded)
        new = tuple(Exclusion(str(label), reason) for label in labels if str(label) not in known)
        return self.replace(exclusions=self.exclusions + new)

    def restore(self, labels: list[str] | None = None) -> Investigation:
        """The investigation with these subgroups (all when ``None``) back in the limits."""
        if labels is None:
            return self.replace(exclusions=())
        drop = set(labels)
        return self.replace(exclusions=tuple(e for e in self.exclusions if e.subgroup not in drop))

    def note(self, text: str, at: datetime | None = None) -> Investigation:
        """The investigation with a note added (empty text is ignored)."""
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
            "spec": None if self.spec is None else self.spec.to_dict(),
            "options": {name: options.to_dict() for name, options in self.options},
            "choices": dict(self.choices),
            "view": self.view,
            "exclusions": [dataclasses.asdict(e) for e in self.exclusions],
            "notes": [dataclasses.asdict(n) for n in self.notes],
        }

    @classmethod
    def from_dict(
        cls, data: Mapping[str, Any], option_types: Mapping[str, type[Options]]
    ) -> Investigation:
        """The investigation from :meth:`to_dict` output; anything else is refused with a
        QCDataError.

        ``option_types``: the options type of each view (``views.option_types()``). Every field
        is checked for its type, so an investigation read from a file is as sound as one made by
        the controls. A specification stored with a view's options (logs of version 3) is read
        into ``spec``.
        """
        if not isinstance(data, Mapping):
            raise QCDataError("The investigation log's state is not a table of settings.")
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(map(str, set(data) - names))
        if unknown:
            raise QCDataError(f"The investigation log has unknown settings {unknown}.")
        if "value" not in data:
            raise QCDataError("The investigation log's state names no measured value.")
        stored = data.get("options") or {}
        if not isinstance(stored, Mapping) or set(stored) - set(option_types):
            extra = (
                sorted(map(str, set(stored) - set(option_types)))
                if isinstance(stored, Mapping)
                else stored
            )
            raise QCDataError(
                "The investigation log has options of views this version does not have: "
                f"{shorten(extra)}."
            )
        choices = data.get("choices") or {}
        if not isinstance(choices, Mapping) or not all(
            isinstance(v, str) for v in choices.values()
        ):
            raise QCDataError(
                "The investigation log's choices are not view names with the choice made in each."
            )
        given = data.get("spec")
        investigation = cls(
            value=_text(data["value"], "measured value"),
            subgroup=_text(data.get("subgroup"), "subgroup", optional=True),
            time=_text(data.get("time"), "time column", optional=True),
            start=_date(data.get("start"), "start date"),
            end=_date(data.get("end"), "end date"),
            spec=None if given is None else _options(SpecOptions, given, "specification"),
            choices=tuple(choices.items()),
            view=_text(data.get("view"), "view", optional=True),
            exclusions=_records(data.get("exclusions"), Exclusion, "exclusions"),
            notes=_records(data.get("notes"), Note, "notes"),
        )
        for name, options in stored.items():
            investigation = investigation.with_options(
                name, _options(option_types[name], options, name)
            )
        return investigation


def _text(value: Any, what: str, *, optional: bool = False) -> Any:
    if value is None and optional:
        return None
    if not isinstance(value, str):
        raise QCDataError(
            f"The investigation log's {what} is {shorten(value)}: it should be text"
            f"{' or empty' if optional else ''}."
        )
    return value


def _date(value: Any, what: str) -> str | None:
    text = _text(value, what, optional=True)
    if text is not None:
        try:
            dt.date.fromisoformat(text)
        except ValueError:
            raise QCDataError(
                f"The investigation log's {what} {shorten(text)} is not a date (YYYY-MM-DD)."
            ) from None
    return text


def _options(kind: type[Options], given: Any, view: str) -> Options:
    try:
        options = kind.from_dict(given)
        hash(options)  # a cache key: nothing unhashable may hide in it
    except QCDataError as error:
        raise QCDataError(f"The investigation log's {view} settings are refused: {error}") from None
    except Exception as error:  # any other failure to rebuild them from a file is a bad file
        raise QCDataError(
            f"The investigation log's {view} settings are not in the saved form "
            f"({type(error).__name__}: {shorten(str(error))})."
        ) from None
    return options


def _records(given: Any, kind: type, what: str) -> tuple[Any, ...]:
    if given is None:
        return ()
    keys = [f.name for f in dataclasses.fields(kind)]
    if not isinstance(given, list):
        raise QCDataError(f"The investigation log's {what} are {shorten(given)}, not a list.")
    records = []
    for number, item in enumerate(given, 1):
        if not (
            isinstance(item, Mapping)
            and set(item) == set(keys)
            and all(isinstance(item[k], str) for k in keys)
        ):
            raise QCDataError(
                f"The investigation log's {what}, item {number} ({shorten(item)}), should hold "
                f"{' and '.join(keys)} as text."
            )
        records.append(kind(**{k: item[k] for k in keys}))
    return tuple(records)


def open_study(frame: Any, roles: Mapping[str, Any]) -> Study:
    """The Study of a table as given, with its roles (``Study``'s keyword arguments): where the
    command line and the served app start, before any investigation is applied."""
    return Study(frame, **roles)


def study_for(data: Study, investigation: Investigation) -> Study:
    """The Study an investigation looks at: the data's Study (its table and its factors,
    measured_by and shifts) with the investigation's roles, specification and date window.

    The data's Study itself is returned when the investigation changes none of them.

    Examples
    --------
    >>> from qcexplore.demo import ROLES, filling_line
    >>> base = Study(filling_line(days=4)[0], **ROLES)
    >>> len(study_for(base, Investigation.of(base)).subgroups)
    96
    >>> window = Investigation.of(base).replace(start="2026-09-08", end="2026-09-09")
    >>> len(study_for(base, window).subgroups)
    48
    """
    roles = data.roles()
    if (investigation.value, investigation.subgroup, investigation.time) != (
        data.value,
        data.subgroup,
        data.time,
    ):
        taken = {investigation.value, investigation.subgroup, investigation.time}
        factors = [f for f in data.factors if f not in taken]
        same_value = investigation.value == data.value
        roles.update(
            value=investigation.value,
            subgroup=investigation.subgroup,
            time=investigation.time,
            factors=factors,
            measured_by=[m for m in data.measured_by if m in factors],
            spec=roles["spec"] if same_value else None,
            units=roles["units"] if same_value else None,
        )
    if investigation.spec is not None:
        roles.update(spec=investigation.spec.limits(), units=investigation.spec.units)
    study = data if roles == data.roles() else Study(data.data, **roles)
    if investigation.start is None and investigation.end is None:
        return study
    end = None
    if investigation.end is not None:  # the end date is inclusive: up to the day's last instant
        end = pd.Timestamp(investigation.end) + pd.Timedelta(days=1) - pd.Timedelta(1, "ns")
    return study.restrict(investigation.start, end)
