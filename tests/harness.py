"""Test harness: servers started in the background on loopback, in a private Jupyter home.

``launch`` starts ``qcexplore app`` in a process group of its own and ``stop`` ends it by its
process id, with its kernels; ``private_environment`` keeps everything Jupyter writes under a
temporary folder. ``fetch`` and ``websocket`` talk HTTP to loopback addresses only (any other
host is refused before a byte is sent); ``kernel_pids`` and ``memory`` look at a server's
kernels through Linux's /proc. ``start_postgres`` and ``start_spark`` start the engines the
Source tests query: a throwaway PostgreSQL cluster on a unix socket, a local Spark on loopback.
"""

from __future__ import annotations

import base64
import collections
import http.client
import ipaddress
import os
import queue
import shutil
import signal
import ssl
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit


def private_environment(
    home: str | os.PathLike,
    base: Mapping[str, str] | None = None,
    *,
    python_path: Sequence[str | os.PathLike] = (),
) -> dict[str, str]:
    """An environment in which Jupyter (Voila, JupyterLab, kernels) writes only under ``home``.

    For tests and throw-away servers: ``HOME``, the Jupyter config, data and runtime
    folders and the IPython folder all point into ``home``. ``base``: the environment
    to start from (default: this process's); ``python_path``: folders put first on
    ``PYTHONPATH`` (e.g. a source checkout, so kernels import it).

    Examples
    --------
    >>> env = private_environment("/tmp/h", {})
    >>> env["HOME"], env["JUPYTER_RUNTIME_DIR"], env["JUPYTER_PLATFORM_DIRS"]
    ('/tmp/h', '/tmp/h/runtime', '1')
    """
    home = Path(home)
    env = dict(os.environ if base is None else base)
    env.update(
        HOME=str(home),
        JUPYTER_PLATFORM_DIRS="1",
        JUPYTER_CONFIG_DIR=str(home / "config"),
        JUPYTER_DATA_DIR=str(home / "data"),
        JUPYTER_RUNTIME_DIR=str(home / "runtime"),
        IPYTHONDIR=str(home / "ipython"),
    )
    paths = [str(p) for p in python_path] + [env.get("PYTHONPATH", "")]
    env["PYTHONPATH"] = os.pathsep.join(p for p in paths if p)
    return env


def launch(
    args: Sequence[str] = (),
    *,
    env: Mapping[str, str] | None = None,
    cwd: str | os.PathLike | None = None,
    timeout: float = 90.0,
    said: list[str] | None = None,
) -> tuple[subprocess.Popen, str]:
    """Start ``qcexplore app ARGS`` in a process group of its own; return it and its address.

    For scripts and tests that need the app in the background. Stop it with
    :func:`stop`, which ends the server and its kernels together. ``cwd``: the folder it
    runs in (default: the environment's HOME, so its default log folder lands there);
    ``said``: a list that receives the lines it printed before the address (and the
    address line), and the last lines of its stderr as they come.

    Examples
    --------
    """
    environment = dict(os.environ if env is None else env)
    command = [sys.executable, "-m", "qcexplore", "app", *args]
    folder = Path(cwd if cwd is not None else environment.get("HOME") or os.getcwd())
    folder.mkdir(parents=True, exist_ok=True)
    process = subprocess.Popen(
        command,
        env=environment,
        cwd=folder,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )
    lines: queue.Queue[str | None] = queue.Queue()
    errors: collections.deque[str] = collections.deque(maxlen=5) if said is None else said

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
        if said is not None:
            said.append(line.rstrip("\n"))
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


def make_certificate(folder: Path) -> tuple[str, str]:
    """A self-signed certificate for 127.0.0.1 and localhost and its key (openssl)."""
    folder.mkdir(parents=True, exist_ok=True)
    cert, key = folder / "cert.pem", folder / "key.pem"
    subprocess.run(
        ["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2",
         "-subj", "/CN=localhost", "-addext", "subjectAltName=DNS:localhost,IP:127.0.0.1",
         "-keyout", str(key), "-out", str(cert)],
        check=True, capture_output=True, timeout=60,
    )  # fmt: skip
    return str(cert), str(key)


