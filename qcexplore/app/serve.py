"""The explorer as a standalone web page, served by Voila.

``serve(study)`` writes the study to a private temporary folder, starts the app's Voila server
(:mod:`qcexplore.app.server`) on the notebook ``app.ipynb`` shipped with the package, prints the
address and blocks until Ctrl-C (or SIGTERM). The notebook runs :func:`app_view`, which reads
the study back through the environment variable :data:`CONFIG_ENV`.

What the server does for a room of viewers, and against the pages they visit elsewhere:

- it answers only at its own address (Host checked) and only its own page (Origin checked);
  remote access is off unless ``host`` says otherwise;
- on the network it needs an access token (one is made and printed when none is given), which
  is never put on a command line; with a certificate it speaks TLS, without one it warns;
- each page view gets its own kernel, up to a cap sized to the machine
  (:func:`qcexplore.app.kernels.default_max_pages`); kernels whose page never connected go
  after ``connect_timeout`` seconds, those of closed pages after ``idle_timeout``;
- the page loads everything from this machine (BokehJS from the installed package, no CDN);
- investigation logs go to and from the browser, or by name to a log folder fixed here,
  where every page view also autosaves (:mod:`qcexplore.app.logs`); no page names a path.
"""

from __future__ import annotations

import html
import ipaddress
import json
import os
import pickle
import secrets
import shutil
import socket
import ssl
import sys
import tempfile
from collections.abc import Callable, MutableMapping
from dataclasses import asdict, dataclass
from importlib.resources import files
from pathlib import Path
from typing import Any

from qcexplore.demo import ROLES as DEMO_ROLES
from qcexplore.demo import TITLE as DEMO_TITLE
from qcexplore.demo import filling_line
from qcexplore.errors import QCDataError
from qcexplore.investigation import open_study
from qcexplore.study import Study

#: Environment variable naming the JSON file that tells the notebook what to show.
CONFIG_ENV = "QCEXPLORE_APP_CONFIG"
#: Environment variable that may hold the access token (read once, then removed).
TOKEN_ENV = "QCEXPLORE_APP_TOKEN"
#: Tokens shorter than this are refused: they could be guessed.
MIN_TOKEN_LENGTH = 16
#: The notebook the served page runs (package data).
NOTEBOOK = "app.ipynb"
_STUDY_FILE = "study.pickle"
_CONFIG_FILE = "app.json"
#: Asks before the page is closed or reloaded while the log has changes not saved under a
#: name (the log's status line then carries the ``qcx-unsaved`` mark).
UNSAVED_WARNING = """
if (!window.qcexploreUnsavedWarning) {
  window.qcexploreUnsavedWarning = true;
  window.addEventListener('beforeunload', (event) => {
    if (document.querySelector('.qcx-unsaved')) {
      event.preventDefault();
      event.returnValue = '';
    }
  });
}
"""


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


def read_token(
    token_file: str | os.PathLike | None = None,
    environ: MutableMapping[str, str] | None = None,
) -> str | None:
    """The access token: from ``token_file`` (its first line) or from the environment variable
    :data:`TOKEN_ENV`, which is removed so that kernels do not inherit it. None when neither
    gives one.

    Raises
    ------
    QCDataError
        When the file cannot be read, or the token is shorter than :data:`MIN_TOKEN_LENGTH`.

    Examples
    --------
    >>> env = {TOKEN_ENV: "x" * 20}
    >>> read_token(environ=env) == "x" * 20 and TOKEN_ENV not in env
    True
    >>> read_token(environ={}) is None
    True
    """
    environ = os.environ if environ is None else environ
    from_environment = environ.pop(TOKEN_ENV, None)
    if token_file is not None:
        try:
            lines = Path(token_file).read_text(encoding="utf-8").splitlines()
        except (OSError, UnicodeDecodeError) as error:
            reason = getattr(error, "strerror", None) or type(error).__name__
            raise QCDataError(
                f"Cannot read the token file {str(token_file)!r} ({reason}): give a text file "
                "whose first line is the token."
            ) from None
        token, where = (lines[0].strip() if lines else ""), f"the token file {str(token_file)!r}"
    elif from_environment is not None:
        token, where = from_environment.strip(), TOKEN_ENV
    else:
        return None
    if len(token) < MIN_TOKEN_LENGTH:
        raise QCDataError(
            f"The token in {where} is {len(token)} characters long: give at least "
            f"{MIN_TOKEN_LENGTH} (leave it out on the network and one is made for you)."
        )
    return token


