"""The investigation log in the page: download and upload, the server's log folder, autosave.

A :class:`Logbook` belongs to one explorer and drives the log widgets of its ``Actions``:

- the download link always holds the log of what is on show (made in the page: no file on
  the server is named or read);
- a file uploaded from the browser is opened as a log;
- with a log folder (the served app): a saved log is opened by its name, the log is saved
  under a name (a log of that name is replaced only after the person says so), and every
  change is autosaved to this page view's own file;
- before a log replaces changes that were not saved under a name (an upload, an open, a
  start over) the person is asked first; the served page also warns before it is closed or
  reloaded then (it watches the ``qcx-unsaved`` mark of the log's status line);
- a log made on other data says what differs and offers to apply what still fits.

Its messages go to the log's status line, next to its buttons; a failed load changes nothing.
"""

from __future__ import annotations

import base64
import html
from collections.abc import Callable
from datetime import datetime
from typing import Any

from qcexplore.app.logfolder import LogExists, LogFolder, sanitise_name
from qcexplore.errors import QCDataError
from qcexplore.investigation import Investigation
from qcexplore.investigation_file import DataSummary, LogMismatch, SavedLog, log_content, parse_log
from qcexplore.words import plural


def download_link(content: bytes, name: str) -> str:
    """An HTML link that downloads ``content`` as the file ``name`` (nothing is sent to the
    server: the bytes are in the link).

    Examples
    --------
    >>> download_link(b"{}", "log.json").split("href=")[1]
    "'data:application/json;base64,e30='>Download the log</a>"
    """
    data = base64.b64encode(content).decode("ascii")
    return (
        f"<a class='qcx-log-download-link' download='{html.escape(name)}' "
        f"href='data:application/json;base64,{data}'>Download the log</a>"
    )


