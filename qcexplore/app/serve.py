"""The explorer as a standalone web page, served by Voila.

``serve(study)`` writes the study to a private temporary folder, starts a Voila
server on the notebook ``app.ipynb`` shipped with the package, prints the address
and blocks until Ctrl-C (or SIGTERM). The notebook runs :func:`app_view`, which
reads the study back through the environment variable :data:`CONFIG_ENV`.

The page loads BokehJS from the installed package (no CDN), each page view gets its
own kernel, a warm kernel is kept ready so the first page opens quickly, and kernels
left idle (a closed tab) are shut down after ``idle_timeout`` seconds.
"""

from __future__ import annotations

import ipaddress
import json
import os
import pickle
import secrets
import shutil
import socket
import sys
import tempfile
from collections.abc import Callable
from dataclasses import asdict, dataclass
from importlib.resources import files
from pathlib import Path
from typing import Any

from qcexplore.demo import ROLES as DEMO_ROLES
from qcexplore.demo import TITLE as DEMO_TITLE
from qcexplore.demo import filling_line
from qcexplore.errors import QCDataError
from qcexplore.study import Study

#: Environment variable naming the JSON file that tells the notebook what to show.
CONFIG_ENV = "QCEXPLORE_APP_CONFIG"
#: The notebook the served page runs (package data).
NOTEBOOK = "app.ipynb"
_STUDY_FILE = "study.pickle"
_CONFIG_FILE = "app.json"


def is_loopback(host: str) -> bool:
    """Whether ``host`` only accepts connections from this machine.

    Examples
    --------
    >>> is_loopback("127.0.0.1"), is_loopback("localhost"), is_loopback("0.0.0.0")
    (True, True, False)
    """
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def require_access_control(host: str, token: str | None) -> None:
    """Refuse to serve the network without an access token (loopback needs none).

    Examples
    --------
    >>> require_access_control("127.0.0.1", None)
    >>> require_access_control("0.0.0.0", None)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Serving on 0.0.0.0 lets others on the network in: ...
    """
    if not is_loopback(host) and not token:
        raise QCDataError(
            f"Serving on {host} lets others on the network in: give an access token "
            "(--token TOKEN, or --token auto to generate one), or serve this machine only "
            "(the default host 127.0.0.1)."
        )


def new_token() -> str:
    """A random access token for a server that others on the network can reach.

    Examples
    --------
    >>> len(new_token()) >= 32
    True
    """
    return secrets.token_urlsafe(24)


def free_port(host: str = "127.0.0.1", port: int = 0) -> int:
    """A TCP port that can be listened on at ``host`` right now.

    ``port=0`` lets the system pick a free one; a given port is checked.

    Raises
    ------
    QCDataError
        When the address cannot be listened on (port in use, unknown host).

    Examples
    --------
    >>> 0 < free_port() < 65536
    True
    """
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        try:
            probe.bind((host, port))
        except (OSError, OverflowError) as error:
            reason = getattr(error, "strerror", None) or str(error)
            raise QCDataError(
                f"Cannot listen on {host} port {port or 'any'} ({reason}): choose another "
                "--port (or leave it out for a free one) or check --host."
            ) from None
        return int(probe.getsockname()[1])


@dataclass(frozen=True)
class AppSettings:
    """What the served page shows besides the study.

    ``workdir``: the folder the kernel works in (where the explorer saves and loads
    investigation logs): the folder ``qcexplore app`` was started in, not the
    temporary app folder that is removed when the server stops. ``log``: an
    investigation log to open the explorer with.
    """

    title: str = ""
    workdir: str | None = None
    log: str | None = None