# ---- talking to a server on loopback ---------------------------------------------------------
@dataclass
class Response:
    """An HTTP answer: status, headers (lower-case names) and body."""

    status: int
    headers: dict[str, str]
    body: bytes

    @property
    def text(self) -> str:
        return self.body.decode("utf-8", "replace")


def _loopback(url: str) -> tuple[str, int, str, bool]:
    parts = urlsplit(url)
    host = parts.hostname or ""
    if host != "localhost":
        try:
            if not ipaddress.ip_address(host).is_loopback:
                raise ValueError
        except ValueError:
            raise AssertionError(f"tests talk to loopback only, not to {url!r}") from None
    secure = parts.scheme == "https"
    target = parts.path or "/"
    if parts.query:
        target += "?" + parts.query
    return host, parts.port or (443 if secure else 80), target, secure


def _connection(url: str, tls: ssl.SSLContext | None, timeout: float) -> tuple[Any, str]:
    host, port, target, secure = _loopback(url)
    if secure:
        return http.client.HTTPSConnection(host, port, timeout=timeout, context=tls), target
    return http.client.HTTPConnection(host, port, timeout=timeout), target


def fetch(
    url: str,
    *,
    method: str = "GET",
    headers: Mapping[str, str] | None = None,
    body: bytes | None = None,
    tls: ssl.SSLContext | None = None,
    timeout: float = 120.0,
) -> Response:
    """One HTTP request to a loopback address (no redirect followed); ``headers`` may set
    Host and Origin to anything, as an attacker's page or a rebinding name would."""
    connection, target = _connection(url, tls, timeout)
    try:
        connection.request(method, target, body=body, headers=dict(headers or {}))
        answer = connection.getresponse()
        return Response(answer.status, {k.lower(): v for k, v in answer.getheaders()},
                        answer.read())  # fmt: skip
    finally:
        connection.close()


def websocket(
    url: str,
    *,
    headers: Mapping[str, str] | None = None,
    tls: ssl.SSLContext | None = None,
    timeout: float = 60.0,
) -> tuple[int, http.client.HTTPConnection]:
    """Open a websocket (the handshake only) to a loopback address (``ws://`` or ``wss://``);
    return the status (101 when accepted) and the connection, which holds the websocket open
    until closed."""
    connection, target = _connection(url.replace("ws", "http", 1), tls, timeout)
    key = base64.b64encode(os.urandom(16)).decode()
    shake = {"Connection": "Upgrade", "Upgrade": "websocket", "Sec-WebSocket-Version": "13",
             "Sec-WebSocket-Key": key, **dict(headers or {})}  # fmt: skip
    connection.request("GET", target, headers=shake)
    return connection.getresponse().status, connection


def kernel_pids(server: int) -> list[int]:
    """The kernel processes the server ``server`` (a process id) runs now (Linux /proc)."""
    found = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
            command = (stat.parent / "cmdline").read_bytes()
        except OSError:  # the process ended meanwhile
            continue
        if int(fields[1]) == server and b"ipykernel" in command:
            found.append(int(stat.parent.name))
    return found


def memory(pid: int) -> dict[str, int]:
    """Resident (``rss``) and proportional (``pss``: shared pages split among their users)
    memory of a process in bytes."""
    found = {}
    for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
        name, _, value = line.partition(":")
        if name in ("Rss", "Pss"):
            found[name.lower()] = int(value.split()[0]) * 1024
    return found


def wait_until(condition: Callable[[], Any], seconds: float, what: str) -> Any:
    """Poll ``condition`` until it is true (returned) or ``seconds`` pass (AssertionError)."""
    deadline = time.monotonic() + seconds
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"{what} within {seconds:g} s")
        time.sleep(0.25)


# ---- engines for the Source tests: a throwaway PostgreSQL cluster and a local Spark ----------
#: The system user that owns test clusters (initdb refuses root).
POSTGRES_USER = "qcpg"


