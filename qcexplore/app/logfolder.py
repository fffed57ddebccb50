"""The served app's log folder: investigation logs kept on the server under plain names.

The folder is fixed when the server starts; a page names a log, never a path. Names are
sanitised to letters, digits, spaces, dots, dashes and underscores (no separators, no hidden
names) and end in ``.json``. Only regular files are listed and read (no links, pipes or
devices), at most ``LOG_SIZE_LIMIT`` bytes; a write never replaces a log unless asked to
(the page asks the person first) and is atomic (``files.write_atomic``). Each page view
autosaves to a name of its own (:meth:`LogFolder.autosave_name`), so that viewers never write
over each other's work and a reloaded page can open what the last one did.
"""

from __future__ import annotations

import os
import re
import secrets
import stat
from datetime import datetime
from pathlib import Path

from qcexplore.errors import QCDataError
from qcexplore.files import write_atomic
from qcexplore.investigation_file import read_log_file

#: Log names are at most this long (without ``.json``).
NAME_LENGTH = 80
#: Autosaves are named with this prefix, the time the page was opened and a random part.
AUTOSAVE_PREFIX = "autosave-"
_UNSAFE = re.compile(r"[^A-Za-z0-9 ._-]+")


def sanitise_name(text: str) -> str:
    """A log name from what someone typed: safe characters only, ``.json`` at the end.

    Raises
    ------
    QCDataError
        When nothing usable is left.

    Examples
    --------
    >>> sanitise_name("../../etc/passwd"), sanitise_name("Line 3 / week 12")
    ('etc-passwd.json', 'Line 3 - week 12.json')
    >>> sanitise_name(".hidden.json"), sanitise_name("C:\\\\logs\\\\crew B.JSON")
    ('hidden.json', 'C-logs-crew B.json')
    """
    stem = text.strip()
    if stem.lower().endswith(".json"):
        stem = stem[: -len(".json")]
    stem = _UNSAFE.sub("-", stem)
    stem = re.sub(r"-{2,}", "-", stem).strip(" .-")[:NAME_LENGTH].strip(" .-")
    if not stem:
        raise QCDataError(
            f"{text!r} is no name for a log: type a name of letters and digits, e.g. "
            "line-3-week-12."
        )
    return f"{stem}.json"


class LogFolder:
    """The folder of investigation logs of one served app (created when missing).

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.investigation import Investigation
    >>> from qcexplore.investigation_file import DataSummary, log_content
    >>> folder = LogFolder(tempfile.mkdtemp())
    >>> content = log_content(Investigation(value="w"), DataSummary("abc"))
    >>> folder.write("week 12", content).name
    'week 12.json'
    >>> folder.names(), folder.read("week 12.json") == content
    (['week 12.json'], True)
    >>> folder.write("week 12", content)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.app.logfolder.LogExists: A log named 'week 12.json' exists already: ...
    """

    def __init__(self, root: str | os.PathLike) -> None:
        root = Path(root).expanduser()
        try:
            root.mkdir(mode=0o700, parents=True, exist_ok=True)
        except OSError as error:
            raise QCDataError(
                f"Cannot make the log folder {str(root)!r} ({error.strerror}): give another "
                "--log-folder."
            ) from None
        if not root.is_dir():
            raise QCDataError(f"The log folder {str(root)!r} is not a folder: give another one.")
        if not os.access(root, os.W_OK | os.X_OK):
            raise QCDataError(
                f"The log folder {str(root)!r} cannot be written to: give another --log-folder."
            )
        self.root = root.resolve()

    def path_of(self, name: str) -> Path:
        """Where the log of this (sanitised) name is kept."""
        return self.root / sanitise_name(name)

    def names(self) -> list[str]:
        """The logs in the folder (regular files with a log name), newest first."""
        found = []
        with os.scandir(self.root) as entries:
            for entry in entries:
                if not entry.name.endswith(".json") or _safe(entry.name) != entry.name:
                    continue
                info = entry.stat(follow_symlinks=False)
                if stat.S_ISREG(info.st_mode):
                    found.append((info.st_mtime, entry.name))
        return [name for _, name in sorted(found, reverse=True)]

    def read(self, name: str) -> bytes:
        """The bytes of a log of the folder (a regular file, not a link, size-capped)."""
        return read_log_file(self.path_of(name), follow_links=False)

    def write(self, name: str, content: bytes, *, replace: bool = False) -> Path:
        """Save a log under this name, whole or not at all; an existing log is replaced only
        with ``replace=True`` (:class:`LogExists` otherwise)."""
        path = self.path_of(name)
        if replace and path.is_symlink():
            raise QCDataError(
                f"{path.name!r} in the log folder is a link, not a log: not replaced."
            )
        try:
            return write_atomic(path, content, replace=replace)
        except FileExistsError:
            raise LogExists(path.name) from None
        except OSError as error:
            raise QCDataError(
                f"Could not save {path.name!r} in the log folder ({error.strerror or error}); "
                "a log saved there before is as it was."
            ) from None

    @staticmethod
    def autosave_name(at: datetime | None = None) -> str:
        """A new autosave name: the time and a random part, so page views never share one."""
        stamp = (at or datetime.now()).strftime("%Y-%m-%d-%H%M%S")
        return f"{AUTOSAVE_PREFIX}{stamp}-{secrets.token_hex(3)}.json"


class LogExists(QCDataError):
    """A log of this name is in the folder: replacing it needs the person's go-ahead."""

    def __init__(self, name: str) -> None:
        self.name = name
        super().__init__(
            f"A log named {name!r} exists already: replace it, or choose another name."
        )


def _safe(name: str) -> str:
    try:
        return sanitise_name(name)
    except QCDataError:
        return ""