def tls_context(certfile: str | None, keyfile: str | None) -> ssl.SSLContext | None:
    """The TLS settings for a certificate (and its key, unless the certificate file holds it);
    None when no certificate is given.

    Raises
    ------
    QCDataError
        When the files cannot be read or do not belong together.

    Examples
    --------
    >>> tls_context(None, None) is None
    True
    >>> tls_context(None, "key.pem")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: --keyfile needs --certfile: ...
    """
    if certfile is None:
        if keyfile is not None:
            raise QCDataError("--keyfile needs --certfile: give the certificate as well.")
        return None
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    try:
        context.load_cert_chain(certfile, keyfile)
    except (OSError, ssl.SSLError) as error:
        reason = getattr(error, "strerror", None) or getattr(error, "reason", None) or error
        raise QCDataError(
            f"Cannot use the certificate {certfile!r}"
            f"{f' with the key {keyfile!r}' if keyfile else ''} ({reason}): give a PEM "
            "certificate and its private key (--certfile, --keyfile)."
        ) from None
    return context


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

    ``title``: the page's heading; ``log``: an investigation log to open the explorer with
    (checked when the server starts); ``log_folder``: the folder of investigation logs, where
    every page view autosaves (None: logs only go to and from the browser).
    """

    title: str = ""
    log: str | None = None
    log_folder: str | None = None


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
    return open_study(filling_line(seed=seed)[0], {**DEMO_ROLES, **roles})


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

    The explorer keeps its logs in the settings' log folder (autosaving this page view's
    work there) and opens the settings' log, if any.

    Examples
    --------
    >>> import tempfile
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line(days=2)[0], value="net_g", subgroup="round")
    >>> config = write_app_folder(s, Path(tempfile.mkdtemp()), AppSettings(title="demo"))
    >>> type(app_view(config).children[1]).__name__
    'Explorer'
    """
    import ipywidgets as widgets

    from qcexplore.app.logfolder import LogFolder
    from qcexplore.app.resources import in_kernel, load_bokehjs

    study, settings = load_app_study(config)
    explorer = study.explore()
    if settings.log_folder:
        explorer.logbook.attach(LogFolder(settings.log_folder))
    if settings.log:
        explorer.logbook.open_file(settings.log)
    heading = widgets.HTML(
        f"<h2 class='qcexplore-app-title'>{html.escape(settings.title)}</h2>",
        layout=widgets.Layout(margin="0 0 0 8px"),
    )
    # The explorer loads BokehJS when it is displayed itself; wrapped, it is loaded here.
    load_bokehjs()
    if in_kernel():
        from IPython.display import Javascript, display

        display(Javascript(UNSAVED_WARNING))
    return widgets.VBox([heading, explorer])


def app_address(host: str, port: int, token: str | None, *, tls: bool = False) -> str:
    """The address to open in a browser (with the token, when one is to be shown).

    Examples
    --------
    >>> app_address("127.0.0.1", 8900, None)
    'http://127.0.0.1:8900/'
    >>> app_address("0.0.0.0", 8900, "abc", tls=True).endswith(":8900/?token=abc")
    True
    """
    shown = socket.gethostname() if host in ("0.0.0.0", "::", "") else host
    if ":" in shown:
        shown = f"[{shown}]"
    query = f"?token={token}" if token else ""
    return f"{'https' if tls else 'http'}://{shown}:{port}/{query}"


