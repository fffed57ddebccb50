"""The investigation log: the state of an investigation, saved with the data it was made on.

``ExplorerState`` is a frozen dataclass of plain values and options objects, so it can be
compared, hashed, written to JSON and read back. The explorer derives every view from it; a
control change makes a new state. The report prints the views of a saved state.

The log file holds the state with a description of the data it was made on
(:class:`DataSummary`): the fingerprint (``Study.fingerprint``: a hash of the analysed values
and the roles), the number of values, a hash of the values alone and the roles. A log is
applied as it is only to data with the same fingerprint; for other data :class:`LogMismatch`
says what differs (rows added at the end, a role changed) and :func:`fit_state` keeps what
still fits.

A log file is handled so that it cannot hurt: only regular files are read, at most
:data:`LOG_SIZE_LIMIT` bytes, without waiting on a pipe or a device; every part of a file is
checked for its type, and anything wrong is a QCDataError. A log is written whole or not at
all (a temporary file in the same folder, flushed to the disk, then renamed over the old one),
so a full disk leaves the old log as it was.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import hashlib
import json
import os
import stat
import tempfile
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from qcexplore.data.coding import shorten
from qcexplore.errors import QCDataError
from qcexplore.options import Options
from qcexplore.views.text import plural

LOG_FORMAT = "qcexplore investigation log"
LOG_VERSION = 3
#: The largest log read or written: a long investigation's log is tens of kilobytes.
LOG_SIZE_LIMIT = 4 * 1024 * 1024


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
        """The state from :meth:`to_dict` output; anything else is refused with a QCDataError.

        ``option_types``: the options type of each view (``views.option_types()``).
        Every field is checked for its type, so a state read from a file is as sound as one
        made by the controls.
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
        return cls(
            value=_text(data["value"], "measured value"),
            subgroup=_text(data.get("subgroup"), "subgroup", optional=True),
            time=_text(data.get("time"), "time column", optional=True),
            start=_date(data.get("start"), "start date"),
            end=_date(data.get("end"), "end date"),
            options=tuple(
                (name, _options(option_types[name], given, name)) for name, given in stored.items()
            ),
            choices=tuple(choices.items()),
            view=_text(data.get("view"), "view", optional=True),
            exclusions=_records(data.get("exclusions"), Exclusion, "exclusions"),
            notes=_records(data.get("notes"), Note, "notes"),
        )


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


#: Chart settings of a version 1 log, kept flat in its state: read into the chart options.
_V1_CHART = ("kind", "by", "limits", "sigma_level", "sigma_method", "rules", "center")