class Logbook:
    """The log actions of one explorer (see the module's description).

    Parameters
    ----------
    explorer : the Explorer whose state is logged (its ``state``, ``study`` and ``load``)
    actions : its ``Actions`` widgets
    """

    def __init__(self, explorer: Any, actions: Any) -> None:
        self.explorer = explorer
        self.actions = actions
        self.folder: LogFolder | None = None
        self.autosave: str | None = None
        self._data: DataSummary | None = None
        self._start: Investigation | None = None
        self._saved: Investigation | None = None
        self._pending: Callable[[], None] | None = None
        self._message = ""
        self._autosaved = ""
        self._autosave_problem = ""
        a = actions
        a.upload.observe(self._uploaded, "value")
        a.open.on_click(lambda _b: self._run(self.open_chosen))
        a.save.on_click(lambda _b: self._run(lambda: self.save_named(a.log_name.value)))
        a.start_over.on_click(lambda _b: self._run(self.start_over))
        a.confirm.on_click(lambda _b: self._run(self._go_ahead))
        a.cancel.on_click(lambda _b: self._run(self._cancel))

    @property
    def data(self) -> DataSummary:
        """What the explorer's data are, as a log records them (computed once)."""
        if self._data is None:
            self._data = DataSummary.of(self.explorer.study)
        return self._data

    @property
    def unsaved(self) -> bool:
        """Whether what is on show differs from what was last saved under a name or opened."""
        return self._saved is not None and self.explorer.state != self._saved

    def attach(self, folder: LogFolder, *, autosave: bool = True) -> None:
        """Keep logs in ``folder`` (opened and saved by name) and, with ``autosave``, write
        every change to this page view's own autosave file."""
        self.folder = folder
        self.autosave = folder.autosave_name() if autosave else None
        self.actions.folder_box.layout.display = None
        self._list()
        self._show()

    # ---- called by the explorer ----------------------------------------------------------
    def changed(self, state: Investigation) -> None:
        """A new state is on show: refresh the download link and the autosave."""
        if self._saved is None:
            self._start = self._saved = state
        try:
            content = log_content(state, self.data)
            stamp = datetime.now()
            self.actions.download.value = download_link(
                content, f"investigation-log-{stamp:%Y-%m-%d-%H%M}.json"
            )
            if (
                self.folder is not None
                and self.autosave
                and (state != self._start or self._autosaved)
            ):
                self.folder.write(self.autosave, content, replace=True)
                self._autosaved, self._autosave_problem = f"{stamp:%H:%M:%S}", ""
                self._list()
        except (QCDataError, OSError) as error:  # a full disk, say: what is on show stays
            self._autosave_problem = _error(
                f"Could not autosave: {error} Download the log to keep it."
            )
        self._show()

    def saved(self, state: Investigation) -> None:
        """``state`` was saved under a name or opened: nothing on show is unsaved now."""
        self._saved = state
        self._show()

    # ---- actions ----------------------------------------------------------------------------
    def open_file(self, path: Any) -> None:
        """Open a log file named by the server (the served app's ``--log``)."""
        self._run(lambda: self._load(path))

    def open_chosen(self) -> None:
        """Open the log chosen in the list of the log folder."""
        folder = self._folder()
        name = self.actions.saved_logs.value
        if not name:
            raise QCDataError("Choose a saved log in the list first.")
        log = parse_log(folder.read(name), name)
        self._unless_unsaved(f"Open {name}", lambda: self._load(log))

    def save_named(self, text: str) -> None:
        """Save the log in the log folder under this name (asking before replacing one)."""
        folder = self._folder()
        name = sanitise_name(text)
        state = self.explorer.state
        content = log_content(state, self.data)

        def write(replace: bool) -> None:
            folder.write(name, content, replace=replace)
            self._list(chosen=name)
            self.actions.log_name.value = name
            self._message = _ok(f"Saved as {name} in the log folder.")
            self.saved(state)

        try:
            write(replace=False)
        except LogExists:
            self._ask(f"A log named {name} is in the folder already. Replace it?", "Replace it",
                      lambda: write(replace=True))  # fmt: skip

    def start_over(self) -> None:
        """Go back to the study as it was given: no exclusions, notes or settings."""
        study = self.explorer.study
        fresh = Investigation(value=study.value, subgroup=study.subgroup, time=study.time)

        def reset() -> None:
            self.explorer.load(fresh)
            self._message = _ok("Started over.")
            self.saved(self.explorer.state)

        self._unless_unsaved("Start over", reset)

    # ---- inner workings -------------------------------------------------------------------
    def _uploaded(self, change: dict) -> None:
        files = change["new"]
        if not files:
            return
        upload = files[0]
        name = str(upload.get("name") or "the uploaded file")
        content = bytes(upload["content"])
        self.actions.upload.value = ()  # the same file can be uploaded again

        def open_upload() -> None:
            log = parse_log(content, name)
            self._unless_unsaved(f"Open {name}", lambda: self._load(log))

        self._run(open_upload)

    def _load(self, source: Any, *, fit: bool = False) -> None:
        try:
            self.explorer.load(source, fit=fit)
        except LogMismatch as mismatch:
            log = mismatch.log
            self._ask(str(mismatch), "Apply what still fits", lambda: self._load(log, fit=True))
            return
        name = source.source if isinstance(source, SavedLog) else str(source)
        self._message = _ok(f"Opened {name}.")
        self.saved(self.explorer.state)

    def _unless_unsaved(self, what: str, action: Callable[[], None]) -> None:
        if not self.unsaved:
            action()
            return
        kept = f"; the autosave {self.autosave} keeps it" if self._autosaved else ""
        self._ask(
            f"{what}? It replaces what is on show now ({self._changes()}), which was not saved "
            f"under a name{kept}.",
            "Go ahead",
            action,
        )

    def _changes(self) -> str:
        state = self.explorer.state
        settings = self._start is not None and state.options != self._start.options
        return (
            f"{plural(len(state.exclusions), 'exclusion')}, {plural(len(state.notes), 'note')}"
            f"{', other settings' if settings else ''}"
        )

    def _ask(self, question: str, answer: str, action: Callable[[], None]) -> None:
        self._pending = action
        self.actions.confirm_text.value = f"<p class='qcx-log-question'>{html.escape(question)}</p>"
        self.actions.confirm.description = answer
        self.actions.confirm_box.layout.display = None
        self._message = ""
        self._show()

    def _close_question(self) -> Callable[[], None] | None:
        action, self._pending = self._pending, None
        self.actions.confirm_box.layout.display = "none"
        self.actions.confirm_text.value = ""
        return action

    def _go_ahead(self) -> None:
        action = self._close_question()
        if action is not None:
            action()

    def _cancel(self) -> None:
        self._close_question()
        self._message = _ok("Nothing was changed.")
        self._show()

    def _folder(self) -> LogFolder:
        if self.folder is None:
            raise QCDataError("This explorer has no log folder: download the log instead.")
        return self.folder

    def _list(self, chosen: str | None = None) -> None:
        if self.folder is None:
            return
        names = self.folder.names()
        widget = self.actions.saved_logs
        keep = chosen or widget.value
        if list(widget.options) != names:
            widget.options = names
        widget.value = keep if keep in names else (names[0] if names else None)

    def _run(self, action: Callable[[], None]) -> None:
        """Run a log action; report any error next to the log's buttons (nothing changed)."""
        try:
            action()
        except QCDataError as error:
            self._message = _error(f"{error} Nothing was changed.")
        except Exception as error:  # a callback must never kill the widget
            self._message = _error(f"{type(error).__name__}: {error}. Nothing was changed.")
        self._show()

    def _show(self) -> None:
        parts = [p for p in (self._message, self._autosave_problem) if p]
        if self.autosave and self._autosaved:
            parts.append(
                f"<span class='qcx-autosaved'>Autosaved as {html.escape(self.autosave)} at "
                f"{self._autosaved}.</span>"
            )
        if self.unsaved:
            parts.append("<span class='qcx-unsaved'>Changes not saved under a name.</span>")
        self.actions.log_status.value = " ".join(parts)


def _ok(text: str) -> str:
    return f"<span class='qcx-ok'>{html.escape(text)}</span>"


def _error(text: str) -> str:
    return f"<span class='qcx-error' style='color:#b00020'>{html.escape(text)}</span>"