def write_app_folder(study: Study, folder: Path, settings: AppSettings | None = None) -> Path:
    """Write the study, the page's settings and the notebook into ``folder``.

    Returns the settings file, to be named by :data:`CONFIG_ENV` for the kernel.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line(days=2)[0], value="net_g", subgroup="round")
    >>> config = write_app_folder(s, Path(tempfile.mkdtemp()), AppSettings(title="demo"))
    >>> sorted(p.name for p in config.parent.iterdir())
    ['app.ipynb', 'app.json', 'study.pickle']
    """
    folder = Path(folder)
    # The folder is private to this process (mkdtemp makes it 0700) and the kernel reads
    # back only what this process wrote, so pickle is safe here and keeps start-up fast.
    with (folder / _STUDY_FILE).open("wb") as handle:
        pickle.dump(study, handle, protocol=pickle.HIGHEST_PROTOCOL)
    config = folder / _CONFIG_FILE
    content = {"study": _STUDY_FILE, **asdict(settings or AppSettings())}
    config.write_text(json.dumps(content), encoding="utf-8")
    (folder / NOTEBOOK).write_bytes(files("qcexplore.app").joinpath(NOTEBOOK).read_bytes())
    return config


def demo_study(seed: int = 0, **roles: Any) -> Study:
    """The Study of the built-in demo (``qcexplore.demo.filling_line``) in its roles.

    ``roles`` override the demo's roles (``qcexplore.demo.ROLES``).

    Examples
    --------
    >>> demo_study().measured_by
    ('crew',)
    """
    return Study(filling_line(seed=seed)[0], **{**DEMO_ROLES, **roles})


def load_app_study(config: str | os.PathLike | None = None) -> tuple[Study, AppSettings]:
    """The study and settings that :func:`serve` handed to the notebook.

    ``config``: the settings file (default: the one :data:`CONFIG_ENV` names; without
    one, as when the notebook is opened by itself, the built-in demo).

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line(days=2)[0], value="net_g", subgroup="round")
    >>> config = write_app_folder(s, Path(tempfile.mkdtemp()), AppSettings(title="demo"))
    >>> load_app_study(config)[1].title
    'demo'
    """
    path = config if config is not None else os.environ.get(CONFIG_ENV)
    if not path:
        return demo_study(), AppSettings(title=DEMO_TITLE)
    path = Path(path)
    content = json.loads(path.read_text(encoding="utf-8"))
    with (path.parent / content.pop("study")).open("rb") as handle:
        study = pickle.load(handle)
    return study, AppSettings(**content)


def app_view(config: str | os.PathLike | None = None) -> Any:
    """The widget the served page shows: a heading and the explorer of the study.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line(days=2)[0], value="net_g", subgroup="round")
    >>> config = write_app_folder(s, Path(tempfile.mkdtemp()), AppSettings(title="demo"))
    >>> type(app_view(config).children[1]).__name__
    'Explorer'
    """
    import html

    import ipywidgets as widgets

    from qcexplore.app.resources import load_bokehjs

    study, settings = load_app_study(config)
    if settings.workdir and Path(settings.workdir).is_dir():
        os.chdir(settings.workdir)
    explorer = study.explore(log=settings.log)
    heading = widgets.HTML(
        f"<h2 class='qcexplore-app-title'>{html.escape(settings.title)}</h2>",
        layout=widgets.Layout(margin="0 0 0 8px"),
    )
    # The explorer loads BokehJS when it is displayed itself; wrapped, it is loaded here.
    load_bokehjs()
    return widgets.VBox([heading, explorer])


def voila_arguments(
    notebook: Path,
    *,
    host: str,
    port: int,
    token: str | None,
    idle_timeout: float,
    preheat: bool,
) -> list[str]:
    """The Voila command line for serving ``notebook``.

    Examples
    --------
    >>> args = voila_arguments(Path("app.ipynb"), host="127.0.0.1", port=8900, token=None,
    ...                        idle_timeout=600, preheat=True)
    >>> "--preheat_kernel=True" in args and "--port=8900" in args
    True
    """
    args = [
        str(notebook),
        "--no-browser",
        f"--Voila.ip={host}",
        f"--port={port}",
        "--Voila.port_retries=0",
        f"--Voila.root_dir={notebook.parent}",
        "--theme=light",
        f"--MappingKernelManager.cull_idle_timeout={int(idle_timeout)}",
        f"--MappingKernelManager.cull_interval={max(1, min(60, int(idle_timeout) // 2))}",
        "--Voila.log_level=ERROR",
        # Kernels talk to the server over local sockets: no TCP ports, nothing in plain text.
        "--KernelManager.transport=ipc",
    ]
    if preheat:
        args += ["--preheat_kernel=True", "--pool_size=1"]
    if token:
        args.append(f"--token={token}")
    return args