def _from_version_1(state: Mapping[str, Any]) -> dict[str, Any]:
    values = {k: v for k, v in state.items() if k not in (*_V1_CHART, "adjust")}
    chart = {k: state[k] for k in _V1_CHART if k in state}
    chart["adjust_for"] = bool(state.get("adjust", False))
    values["options"] = {"chart": chart}
    return values


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
    alone (in the study's order) and the roles. Logs of version 2 and older carry the
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
    def of(cls, study: Any) -> DataSummary:
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

    def state(self, option_types: Mapping[str, type[Options]]) -> ExplorerState:
        """The investigation state the log holds (refused when any part is not sound)."""
        return ExplorerState.from_dict(self.state_data, option_types)

    def check(self, data: DataSummary) -> None:
        """Refuse the log (:class:`LogMismatch`) when it was made on other data."""
        if self.data.fingerprint != data.fingerprint:
            raise LogMismatch(self, data.differences(self.data))


def _size(count: int) -> str:
    return f"{count / 1024:.0f} KB" if count < 1024 * 1024 else f"{count / 1024**2:.1f} MB"


def _too_big(source: str, size: int) -> QCDataError:
    return QCDataError(
        f"{source!r} is {_size(size)}: more than an investigation log can be "
        f"({_size(LOG_SIZE_LIMIT)}); open the log saved by qcexplore."
    )


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
        raise _too_big(source, len(content))
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
    if version not in (1, 2, 3) or isinstance(version, bool):
        raise QCDataError(
            f"{source!r} is a log of version {shorten(version)}; this qcexplore reads versions "
            f"1 to {LOG_VERSION}."
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
    if version == 1:
        state = _from_version_1(state)
    summary = DataSummary(fingerprint, rows, values, roles if version >= 3 else None)
    return SavedLog(source, summary, state, saved_at)


def log_content(state: ExplorerState, data: DataSummary) -> bytes:
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
            f"The investigation log would be {_size(len(content))}, more than a log may be "
            f"({_size(LOG_SIZE_LIMIT)}): shorten the notes."
        )
    return content


def read_log_file(path: str | os.PathLike, *, follow_links: bool = True) -> bytes:
    """The bytes of a log file: a regular file of at most :data:`LOG_SIZE_LIMIT` bytes.

    Opening never waits (a named pipe or a device is refused, not read), and
    ``follow_links=False`` refuses a symbolic link.

    Examples
    --------
    >>> read_log_file("/dev/zero")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: '/dev/zero' is not a regular file: ...
    """
    source = str(path)
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_CLOEXEC", 0)
    if not follow_links:
        flags |= getattr(os, "O_NOFOLLOW", 0)
    try:
        descriptor = os.open(path, flags)
    except FileNotFoundError:
        raise QCDataError(f"There is no investigation log {source!r}: check the name.") from None
    except OSError as error:
        raise QCDataError(
            f"Cannot open the investigation log {source!r} ({error.strerror or error})."
        ) from None
    chunks: list[bytes] = []
    try:
        info = os.fstat(descriptor)
        if not stat.S_ISREG(info.st_mode):
            raise QCDataError(
                f"{source!r} is not a regular file: an investigation log is a file qcexplore saved."
            )
        if info.st_size > LOG_SIZE_LIMIT:
            raise _too_big(source, info.st_size)
        left = LOG_SIZE_LIMIT + 1  # the file may grow while it is read
        while left > 0 and (chunk := os.read(descriptor, min(left, 2**20))):
            chunks.append(chunk)
            left -= len(chunk)
    finally:
        os.close(descriptor)
    content = b"".join(chunks)
    if len(content) > LOG_SIZE_LIMIT:
        raise _too_big(source, len(content))
    return content


def write_atomic(path: str | os.PathLike, content: bytes, *, replace: bool = True) -> Path:
    """Write a file whole or not at all: a temporary file in the same folder, flushed to the
    disk, then renamed to ``path``. ``replace=False`` never overwrites (FileExistsError).

    On any failure (a full disk, say) the temporary file is removed and ``path`` is as it was.
    """
    path = Path(path)
    descriptor, temporary = tempfile.mkstemp(
        prefix=f".{path.name}.", suffix=".tmp", dir=path.parent
    )
    try:
        with os.fdopen(descriptor, "wb") as handle:
            handle.write(content)
            handle.flush()
            os.fsync(handle.fileno())
        if replace:
            os.replace(temporary, path)
        else:
            _link_new(temporary, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(temporary)
        raise
    _sync_folder(path.parent)
    return path


def _link_new(temporary: str, path: Path) -> None:
    """Give the written file its name only if the name is free (atomically where links work)."""
    try:
        os.link(temporary, path)
    except FileExistsError:
        raise
    except OSError:  # no hard links on this file system (FAT, some shares): check, then rename
        if os.path.lexists(path):
            raise FileExistsError(f"{path} exists") from None
        os.replace(temporary, path)
    else:
        os.unlink(temporary)


def _sync_folder(folder: Path) -> None:
    # The rename is on the disk only once the folder is: flush it too (not possible everywhere).
    with contextlib.suppress(OSError):
        descriptor = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(descriptor)
        finally:
            os.close(descriptor)


def save_log(path: str | os.PathLike, state: ExplorerState, data: DataSummary) -> Path:
    """Write the investigation log (the state and the description of its data) to a JSON file,
    whole or not at all.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.options import ChartOptions
    >>> state = ExplorerState(value="net_g").exclude(["3"], "scale dropped")
    >>> path = save_log(Path(tempfile.mkdtemp()) / "log.json", state, DataSummary("abc"))
    >>> load_log(path, data_id="abc", option_types={"chart": ChartOptions}) == state
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
    data_id: str,
    option_types: Mapping[str, type[Options]],
    data: DataSummary | None = None,
) -> ExplorerState:
    """Read an investigation log; refuse it when it was made on other data.

    ``option_types``: the options type of each view (``views.option_types()``); ``data``: the
    summary of these data (``DataSummary.of(study)``), to say what differs. Logs of version
    1 (chart settings kept flat) are read into the chart options.

    Raises
    ------
    QCDataError
        When the file is not a log; :class:`LogMismatch` when it was made on other data.

    Examples
    --------
    >>> import tempfile
    >>> path = save_log(Path(tempfile.mkdtemp()) / "log.json", ExplorerState(value="w"),
    ...                 DataSummary("abc"))
    >>> load_log(path, data_id="other", option_types={})  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.views.log.LogMismatch: The investigation log ... was made on other data: ...
    """
    log = parse_log(read_log_file(path), str(path))
    log.check(data if data is not None else DataSummary(data_id))
    return log.state(option_types)


def fit_state(
    state: ExplorerState,
    current: ExplorerState,
    views: Iterable[Any],
    study_for: Callable[[ExplorerState], Any],
) -> tuple[ExplorerState, tuple[str, ...]]:
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
        roles = {k: getattr(current, k) for k in ("value", "subgroup", "time", "start", "end")}
        state = state.replace(**roles)
        study = study_for(state)
    for view in views:
        if view.options_type is None:
            continue
        try:
            view.options_for(study, state)
        except refused:
            left_out.append(f"its {view.title} settings")
            state = state.with_options(view.name, current.options_for(view.name, view.options_type))
    labels = set(study.levels(study.subgroup_column).astype(str))
    kept = tuple(e for e in state.exclusions if e.subgroup in labels)
    if len(kept) < len(state.exclusions):
        missing = plural(len(state.exclusions) - len(kept), "exclusion")
        left_out.append(f"{missing} of subgroups these data do not have")
    return state.replace(exclusions=kept), tuple(left_out)
