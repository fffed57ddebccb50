"""The Voila server of the served app, made fit for a workshop room.

:class:`AppServer` is Voila with

- every request behind the Host and Origin checks of :mod:`qcexplore.app.guard`;
- TLS when a certificate is given;
- the page behind the page cap (:class:`~qcexplore.app.kernels.PageGate`: a plain page when it
  is reached) and the kernels kept by :class:`~qcexplore.app.kernels.PageKernelManager`;
- the page template without the icon CSS that Voila's lab template asks a CDN for (the
  explorer shows no icons, and no request may leave the machine);
- no file of the app folder served, and no configuration file read from the working folder.

Voila is imported here only, so the served notebook's kernel does not load the server.
"""

from __future__ import annotations

import ssl
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import tornado.web
from tornado.httpserver import HTTPServer
from tornado.ioloop import IOLoop
from tornado.web import GZipContentEncoding
from traitlets.config import Config
from voila.app import Voila
from voila.tornado.handler import TornadoVoilaHandler

from qcexplore.app.guard import Guard, HostPolicy
from qcexplore.app.kernels import PageGate, opening

#: The page template: Voila's lab template without its lines that load from another server.
TEMPLATE = """{%- extends 'lab/index.html.j2' -%}
{#- qcexplore: the lab template's icon CSS comes from a CDN; left out (no icons are shown,
    and the page asks nothing of any other server). -#}
{%- block notebook_css -%}
{%- for line in super().split('\\n') if 'href="http' not in line and 'src="http' not in line -%}
{{ line }}
{% endfor -%}
{%- endblock notebook_css -%}
"""


def write_template(folder: Path) -> Path:
    """Write the page template into ``folder`` (made if missing); returns the folder."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "index.html.j2").write_text(TEMPLATE, encoding="utf-8")
    return folder


@dataclass(frozen=True)
class ServerSetup:
    """What the served app adds to Voila: the request checks, TLS, the page cap, the template
    folder, compression (on a network) and what to do once the port listens."""

    policy: HostPolicy
    max_pages: int
    template: Path
    tls: ssl.SSLContext | None = None
    compress: bool = False
    on_listen: Callable[[], None] = lambda: None


def voila_config(
    *,
    host: str,
    port: int,
    root: Path,
    token: str | None,
    idle_timeout: float,
    connect_timeout: float,
) -> Config:
    """The Voila configuration of the served app (no command line: nothing shows in ``ps``).

    Examples
    --------
    >>> c = voila_config(host="127.0.0.1", port=8900, root=Path("/x"), token=None,
    ...                  idle_timeout=900, connect_timeout=120)
    >>> c.MappingKernelManager.cull_idle_timeout, c.PageKernelManager.connect_timeout
    (900, 120.0)
    """
    config = Config()
    config.Voila.ip = host
    config.Voila.port = port
    config.Voila.port_retries = 0
    config.Voila.open_browser = False
    config.Voila.root_dir = str(root)
    config.Voila.log_level = "ERROR"
    config.Voila.config_file_paths = []  # a voila.json in the working folder changes nothing
    if token:
        config.Voila.token = token
    config.VoilaConfiguration.theme = "light"
    config.VoilaConfiguration.file_allowlist = []  # the app folder holds the study: serve none
    config.VoilaConfiguration.preheat_kernel = False  # every kernel belongs to a page
    config.VoilaConfiguration.multi_kernel_manager_class = "qcexplore.app.kernels.PageKernelManager"
    config.MappingKernelManager.cull_idle_timeout = int(idle_timeout)
    interval = max(1, min(10, int(min(idle_timeout, connect_timeout)) // 2))
    config.MappingKernelManager.cull_interval = interval
    config.PageKernelManager.connect_timeout = float(connect_timeout)
    # Kernels talk to the server over local sockets: no TCP ports, nothing in plain text.
    config.KernelManager.transport = "ipc"
    return config


class PageHandler(TornadoVoilaHandler):
    """The app's page, opened while the page cap allows (a plain page says when it does not)."""

    @tornado.web.authenticated
    async def get(self, path: str | None = None) -> None:
        gate: PageGate = self.settings["qcexplore_gate"]
        if path:  # not the page: Voila sends these to its file handler
            await super().get(path)
            return
        ticket = gate.admit()
        if ticket is None:
            self.set_status(503)
            self.set_header("Retry-After", "60")
            self.set_header("Content-Type", "text/html; charset=utf-8")
            self.finish(gate.full_page())
            return
        with opening(ticket):
            await super().get(path)


class AppServer(Voila):
    """Voila with the served app's checks (see the module's description)."""

    def __init__(self, setup: ServerSetup, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self.setup = setup

    def setup_template_dirs(self) -> None:
        super().setup_template_dirs()
        self.template_paths.insert(0, str(self.setup.template))

    def init_settings(self) -> dict:
        settings = super().init_settings()
        kernels = self.kernel_manager
        gate = PageGate(self.setup.max_pages, lambda: len(kernels.list_kernel_ids()))
        return {**settings, "qcexplore_gate": gate}

    def init_handlers(self) -> list:
        return [
            (route, PageHandler if handler is TornadoVoilaHandler else handler, *rest)
            for route, handler, *rest in super().init_handlers()
        ]

    def listen(self) -> None:
        if self.setup.compress:  # the page carries BokehJS (MB): compress it on a network
            self.app.add_transform(GZipContentEncoding)
        server = HTTPServer(Guard(self.app, self.setup.policy), ssl_options=self.setup.tls)
        server.listen(self.port, self.ip)
        self.setup.on_listen()
        self.ioloop = IOLoop.current()
        try:
            self.ioloop.start()
        except KeyboardInterrupt:
            self.log.info("Stopping...")
        finally:
            server.stop()
            self.stop()

    def stop(self) -> None:
        """Voila's stop, made to finish when a kernel died first (Ctrl-C reaches kernels too).

        Voila shuts all kernels down together and gives up at the first one that is already
        gone; the rest are then shut down one by one so that none is left running.
        """
        from jupyter_core.utils import run_sync

        try:
            super().stop()
        except Exception as error:  # a kernel that is already gone; stop the others
            self.log.info("Kernel shut-down: %s", error)
            manager = self.kernel_manager
            for kernel_id in list(manager.list_kernel_ids()):
                try:
                    run_sync(manager.shutdown_kernel)(kernel_id, now=True)
                except Exception as gone:  # already stopped on its own
                    self.log.info("Kernel %s: %s", kernel_id, gone)
