"""Files that cannot hurt: small regular files read without waiting, files written whole or not
at all.

A file someone names (an investigation log, an upload kept on the server) is read only when it
is a regular file of bounded size, opened without waiting on a pipe or a device. A file the
package writes (a log, a report) goes to a temporary file in the same folder, is flushed to the
disk and then renamed over the old one, so a full disk or a kill mid-write leaves the old file as
it was.
"""

from __future__ import annotations

import contextlib
import os
import stat
import tempfile
from pathlib import Path

from qcexplore.errors import QCDataError


def size_words(count: int) -> str:
    """A file size for people (KB below a megabyte, else MB)."""
    return f"{count / 1024:.0f} KB" if count < 1024 * 1024 else f"{count / 1024**2:.1f} MB"


def read_small_file(
    path: str | os.PathLike, *, limit: int, what: str, follow_links: bool = True
) -> bytes:
    """The bytes of a regular file of at most ``limit`` bytes; ``what`` names it in messages
    ("investigation log").

    Opening never waits (a named pipe or a device is refused, not read), and
    ``follow_links=False`` refuses a symbolic link.

    Examples
    --------
    >>> read_small_file("/dev/zero", limit=10, what="log")  # doctest: +ELLIPSIS
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
        raise QCDataError(f"There is no {what} {source!r}: check the name.") from None
    except OSError as error:
        raise QCDataError(
            f"Cannot open the {what} {source!r} ({error.strerror or error})."
        ) from None
    chunks: list[bytes] = []
    try:
        info = os.fstat(descriptor)
        if not stat.S_ISREG(info.st_mode):
            raise QCDataError(f"{source!r} is not a regular file: give the {what} as a file.")
        if info.st_size > limit:
            raise too_big(source, info.st_size, limit, what)
        left = limit + 1  # the file may grow while it is read
        while left > 0 and (chunk := os.read(descriptor, min(left, 2**20))):
            chunks.append(chunk)
            left -= len(chunk)
    finally:
        os.close(descriptor)
    content = b"".join(chunks)
    if len(content) > limit:
        raise too_big(source, len(content), limit, what)
    return content


def too_big(source: str, size: int, limit: int, what: str) -> QCDataError:
    """The refusal of a file larger than it may be."""
    return QCDataError(
        f"{source!r} is {size_words(size)}: more than a {what} can be ({size_words(limit)})."
    )


def write_atomic(path: str | os.PathLike, content: bytes, *, replace: bool = True) -> Path:
    """Write a file whole or not at all: a temporary file in the same folder, flushed to the
    disk, then renamed to ``path``. ``replace=False`` never overwrites (FileExistsError).

    On any failure (a full disk, say) the temporary file is removed and ``path`` is as it was.

    Examples
    --------
    >>> import tempfile
    >>> folder = Path(tempfile.mkdtemp())
    >>> write_atomic(folder / "a.txt", b"one").read_bytes()
    b'one'
    >>> sorted(p.name for p in folder.iterdir())
    ['a.txt']
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
