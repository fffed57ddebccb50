"""The explorer's state, held in one place: control values, exclusions and notes.

``ExplorerState`` is a frozen dataclass of plain values (strings, numbers, tuples),
so it can be compared, hashed, written to JSON and read back. The widget derives
every view from it; a control change makes a new state with ``state.replace(...)``.

The investigation log is the state saved to a JSON file together with a
fingerprint of the data it was made on (a hash of the value column and the roles),
so that loading it against other data is refused.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from qcexplore.errors import QCDataError

LOG_FORMAT = "qcexplore investigation log"
LOG_VERSION = 1


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
    """Every choice the explorer shows, as plain values.

    ``center`` is ``None`` for a centre line estimated from the data, else the
    target value. ``start`` and ``end`` are ISO dates of the date window (inclusive)
    or ``None``. ``by`` is ``None`` for no split.

    Examples
    --------
    >>> s = ExplorerState(value="net_g", subgroup="round", time="taken_at")
    >>> s.replace(by="crew").by
    'crew'
    >>> ExplorerState.from_dict(s.to_dict()) == s
    True
    """

    value: str
    subgroup: str | None = None
    time: str | None = None
    kind: str = "auto"
    by: str | None = None
    limits: str = "pooled"
    sigma_level: float = 3.0
    sigma_method: str = "within"
    rules: str = "nelson"
    center: float | None = None
    adjust: bool = False
    start: str | None = None
    end: str | None = None
    exclusions: tuple[Exclusion, ...] = ()
    notes: tuple[Note, ...] = field(default=())

    def replace(self, **changes: Any) -> ExplorerState:
        """A copy with some fields changed."""
        return dataclasses.replace(self, **changes)

    @property
    def roles_key(self) -> tuple[Any, ...]:
        """What decides the Study: the roles and the date window."""
        return (self.value, self.subgroup, self.time, self.start, self.end)

    @property
    def chart_key(self) -> tuple[Any, ...]:
        """What decides the chart: the roles key and every chart option."""
        return (
            self.roles_key,
            self.kind,
            self.by,
            self.limits,
            self.sigma_level,
            self.sigma_method,
            self.rules,
            self.center,
            self.adjust,
            self.excluded,
        )

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
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ExplorerState:
        """The state from :meth:`to_dict` output; unknown keys are refused."""
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(data) - names)
        if unknown:
            raise QCDataError(f"The investigation log has unknown settings {unknown}.")
        values = dict(data)
        values["exclusions"] = tuple(Exclusion(**e) for e in values.get("exclusions", ()))
        values["notes"] = tuple(Note(**n) for n in values.get("notes", ()))
        if values.get("sigma_level") is not None:
            values["sigma_level"] = float(values["sigma_level"])
        return cls(**values)


def fingerprint(frame: pd.DataFrame, roles: dict[str, Any]) -> str:
    """A short hash of the value column and the roles: what a log was made on.

    Examples
    --------
    >>> f = pd.DataFrame({"x": [1.0, 2.0]})
    >>> fingerprint(f, {"value": "x"}) == fingerprint(f.copy(), {"value": "x"})
    True
    """
    digest = hashlib.sha256()
    values = np.ascontiguousarray(frame[roles["value"]].to_numpy(dtype=float))
    digest.update(values.tobytes())
    digest.update(json.dumps(roles, sort_keys=True, default=str).encode())
    return digest.hexdigest()[:16]


def save_log(path: str | Path, state: ExplorerState, *, data_id: str, roles: dict) -> Path:
    """Write the investigation log (state, data fingerprint, roles) to a JSON file.

    Examples
    --------
    >>> import tempfile
    >>> state = ExplorerState(value="net_g").exclude(["3"], "scale dropped")
    >>> path = save_log(Path(tempfile.mkdtemp()) / "log.json", state, data_id="abc",
    ...                 roles={"value": "net_g"})
    >>> load_log(path, data_id="abc") == state
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


def load_log(path: str | Path, *, data_id: str) -> ExplorerState:
    """Read an investigation log; refuse it when it was made on other data.

    Raises
    ------
    QCDataError
        When the file is not a log, or its fingerprint differs from ``data_id``.

    Examples
    --------
    >>> import tempfile
    >>> path = save_log(Path(tempfile.mkdtemp()) / "log.json", ExplorerState(value="w"),
    ...                 data_id="abc", roles={"value": "w"})
    >>> load_log(path, data_id="other")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: The investigation log ... was made on other data ...
    """
    path = Path(path)
    try:
        payload = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as error:
        raise QCDataError(f"Cannot read the investigation log {str(path)!r}: {error}.") from None
    if not isinstance(payload, dict) or payload.get("format") != LOG_FORMAT:
        raise QCDataError(f"{str(path)!r} is not a qcexplore investigation log.")
    if payload.get("fingerprint") != data_id:
        raise QCDataError(
            f"The investigation log {str(path)!r} was made on other data "
            f"(fingerprint {payload.get('fingerprint')}, these data {data_id}; roles "
            f"{payload.get('roles')}); load it with the data and roles it was saved with."
        )
    return ExplorerState.from_dict(payload["state"])


def chart_arguments(state: ExplorerState, study: Any) -> dict[str, Any]:
    """The arguments of ``Study.chart`` that a state stands for.

    Excluded subgroups are stored by their text label; labels that are not in the
    study (for example outside the date window) are left out.

    Examples
    --------
    >>> from qcexplore.demo import filling_line
    >>> from qcexplore.study import Study
    >>> s = Study(filling_line(days=2)[0], value="net_g", subgroup="round")
    >>> chart_arguments(ExplorerState(value="net_g", subgroup="round"), s)["limits"]
    'pooled'
    """
    exclude: tuple[Any, ...] = ()
    if state.exclusions:
        categories = study.frame[study.subgroup_column].cat.categories
        position = pd.Index(categories.astype(str)).get_indexer(list(state.excluded))
        exclude = tuple(categories[i] for i in position if i >= 0)
    return {
        "kind": state.kind,
        "by": state.by,
        "limits": state.limits if state.by is not None else "pooled",
        "sigma_level": state.sigma_level,
        "sigma_method": state.sigma_method,
        "center": state.center,
        "rules": state.rules,
        "exclude": exclude,
        "adjust_for": True if state.adjust else None,
    }