def serve(
    study: Study,
    *,
    settings: AppSettings | None = None,
    host: str = "127.0.0.1",
    port: int | None = None,
    token: str | None = None,
    tls: ssl.SSLContext | None = None,
    idle_timeout: float = 900.0,
    connect_timeout: float = 120.0,
    max_pages: int | None = None,
    announce: Callable[[str], None] | None = None,
) -> None:
    """Serve the explorer of ``study`` as a web page until Ctrl-C.

    Parameters
    ----------
    study : the study to explore
    settings : the page's title, an investigation log to open and the log folder
        (default: no title, no log, logs only to and from the browser)
    host : address to listen on (default: this machine only)
    port : TCP port (default: a free one)
    token : access token; requests without it are refused. On the network one is made when
        none is given, and shown in the address.
    tls : TLS settings (:func:`tls_context`); without them a network server warns
    idle_timeout : seconds after which the kernel of a closed page is shut down
    connect_timeout : seconds after which a kernel whose page never connected is shut down
    max_pages : pages open at once (default: sized to the machine's free memory)
    announce : called with each line to show (default: print it); the last names the address
        once the server listens

    Examples
    --------
    >>> from qcexplore.demo import filling_line
    >>> s = Study(filling_line()[0], value="net_g", subgroup="round")
    >>> serve(s, port=-1)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    qcexplore.errors.QCDataError: Cannot listen on 127.0.0.1 port -1 ...
    """
    from qcexplore.app.guard import HostPolicy
    from qcexplore.app.kernels import KERNEL_BYTES, default_max_pages
    from qcexplore.app.server import AppServer, ServerSetup, voila_config, write_template

    say = announce or (lambda line: print(line, flush=True))
    port = free_port(host or "0.0.0.0", port if port is not None else 0)
    shown_token = None
    if token is None and not is_loopback(host):
        token = shown_token = new_token()
    if not is_loopback(host) and tls is None:
        print(
            f"qcexplore app: warning: serving {host} over plain HTTP: the page, the data and "
            "the token can be read on the network; give --certfile and --keyfile.",
            file=sys.stderr,
            flush=True,
        )
    data_bytes = int(study.data.memory_usage(deep=True).sum())
    limit = max_pages or default_max_pages(data_bytes)
    each = (KERNEL_BYTES + 3 * data_bytes) / 2**20
    say(f"qcexplore app: up to {limit} pages at once (about {each:.0f} MB each; --max-pages)")
    settings = settings or AppSettings()
    if settings.log_folder:
        say(f"qcexplore app: investigation logs in {settings.log_folder}")
    address = app_address(host, port, shown_token, tls=tls is not None)

    folder = Path(tempfile.mkdtemp(prefix="qcexplore-app-"))
    previous = os.environ.get(CONFIG_ENV)
    try:
        os.environ[CONFIG_ENV] = str(write_app_folder(study, folder, settings))
        setup = ServerSetup(
            policy=HostPolicy(host, scheme="https" if tls else "http"),
            max_pages=limit,
            template=write_template(folder / "template"),
            tls=tls,
            compress=not is_loopback(host),
            on_listen=lambda: say(f"qcexplore app: {address} (Ctrl-C stops)"),
        )
        config = voila_config(
            host=host,
            port=port,
            root=folder,
            token=token,
            idle_timeout=idle_timeout,
            connect_timeout=connect_timeout,
        )
        server = AppServer(setup, config=config)
        server.initialize([str(folder / NOTEBOOK)])
        server.start()  # returns after Ctrl-C or SIGTERM, kernels shut down
    finally:
        if previous is None:
            os.environ.pop(CONFIG_ENV, None)
        else:
            os.environ[CONFIG_ENV] = previous
        shutil.rmtree(folder, ignore_errors=True)
    print("qcexplore app: stopped", file=sys.stderr, flush=True)
