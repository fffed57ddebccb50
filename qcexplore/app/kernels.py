"""Kernels of the served app: one per page view, capped, and let go when nobody uses them.

Every page view runs the app's notebook in a kernel of its own, which holds the study and
its figures (:data:`KERNEL_BYTES` and the data, see :func:`default_max_pages`). So:

- the number of pages open or being opened is capped (:class:`PageGate`): a page over the
  cap gets a plain page that says so, and no kernel;
- a kernel whose page never connected (a plain GET without a browser, a tab closed while
  loading) is shut down once it has been idle ``connect_timeout`` seconds
  (:class:`PageKernelManager`); one whose page was closed after connecting is shut down
  after the usual idle timeout (``cull_idle_timeout``); one with its page open is kept.

Kernels are not started ahead of time (no warm pool): every kernel belongs to a page, so the
cap counts exactly, and Voila's request-information endpoint for warm kernels does not exist.
"""

from __future__ import annotations

import contextlib
import contextvars
import html
import os
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from typing import Any

from jupyter_server.services.kernels.kernelmanager import AsyncMappingKernelManager
from traitlets import Float

#: Memory of one page's kernel before its data: Python, numpy, pandas, scipy, statsmodels,
#: bokeh, ipywidgets and the explorer of a small study (about 200 MB measured by the load
#: test in tests/test_serve.py; rounded up).
KERNEL_BYTES = 300 * 2**20
#: Copies of the study's data a page's kernel holds (the study, its derived tables, the
#: figures' sources), on top of KERNEL_BYTES.
DATA_COPIES = 3
#: Share of the memory free at start that the pages may take.
MEMORY_SHARE = 0.5
#: No more pages than this, however large the machine.
MAX_PAGES = 100


def available_memory() -> int:
    """Bytes of memory free for new processes now (Linux ``MemAvailable``; elsewhere the free
    pages, or 2 GiB when the system does not say).

    Examples
    --------
    >>> available_memory() > 0
    True
    """
    try:
        with open("/proc/meminfo", encoding="ascii") as meminfo:
            for line in meminfo:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, OSError, ValueError):
        return 2 * 2**30


def default_max_pages(data_bytes: int, available: int | None = None) -> int:
    """How many pages may be open at once: half the memory free now over what one page's
    kernel takes (:data:`KERNEL_BYTES` plus :data:`DATA_COPIES` copies of the data), at least
    1 and at most :data:`MAX_PAGES`.

    Examples
    --------
    >>> default_max_pages(10 * 2**20, available=8 * 2**30)  # 10 MB of data, 8 GB free
    12
    >>> default_max_pages(10 * 2**30, available=8 * 2**30)  # data larger than the memory
    1
    """
    available = available_memory() if available is None else available
    per_page = KERNEL_BYTES + DATA_COPIES * max(0, int(data_bytes))
    return max(1, min(MAX_PAGES, int(available * MEMORY_SHARE // per_page)))


#: The page request being served, so that the kernel it starts is counted for it.
_OPENING: contextvars.ContextVar[Ticket | None] = contextvars.ContextVar(
    "qcexplore_opening", default=None
)


@dataclass
class Ticket:
    """A page request let in by the gate, counted until its kernel is running (or it ends)."""

    gate: PageGate
    waiting: bool = True

    def started(self) -> None:
        """Its kernel runs: from now on it is counted as a kernel."""
        if self.waiting:
            self.waiting = False
            self.gate.opening -= 1

    def close(self) -> None:
        """The request is over (with or without a kernel)."""
        self.started()


class PageGate:
    """Lets a page request in while fewer than ``limit`` pages are open or being opened.

    ``kernels``: called for the number of kernels running now (each belongs to a page).

    Examples
    --------
    >>> gate = PageGate(limit=1, kernels=lambda: 0)
    >>> first = gate.admit()
    >>> gate.admit() is None  # the first page is still being opened
    True
    >>> first.close(); gate.admit() is not None
    True
    """

    def __init__(self, limit: int, kernels: Any) -> None:
        self.limit = limit
        self.kernels = kernels
        self.opening = 0

    def in_use(self) -> int:
        """Pages open (their kernels) and being opened (not yet with a kernel)."""
        return self.kernels() + self.opening

    def admit(self) -> Ticket | None:
        """A ticket for a new page, or None when the cap is reached."""
        if self.in_use() >= self.limit:
            return None
        self.opening += 1
        return Ticket(self)

    def full_page(self) -> str:
        """The plain page for a request over the cap."""
        return (
            "<!doctype html><html><head><meta charset='utf-8'><title>The app is full</title>"
            "</head><body style='font-family: sans-serif; margin: 3em'>"
            f"<h1>All {self.limit} places of this app are in use</h1>"
            "<p>Close the app in a tab you no longer need, or try again in a minute or two: "
            "pages that were opened but never used are closed after two minutes.</p>"
            f"<p>(The person running it can allow more pages with --max-pages; each takes "
            f"about {html.escape(_megabytes(KERNEL_BYTES))} of memory.)</p></body></html>"
        )


def _megabytes(count: int) -> str:
    return f"{count / 2**20:.0f} MB"


@contextlib.contextmanager
def opening(ticket: Ticket) -> Iterator[None]:
    """While a page request is served: the kernel it starts is counted for its ticket, and
    the ticket is closed when the request ends."""
    token = _OPENING.set(ticket)
    try:
        yield
    finally:
        _OPENING.reset(token)
        ticket.close()


class PageKernelManager(AsyncMappingKernelManager):
    """The kernel manager of the served app: counts a page's kernel for its request (the
    cap) and shuts down kernels whose page never connected after ``connect_timeout``."""

    connect_timeout = Float(
        120.0,
        config=True,
        help="Shut down a kernel whose page has not connected once it was idle this long (s).",
    )

    def __init__(self, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self._connected: set[str] = set()

    async def start_kernel(self, *args: Any, **kwargs: Any) -> str:
        kernel_id = await super().start_kernel(*args, **kwargs)
        ticket = _OPENING.get()
        if ticket is not None:
            ticket.started()
        return kernel_id

    def notify_connect(self, kernel_id: str) -> None:
        super().notify_connect(kernel_id)
        self._connected.add(kernel_id)

    async def shutdown_kernel(self, kernel_id: str, *args: Any, **kwargs: Any) -> None:
        self._connected.discard(kernel_id)
        await super().shutdown_kernel(kernel_id, *args, **kwargs)

    async def cull_kernel_if_idle(self, kernel_id: str) -> None:
        kernel = self._kernels.get(kernel_id)
        if kernel is not None and kernel_id not in self._connected and self._unused(kernel):
            self.log.warning("Shutting down kernel %s: its page never connected.", kernel_id)
            await self.shutdown_kernel(kernel_id)
            return
        await super().cull_kernel_if_idle(kernel_id)

    def _unused(self, kernel: Any) -> bool:
        last = getattr(kernel, "last_activity", None)
        if last is None or getattr(kernel, "execution_state", None) == "busy":
            return False
        return datetime.now(timezone.utc) - last > timedelta(seconds=self.connect_timeout)