@dataclass
class Postgres:
    """A PostgreSQL cluster listening on a unix socket only; :meth:`stop` ends it by its pid."""

    folder: Path
    pid: int
    user: str
    password: str

    @property
    def socket(self) -> Path:
        return self.folder / "socket"

    def url(self, *, password: str | None = None, database: str = "postgres") -> str:
        secret = self.password if password is None else password
        return f"postgresql://{self.user}:{secret}@/{database}?host={self.socket}"

    def stop(self, *, timeout: float = 30.0) -> None:
        try:
            os.kill(self.pid, signal.SIGINT)  # the server's "fast" shutdown
        except ProcessLookupError:
            return
        deadline = time.monotonic() + timeout
        while Path(f"/proc/{self.pid}").exists() and time.monotonic() < deadline:
            time.sleep(0.1)
        if Path(f"/proc/{self.pid}").exists():
            os.kill(self.pid, signal.SIGKILL)


def postgres_binaries() -> Path:
    """The newest Debian PostgreSQL server binaries (``apt-get install postgresql``)."""
    found = sorted(Path("/usr/lib/postgresql").glob("*/bin/initdb"), key=lambda p: p.parts[-3])
    if not found:
        raise RuntimeError(
            "no PostgreSQL server in /usr/lib/postgresql: apt-get install postgresql"
        )
    return found[-1].parent


def start_postgres(
    folder: Path, *, user: str = "qcx", password: str = "pg-test-secret"
) -> Postgres:
    """initdb and start a cluster in ``folder`` (password login, no TCP, no fsync)."""
    binaries = postgres_binaries()
    as_owner: list[str] = []
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "socket").mkdir(exist_ok=True)
    if os.geteuid() == 0:  # initdb refuses root: the cluster belongs to a system user
        if subprocess.run(["id", POSTGRES_USER], capture_output=True).returncode:
            subprocess.run(["useradd", "--system", "--no-create-home", POSTGRES_USER], check=True)
        for path in (folder, folder / "socket"):
            shutil.chown(path, POSTGRES_USER)
        as_owner = ["runuser", "-u", POSTGRES_USER, "--"]
    secret = folder / "password"
    secret.write_text(password + "\n")
    secret.chmod(0o600)
    if as_owner:
        shutil.chown(secret, POSTGRES_USER)
    data = folder / "data"
    run = dict(check=True, capture_output=True, timeout=120)
    subprocess.run(
        [*as_owner, str(binaries / "initdb"), "-D", str(data), "-U", user,
         f"--pwfile={secret}", "-A", "scram-sha-256", "--no-sync", "--no-instructions"],
        **run,
    )  # fmt: skip
    secret.unlink()
    options = (
        f"-k {folder / 'socket'} -c listen_addresses='' -c fsync=off "
        "-c synchronous_commit=off -c full_page_writes=off"
    )
    # -l: without a log file the server keeps our output pipes open and run() never returns.
    subprocess.run(
        [*as_owner, str(binaries / "pg_ctl"), "-D", str(data), "-l", str(folder / "server.log"),
         "-o", options, "-w", "start"],
        **run,
    )  # fmt: skip
    pid = int((data / "postmaster.pid").read_text().split()[0])
    return Postgres(folder=folder, pid=pid, user=user, password=password)


def start_spark() -> Any:
    """A local Spark session on two threads, bound to loopback, without its web UI."""
    os.environ["SPARK_LOCAL_IP"] = "127.0.0.1"
    from pyspark.sql import SparkSession

    session = (
        SparkSession.builder.master("local[2]")
        .appName("qcexplore-tests")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.driver.host", "127.0.0.1")
        .config("spark.driver.bindAddress", "127.0.0.1")
        .config("spark.sql.shuffle.partitions", "2")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.execution.arrow.pyspark.enabled", "true")
        .getOrCreate()
    )
    session.sparkContext.setLogLevel("ERROR")
    return session
