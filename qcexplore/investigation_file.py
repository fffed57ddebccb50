"""The investigation log file: an investigation saved with a description of the data it was
made on.

The file holds the :class:`~qcexplore.investigation.Investigation` with a description of the
data (:class:`DataSummary`): the fingerprint (``Study.fingerprint``: a hash of the analysed
values and the roles), the number of values, a hash of the values alone and the roles. A log is
applied as it is only to data with the same fingerprint; for other data :class:`LogMismatch`
says what differs (rows added at the end, a role changed) and :func:`fit_state` keeps what
still fits.

A log file is handled so that it cannot hurt (``qcexplore.files``): only regular files are
read, at most :data:`LOG_SIZE_LIMIT` bytes, without waiting on a pipe or a device; every part
of a file is checked for its type, and anything wrong is a QCDataError. A log is written whole
or not at all, so a full disk leaves the old log as it was.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from qcexplore.data.coding import shorten
from qcexplore.errors import QCDataError
from qcexplore.files import read_small_file, size_words, too_big, write_atomic
from qcexplore.investigation import Investigation, study_for
from qcexplore.options import Options
from qcexplore.study import Study
from qcexplore.words import plural

LOG_FORMAT = "qcexplore investigation log"
#: Version 4 keeps the specification as a role of the investigation (``spec``); version 3 kept
#: it with the capability view's options, version 2 knew no description of the data but the
#: fingerprint. Both are still read.
LOG_VERSION = 4
READ_VERSIONS = (2, 3, 4)
#: The largest log read or written: a long investigation's log is tens of kilobytes.
LOG_SIZE_LIMIT = 4 * 1024 * 1024
_WHAT = "investigation log"


# ---- the data a log was made on -----------------------------------------------------------
def _digest(values: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(values, dtype=float).tobytes()).hexdigest()[:16]


def _plain(value: Any) -> Any:
    """JSON-ready data as a file holds it (tuples as lists, other objects as text)."""
    return json.loads(json.dumps(value, default=str))


def _words(value: Any) -> str:
    if value is None or value == [] or value == {}:
        return "none"
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, list):
        return ", ".join(map(_words, value))
    if isinstance(value, Mapping):
        return ", ".join(f"{k} {_words(v)}" for k, v in value.items() if v is not None) or "none"
    return str(value)


@dataclass(frozen=True)
class DataSummary:
    """What a log was made on: the fingerprint, the number of values, a hash of the values
    alone (in the study's order) and the roles. Logs of version 2 carry the
    fingerprint only.

    Examples
    --------
    >>> from qcexplore.demo import ROLES, filling_line
    >>> from qcexplore.study import Study
    >>> frame = filling_line(days=2)[0]
    >>> then = DataSummary.of(Study(frame.iloc[:-3], **ROLES))
    >>> DataSummary.of(Study(frame, **{**ROLES, "units": "kg"})).differences(then)
    ['3 rows added at the end', 'units then g; now kg']
    """

    fingerprint: str
    rows: int | None = None
    values: str | None = None
    roles: Mapping[str, Any] | None = None
    #: The analysed values themselves (for telling rows added at the end); not saved.
    data: np.ndarray | None = field(default=None, repr=False, compare=False)

    @classmethod
    def of(cls, study: Study) -> DataSummary:
        """The summary of a Study's data."""
        values = np.ascontiguousarray(study.data[study.value].to_numpy(dtype=float))
        return cls(study.fingerprint, len(values), _digest(values), _plain(study.roles()), values)

    def differences(self, then: DataSummary) -> list[str]:
        """How these data differ from those a log was made on (``then``), in words."""
        found: list[str] = []
        if then.rows is not None and then.values is not None and self.data is not None:
            now = len(self.data)
            if then.rows < now and _digest(self.data[: then.rows]) == then.values:
                found.append(f"{plural(now - then.rows, 'row')} added at the end")
            elif then.rows != now:
                found.append(f"other values ({then.rows} rows then, {now} now)")
            elif then.values != self.values:
                found.append(f"other values (the same number of rows, {now})")
        if then.roles is not None and self.roles is not None:
            for key in dict.fromkeys([*then.roles, *self.roles]):
                before, after = then.roles.get(key), self.roles.get(key)
                if before != after:
                    found.append(f"{key} then {_words(before)}; now {_words(after)}")
        if not found:
            found.append("the data fingerprint differs (the log says no more about its data)")
        return found


class LogMismatch(QCDataError):
    """A log made on other data: what differs (``differences``) and the log (``log``), so
    that what still fits can be applied (:func:`fit_state`)."""

    def __init__(self, log: SavedLog, differences: Iterable[str]) -> None:
        self.log = log
        self.differences = tuple(differences)
        super().__init__(
            f"The investigation log {log.source!r} was made on other data: "
            f"{'; '.join(self.differences)}. Open it with the data it was made on, or let the "
            "explorer apply what still fits these data."
        )


# ---- the log file -------------------------------------------------------------------------
@dataclass(frozen=True)
class SavedLog:
    """A log file read and checked for its form; its state is checked by :meth:`state`."""

    source: str
    data: DataSummary
    state_data: Mapping[str, Any]
    saved_at: str | None = None

    def state(self, option_types: Mapping[str, type[Options]]) -> Investigation:
        """The investigation state the log holds (refused when any part is not sound)."""
        return Investigation.from_dict(self.state_data, option_types)

    def check(self, data: DataSummary) -> None:
        """Refuse the log (:class:`LogMismatch`) when it was made on other data."""
        if self.data.fingerprint != data.fingerprint:
            raise LogMismatch(self, data.differences(self.data))


def parse_log(content: bytes, source: str) -> SavedLog:
    """Read a log from its bytes (``source`` names it in messages).

    Raises
    ------
    QCDataError
        When the content is not a qcexplore investigation log.

    Examples
    --------
    >>> parse_log(bytes([255, 254]), "upload.json")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: 'upload.json' is not a qcexplore investigation log (not JSON ...
    """
    if len(content) > LOG_SIZE_LIMIT:
        raise too_big(source, len(content), LOG_SIZE_LIMIT, _WHAT)
    try:
        payload = json.loads(bytes(content).decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError) as error:
        reason = "nested too deeply" if isinstance(error, RecursionError) else type(error).__name__
        raise QCDataError(
            f"{source!r} is not a qcexplore investigation log (not JSON text: {reason})."
        ) from None
    if not isinstance(payload, dict) or payload.get("format") != LOG_FORMAT:
        raise QCDataError(f"{source!r} is not a qcexplore investigation log.")
    version = payload.get("version")
    if version not in READ_VERSIONS or isinstance(version, bool):
        raise QCDataError(
            f"{source!r} is a log of version {shorten(version)}; this qcexplore reads versions "
            f"{READ_VERSIONS[0]} to {LOG_VERSION}."
        )
    about = payload.get("data") if version >= 3 else {}
    fingerprint, roles = payload.get("fingerprint"), payload.get("roles")
    rows, values = (about.get("rows"), about.get("values")) if isinstance(about, dict) else (0, 0)
    saved_at = payload.get("saved_at")
    if not (
        isinstance(fingerprint, str)
        and (roles is None or isinstance(roles, dict))
        and (rows is None or (isinstance(rows, int) and not isinstance(rows, bool) and rows >= 0))
        and (values is None or isinstance(values, str))
        and (saved_at is None or isinstance(saved_at, str))
    ):
        raise QCDataError(f"{source!r}: the description of its data is not in the saved form.")
    state = payload.get("state")
    if not isinstance(state, Mapping):
        raise QCDataError(f"{source!r} holds no investigation state.")
    summary = DataSummary(fingerprint, rows, values, roles if version >= 3 else None)
    return SavedLog(source, summary, state, saved_at)


def log_content(state: Investigation, data: DataSummary) -> bytes:
    """The log file's bytes: the state with the description of its data (JSON)."""
    payload = {
        "format": LOG_FORMAT,
        "version": LOG_VERSION,
        "saved_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "fingerprint": data.fingerprint,
        "roles": data.roles,
        "data": {"rows": data.rows, "values": data.values},
        "state": state.to_dict(),
    }
    content = json.dumps(payload, indent=2, default=str).encode("utf-8")
    if len(content) > LOG_SIZE_LIMIT:
        raise QCDataError(
            f"The investigation log would be {size_words(len(content))}, more than a log may "
            f"be ({size_words(LOG_SIZE_LIMIT)}): shorten the notes."
        )
    return content


def read_log_file(path: str | os.PathLike, *, follow_links: bool = True) -> bytes:
    """The bytes of a log file: a regular file of at most :data:`LOG_SIZE_LIMIT` bytes, read
    without waiting on a pipe or a device (``qcexplore.files.read_small_file``)."""
    return read_small_file(path, limit=LOG_SIZE_LIMIT, what=_WHAT, follow_links=follow_links)


def save_log(path: str | os.PathLike, state: Investigation, data: DataSummary) -> Path:
    """Write the investigation log (the state and the description of its data) to a JSON file,
    whole or not at all.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.options import ChartOptions
    >>> state = Investigation(value="net_g").exclude(["3"], "scale dropped")
    >>> path = save_log(Path(tempfile.mkdtemp()) / "log.json", state, DataSummary("abc"))
    >>> load_log(path, data=DataSummary("abc"), option_types={"chart": ChartOptions}) == state
    True
    """
    try:
        return write_atomic(path, log_content(state, data))
    except OSError as error:
        raise QCDataError(
            f"Could not save the investigation log {str(path)!r} "
            f"({error.strerror or error}); a log saved there before is as it was."
        ) from None


def load_log(
    path: str | os.PathLike,
    *,
    data: DataSummary,
    option_types: Mapping[str, type[Options]],
) -> Investigation:
    """Read an investigation log; refuse it when it was made on other data.

    ``data``: the summary of these data (``DataSummary.of(study)``), to say what differs;
    ``option_types``: the options type of each view (``views.option_types()``).

    Raises
    ------
    QCDataError
        When the file is not a log; :class:`LogMismatch` when it was made on other data.

    Examples
    --------
    >>> import tempfile
    >>> path = save_log(Path(tempfile.mkdtemp()) / "log.json", Investigation(value="w"),
    ...                 DataSummary("abc"))
    >>> load_log(path, data=DataSummary("other"), option_types={})  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.investigation_file.LogMismatch: The investigation log ... was made on other data: ...
    """
    log = parse_log(read_log_file(path), str(path))
    log.check(data)
    return log.state(option_types)


def open_log(path: str | os.PathLike, study: Study, views: Iterable[Any]) -> Investigation:
    """The investigation of a log file, checked against the data's Study: refused when it was
    made on other data (:class:`LogMismatch`) or when a view cannot take its settings.

    ``views``: the registered views (``qcexplore.views.VIEWS``), whose options types read the
    log and whose settings must fit the Study the log builds (``investigation.study_for``).
    """
    option_types = {v.name: v.options_type for v in views if v.options_type is not None}
    state = load_log(path, data=DataSummary.of(study), option_types=option_types)
    applied = study_for(study, state)
    for view in views:
        view.options_for(applied, state)
    return state


def fit_state(
    state: Investigation,
    current: Investigation,
    views: Iterable[Any],
    study_for: Callable[[Investigation], Study],
) -> tuple[Investigation, tuple[str, ...]]:
    """The part of a state made on other data that fits these data, and what was left out.

    Roles and the date window that do not fit stay as they are now (``current``), as does
    each view's settings that do not; exclusions of subgroups these data do not have are
    left out; notes are kept. ``study_for`` builds the Study of a state (the explorer's).
    """
    left_out: list[str] = []
    refused = (QCDataError, ValueError, TypeError, KeyError)
    try:
        study = study_for(state)
    except refused:
        left_out.append("its roles and date window (those of now are kept)")
        roles = {
            k: getattr(current, k) for k in ("value", "subgroup", "time", "start", "end", "spec")
        }
        state = state.replace(**roles)
        study = study_for(state)
    for view in views:
        if view.options_type is None:
            continue
        try:
            view.options_for(study, state)
        except refused:
            left_out.append(f"its {view.title} settings")
            kept = view.settings(study_for(current), current)
            state = state.with_options(view.name, kept)
    labels = set(study.levels(study.subgroup_column).astype(str))
    kept = tuple(e for e in state.exclusions if e.subgroup in labels)
    if len(kept) < len(state.exclusions):
        missing = plural(len(state.exclusions) - len(kept), "exclusion")
        left_out.append(f"{missing} of subgroups these data do not have")
    return state.replace(exclusions=kept), tuple(left_out)