def app_address(host: str, port: int, token: str | None) -> str:
    """The address to open in a browser.

    Examples
    --------
    >>> app_address("127.0.0.1", 8900, None)
    'http://127.0.0.1:8900/'
    >>> app_address("0.0.0.0", 8900, "abc").endswith(":8900/?token=abc")
    True
    """
    shown = socket.gethostname() if host in ("0.0.0.0", "::", "") else host
    if ":" in shown:
        shown = f"[{shown}]"
    query = f"?token={token}" if token else ""
    return f"http://{shown}:{port}/{query}"


def serve(
    study: Study,
    *,
    settings: AppSettings | None = None,
    host: str = "127.0.0.1",
    port: int | None = None,
    token: str | None = None,
    idle_timeout: float = 900.0,
    preheat: bool = True,
    announce: Callable[[str], None] | None = None,
) -> None:
    """Serve the explorer of ``study`` as a web page until Ctrl-C.

    Parameters
    ----------
    study : the study to explore
    settings : the page's title, the kernel's working folder and an investigation log
        to open (default: no title, the current folder, no log)
    host : address to listen on; anything other than loopback needs ``token``
    port : TCP port (default: a free one)
    token : access token; requests without it are refused
    idle_timeout : seconds after which a kernel without a page is shut down
    preheat : keep one kernel ready with the notebook already run (faster first page)
    announce : called with one line naming the address once the server listens
        (default: print it)

    Examples
    --------
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line()[0], value="net_g", subgroup="round")
    >>> serve(s, host="0.0.0.0")  # the network needs a token; serve(s) blocks until Ctrl-C
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Serving on 0.0.0.0 lets others on the network in: ...
    """
    require_access_control(host, token)
    from tornado.ioloop import IOLoop
    from tornado.web import GZipContentEncoding
    from voila.app import Voila

    say = announce or (lambda line: print(line, flush=True))
    port = free_port(host or "0.0.0.0", port or 0)
    address = app_address(host, port, token)

    folder = Path(tempfile.mkdtemp(prefix="qcexplore-app-"))
    previous = os.environ.get(CONFIG_ENV)
    try:
        settings = settings or AppSettings(workdir=os.getcwd())
        os.environ[CONFIG_ENV] = str(write_app_folder(study, folder, settings))
        server = Voila()
        server.stop = lambda: _stop_kernels(server)
        server.initialize(
            voila_arguments(
                folder / NOTEBOOK,
                host=host,
                port=port,
                token=token,
                idle_timeout=idle_timeout,
                preheat=preheat,
            )
        )

        def listening() -> None:  # Voila starts this loop once the port is bound
            if not is_loopback(host):  # the page carries BokehJS (MB): gzip it on a network
                server.app.add_transform(GZipContentEncoding)
            say(f"qcexplore app: {address} (Ctrl-C stops)")

        IOLoop.current().add_callback(listening)
        server.start()  # returns after Ctrl-C or SIGTERM, kernels shut down
    finally:
        if previous is None:
            os.environ.pop(CONFIG_ENV, None)
        else:
            os.environ[CONFIG_ENV] = previous
        shutil.rmtree(folder, ignore_errors=True)
    print("qcexplore app: stopped", file=sys.stderr, flush=True)


def _stop_kernels(server: Any) -> None:
    """Voila's stop, made to finish when a kernel died first (Ctrl-C reaches kernels too).

    Voila shuts all kernels down together and gives up at the first one that is
    already gone (a kernel starting for the pool when the stop came); the rest
    are then shut down one by one so that none is left running.
    """
    from jupyter_core.utils import run_sync
    from voila.app import Voila

    try:
        Voila.stop(server)
    except Exception as error:  # a kernel that is already gone; stop the others
        server.log.info("Kernel shut-down: %s", error)
        manager = server.kernel_manager
        for kernel_id in list(manager.list_kernel_ids()):
            try:
                run_sync(manager.shutdown_kernel)(kernel_id, now=True)
            except Exception as gone:  # already stopped on its own
                server.log.info("Kernel %s: %s", kernel_id, gone)
