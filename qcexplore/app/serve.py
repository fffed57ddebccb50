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

import collections
import ipaddress
import json
import os
import pickle
import queue
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from importlib.resources import files
from pathlib import Path
from typing import Any

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


def new_token() -> str:
    """A random access token for a server that others on the network can reach.

    Examples
    --------
    >>> len(new_token()) >= 32
    True
    """
    return secrets.token_urlsafe(24)


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port that is free on ``host`` right now (the system picks it).

    Examples
    --------
    >>> 0 < free_port() < 65536
    True
    """
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    with socket.socket(family, socket.SOCK_STREAM) as probe:
        probe.bind((host, 0))
        return int(probe.getsockname()[1])


def write_app_folder(study: Study, folder: Path, *, title: str) -> Path:
    """Write the study, the page's settings and the notebook into ``folder``.

    Returns the settings file, to be named by :data:`CONFIG_ENV` for the kernel.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line()[0], value="net_g", subgroup="round")
    >>> config = write_app_folder(s, Path(tempfile.mkdtemp()), title="demo")
    >>> sorted(p.name for p in config.parent.iterdir())
    ['app.ipynb', 'app.json', 'study.pickle']
    """
    folder = Path(folder)
    # The folder is private to this process (mkdtemp makes it 0700) and the kernel reads
    # back only what this process wrote, so pickle is safe here and keeps start-up fast.
    with (folder / _STUDY_FILE).open("wb") as handle:
        pickle.dump(study, handle, protocol=pickle.HIGHEST_PROTOCOL)
    config = folder / _CONFIG_FILE
    config.write_text(json.dumps({"study": _STUDY_FILE, "title": title}), encoding="utf-8")
    (folder / NOTEBOOK).write_bytes(files("qcexplore.app").joinpath(NOTEBOOK).read_bytes())
    return config


def load_app_study(config: str | os.PathLike | None = None) -> tuple[Study, str]:
    """The study and page title that :func:`serve` handed to the notebook.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line()[0], value="net_g", subgroup="round")
    >>> config = write_app_folder(s, Path(tempfile.mkdtemp()), title="demo")
    >>> load_app_study(config)[1]
    'demo'
    """
    path = config if config is not None else os.environ.get(CONFIG_ENV)
    if not path:
        raise QCDataError(
            f"The app notebook needs {CONFIG_ENV} (set by `qcexplore app`); "
            "start it with `qcexplore app DATA ...`."
        )
    path = Path(path)
    settings = json.loads(path.read_text(encoding="utf-8"))
    with (path.parent / settings["study"]).open("rb") as handle:
        study = pickle.load(handle)
    return study, str(settings.get("title", ""))


def app_view(config: str | os.PathLike | None = None) -> Any:
    """The widget the served page shows: a heading and the explorer of the study.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line()[0], value="net_g", subgroup="round")
    >>> config = write_app_folder(s, Path(tempfile.mkdtemp()), title="demo")
    >>> type(app_view(config).children[1]).__name__
    'Explorer'
    """
    import html

    import ipywidgets as widgets

    from qcexplore.app.resources import load_bokehjs

    study, title = load_app_study(config)
    explorer = study.explore()
    heading = widgets.HTML(
        f"<h2 class='qcexplore-app-title'>{html.escape(title)}</h2>",
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
        f"--MappingKernelManager.cull_interval={max(5, min(60, int(idle_timeout) // 2))}",
        "--Voila.log_level=ERROR",
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
    title: str = "",
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
    title : heading of the page (e.g. the data file's name)
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
    if not is_loopback(host) and not token:
        raise QCDataError(
            f"Serving on {host} lets others on the network in: give an access token "
            "(or use the default host 127.0.0.1)."
        )
    from tornado.ioloop import IOLoop
    from voila.app import Voila

    say = announce or (lambda line: print(line, flush=True))
    port = port or free_port("127.0.0.1" if host in ("0.0.0.0", "") else host)
    address = app_address(host, port, token)

    class _AppServer(Voila):
        def listen(self) -> None:
            IOLoop.current().add_callback(say, f"qcexplore app: {address} (Ctrl-C stops)")
            super().listen()

    folder = Path(tempfile.mkdtemp(prefix="qcexplore-app-"))
    previous = os.environ.get(CONFIG_ENV)
    try:
        os.environ[CONFIG_ENV] = str(write_app_folder(study, folder, title=title))
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
        # Runs once the server listens (Voila starts this same loop after binding the port).
        IOLoop.current().add_callback(say, f"qcexplore app: {address} (Ctrl-C stops)")
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


def launch(
    args: Sequence[str] = (),
    *,
    env: Mapping[str, str] | None = None,
    timeout: float = 60.0,
) -> tuple[subprocess.Popen, str]:
    """Start ``qcexplore app ARGS`` in a process group of its own; return it and its address.

    For scripts and tests that need the app in the background. Stop it with
    :func:`stop`, which ends the server and its kernels together.

    Examples
    --------
    >>> process, address = launch(["--idle-timeout", "60"])
    >>> address.startswith("http://127.0.0.1:")
    True
    >>> stop(process)
    0
    """
    command = [sys.executable, "-m", "qcexplore", "app", *args]
    process = subprocess.Popen(
        command,
        env=dict(os.environ if env is None else env),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )
    lines: queue.Queue[str | None] = queue.Queue()
    errors: collections.deque[str] = collections.deque(maxlen=5)

    def pump() -> None:
        # Keep reading for the server's lifetime so a full pipe never blocks it.
        for line in process.stdout:
            lines.put(line)
        lines.put(None)

    threading.Thread(target=pump, daemon=True).start()
    threading.Thread(target=errors.extend, args=(process.stderr,), daemon=True).start()
    deadline = time.monotonic() + timeout
    while (left := deadline - time.monotonic()) > 0:
        try:
            line = lines.get(timeout=left)
        except queue.Empty:
            break
        if line is None:
            break
        if line.startswith("qcexplore app: http"):
            return process, line.split()[2]
    stop(process)
    last = [e.strip() for e in errors if e.strip()]
    raise RuntimeError(
        f"`{' '.join(command)}` gave no address within {timeout:g} s"
        + (f"; it said: {last[-1]}" if last else "")
    )


def stop(process: subprocess.Popen, *, timeout: float = 20.0) -> int:
    """Stop a server started by :func:`launch` (its whole process group); return its exit code.

    Examples
    --------
    See :func:`launch`.
    """
    if process.poll() is None:
        try:
            os.killpg(process.pid, signal.SIGTERM)
        except ProcessLookupError:
            pass
        try:
            process.wait(timeout)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait(timeout)
    return process.returncode
