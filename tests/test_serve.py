"""The served app over HTTP, on loopback only: whom it answers (Host, Origin), the page cap and
the kernels it lets go, no query endpoint, nothing asked of other servers, TLS and the token on
the network, and twenty viewers at once. No browser here (tests/test_app_log.py drives one).

Each server is started by ``harness.launch`` and stopped by its process id; every request goes
through ``harness.fetch`` / ``harness.websocket``, which refuse any address but loopback.
"""

from __future__ import annotations

import http.client
import os
import re
import signal
import ssl
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import harness
import pytest

from qcexplore import cli
from qcexplore.app import kernels, serve

REPO = Path(__file__).resolve().parents[1]

STATIC = "voila/static/voila.js"
KERNEL_ID = re.compile(r'"kernelId": "([0-9a-f-]{36})"')
#: What the guard's own 403 page says (the app's handlers answer 403 in other words).
GUARD_REFUSAL = "403: refused"


def environment(home: Path) -> dict[str, str]:
    """Jupyter writes only under ``home``; kernels import this checkout."""
    return harness.private_environment(home, python_path=[REPO])


TOKEN = "serve-test-token-5b1e-0123456789"


@dataclass
class Server:
    process: Any
    address: str
    tls: ssl.SSLContext | None = None
    said: list[str] = field(default_factory=list)
    held: list[Any] = field(default_factory=list)

    @property
    def port(self) -> int:
        return int(self.address.rstrip("/").rsplit(":", 1)[1])

    @property
    def origin(self) -> str:
        return self.address.rstrip("/")

    def fetch(self, path: str = "", **options: Any) -> harness.Response:
        return harness.fetch(self.address + path, tls=self.tls, **options)

    def websocket(self, path: str, **options: Any) -> tuple[int, Any]:
        scheme = "wss" if self.tls else "ws"
        return harness.websocket(f"{scheme}://127.0.0.1:{self.port}/{path}", tls=self.tls,
                                 **options)  # fmt: skip

    def kernels(self) -> list[int]:
        return harness.kernel_pids(self.process.pid)


@pytest.fixture(scope="module")
def app(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    """The demo app on loopback, with TLS and a token: at most 2 pages, kernels let go after
    4 s. The last test stops it with Ctrl-C."""
    home = tmp_path_factory.mktemp("serve-home")
    cert, key = harness.make_certificate(home / "cert")
    said: list[str] = []
    process, address = harness.launch(
        ["--max-pages", "2", "--connect-timeout", "4", "--idle-timeout", "4",
         "--certfile", cert, "--keyfile", key, "--log-folder", str(home / "logs")],
        env={**environment(home), serve.TOKEN_ENV: TOKEN}, said=said,
    )  # fmt: skip
    server = Server(process, address, ssl.create_default_context(cafile=cert), said)
    try:
        yield server
    finally:
        for connection in server.held:
            connection.close()
        harness.stop(process)


def open_page(server: Server) -> tuple[str, str]:
    """GET the page (a kernel runs the notebook for it); its HTML and its kernel's id."""
    page = server.fetch(f"?token={TOKEN}")
    assert page.status == 200, page.text[:500]
    return page.text, KERNEL_ID.search(page.text).group(1)


def channels(kernel: str) -> str:
    return f"api/kernels/{kernel}/channels?token={TOKEN}"


# ---- finding 5: the token and TLS --------------------------------------------------------------
def test_https_with_a_token_that_is_on_no_command_line(app: Server) -> None:
    assert app.address.startswith("https://127.0.0.1:") and TOKEN not in " ".join(app.said)
    assert TOKEN.encode() not in Path(f"/proc/{app.process.pid}/cmdline").read_bytes()
    for path in ("", "api/kernels"):  # the page and the kernel API, without the token
        answer = app.fetch(path)
        where = answer.headers.get("location", "")
        assert answer.status == 403 or (answer.status == 302 and "/login" in where), path
    assert app.kernels() == []  # no kernel is started ahead of a page, nor for a refused one
    assert app.fetch(STATIC).status == 200 and len(app.fetch(STATIC).body) > 1000
    with pytest.raises(ssl.SSLError):  # a client that does not trust the certificate
        harness.fetch(app.address + STATIC, tls=ssl.create_default_context())
    with pytest.raises((ConnectionError, http.client.HTTPException)):  # no plain HTTP
        harness.fetch(app.address.replace("https://", "http://") + STATIC)


# ---- finding 2: DNS rebinding --------------------------------------------------------------
def test_only_the_servers_own_names_are_answered(app: Server) -> None:
    port = app.port
    for host in (f"127.0.0.1:{port}", f"localhost:{port}", f"[::1]:{port}", "localhost"):
        assert app.fetch(STATIC, headers={"Host": host}).status == 200, host
    rebinding = [
        f"evil.example:{port}",  # a DNS name pointed at 127.0.0.1 by its owner
        f"127.0.0.1.nip.io:{port}",
        f"localhost.evil.example:{port}",
        f"192.168.1.20:{port}",  # not the address served
        "",
    ]
    for host in rebinding:
        for path in ("", f"?token={TOKEN}", STATIC, "api/kernels", "login"):
            answer = app.fetch(path, headers={"Host": host})
            assert answer.status == 403 and GUARD_REFUSAL in answer.text, (host, path)
        status, connection = app.websocket(
            channels("00000000-0000-0000-0000-000000000000"), headers={"Host": host}
        )
        connection.close()
        assert status == 403, host
    assert app.kernels() == []  # a refused page starts no kernel


# ---- the websocket's Origin; finding 4: the query endpoint; finding 6: nothing from outside ----
def test_the_kernel_websocket_takes_only_its_own_page(app: Server) -> None:
    page, kernel = open_page(app)
    for pid in app.kernels():
        assert TOKEN.encode() not in Path(f"/proc/{pid}/cmdline").read_bytes()
    others = ["https://evil.example", f"https://localhost.evil.example:{app.port}", "null",
              f"https://127.0.0.1:{app.port + 1}", f"http://127.0.0.1:{app.port}"]  # fmt: skip
    for origin in others:
        status, connection = app.websocket(channels(kernel), headers={"Origin": origin})
        connection.close()
        assert status == 403, origin
        posted = app.fetch(f"api/kernels?token={TOKEN}", method="POST", body=b"{}",
                           headers={"Origin": origin})  # fmt: skip
        assert posted.status == 403 and GUARD_REFUSAL in posted.text, origin
    status, connection = app.websocket(channels(kernel), headers={"Origin": app.origin})
    assert status == 101
    app.held.append(connection)  # this page stays connected: its kernel must be kept
    # Voila's request-information endpoint of warm kernels (it handed out the query string,
    # token included, to anyone) does not exist: no warm kernels are kept.
    path = f"voila/query/{kernel}"
    answer = app.fetch(path)
    assert answer.status in (302, 403, 404) and kernel not in answer.text
    status, connection = app.websocket(path, headers={"Origin": app.origin})
    connection.close()
    assert status != 101
    # Everything the page loads comes from this server (BokehJS inside the page names CDNs
    # for features the explorer does not use; the browser test records every request).
    tags = re.findall(r"<(?:link|script|img|iframe)\b[^>]*>", page)
    external = [tag for tag in tags if re.search(r'(?:href|src)="(?:https?:)?//', tag)]
    assert external == [] and "fortawesome" not in page, external
    for name in ("study.pickle", "app.json", "app.ipynb"):  # the study is not a file to fetch
        assert app.fetch(f"voila/files/{name}?token={TOKEN}").status in (403, 404)


# ---- finding 3: unbounded kernels ------------------------------------------------------------
def test_pages_are_capped_and_unused_kernels_let_go(app: Server) -> None:
    # One page is open and connected (the test above). A plain GET makes the second.
    assert len(app.kernels()) == 1
    open_page(app)
    assert len(app.kernels()) == 2
    full = app.fetch(f"?token={TOKEN}")
    assert full.status == 503 and full.headers.get("retry-after") == "60"
    assert "All 2 places of this app are in use" in full.text and "<script" not in full.text
    assert len(app.kernels()) == 2  # the refused page started none
    # The GET's page never connected: its kernel goes after 4 s idle. The connected page's
    # kernel, idle longer still, is kept through the same rounds of culling.
    started = time.monotonic()
    harness.wait_until(lambda: len(app.kernels()) == 1, 60,
                       "the kernel of a page that never connected was not shut down")  # fmt: skip
    print(f"\nkernel of a page that never connected shut down after "
          f"{time.monotonic() - started:.0f} s (idle limit 4 s)")  # fmt: skip
    assert len(app.kernels()) == 1
    # A place is free again once the server has finished shutting the kernel down (its
    # process may end a moment before): the page that is let in starts the second kernel.
    harness.wait_until(lambda: app.fetch(f"?token={TOKEN}").status == 200, 30,
                       "no place was free after the kernel was shut down")  # fmt: skip
    assert len(app.kernels()) == 2
    for connection in app.held:  # the tab is closed: its kernel goes after the idle timeout
        connection.close()
    app.held.clear()
    harness.wait_until(lambda: not app.kernels(), 60, "kernels were left running")


def test_the_default_cap_is_sized_to_the_machine(app: Server) -> None:
    line = next(s for s in app.said if "pages at once" in s)
    assert "up to 2 pages at once" in line  # given with --max-pages
    free = 24 * 2**30
    per_page = kernels.KERNEL_BYTES + kernels.DATA_COPIES * 2**20
    assert kernels.default_max_pages(2**20, available=free) == int(free * 0.5 // per_page)
    assert kernels.default_max_pages(0, available=10**15) == kernels.MAX_PAGES
    assert kernels.default_max_pages(2**40, available=2**30) == 1


def test_ctrl_c_stops_the_server_and_its_kernels(app: Server) -> None:
    open_page(app)  # a kernel to shut down
    app.process.send_signal(signal.SIGINT)
    assert app.process.wait(60) == 0

    def group_gone() -> bool:
        try:
            os.killpg(app.process.pid, 0)
        except ProcessLookupError:
            return True
        return False

    harness.wait_until(group_gone, 20, "kernels of the stopped app are still running")


# ---- finding 5: on the network -------------------------------------------------------------------
class StubServer:
    """Stands in for the Voila server: records its setup, says it listens, returns."""

    made: list[StubServer] = []

    def __init__(self, setup: Any, config: Any) -> None:
        self.setup, self.config = setup, config
        StubServer.made.append(self)

    def initialize(self, argv: list[str]) -> None:
        self.argv = argv

    def start(self) -> None:
        self.setup.on_listen()


def test_on_the_network_a_token_is_made_and_plain_http_warned_about(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture, tmp_path: Path
) -> None:
    from qcexplore.app import server

    monkeypatch.setattr(server, "AppServer", StubServer)
    study = serve.demo_study()
    lines: list[str] = []
    # 0.0.0.0 is only bound to find a free port (never listened on): nothing is served.
    serve.serve(study, host="0.0.0.0", announce=lines.append, max_pages=3)
    made = StubServer.made.pop()
    token = made.config.Voila.token
    assert len(token) >= 32 and lines[-1].endswith(f"/?token={token} (Ctrl-C stops)")
    assert token not in " ".join(made.argv)
    assert "plain HTTP" in capsys.readouterr().err and made.setup.compress
    assert made.setup.policy.host_allowed("192.168.1.20:80")  # served on every interface
    assert not made.setup.policy.host_allowed("evil.example:80")
    cert, key = harness.make_certificate(tmp_path)
    given = "g" * 24
    serve.serve(study, host="0.0.0.0", token=given, tls=serve.tls_context(cert, key),
                announce=lines.append, max_pages=3)  # fmt: skip
    made = StubServer.made.pop()
    assert made.config.Voila.token == given and given not in lines[-1]
    assert lines[-1].startswith("qcexplore app: https://")
    assert made.setup.policy.scheme == "https" and "plain HTTP" not in capsys.readouterr().err
    # On loopback no token is needed and none is made.
    serve.serve(study, announce=lines.append, max_pages=3)
    assert "token" not in StubServer.made.pop().config.Voila


# ---- the load test -----------------------------------------------------------------------------
VIEWERS = 20


def test_twenty_viewers_at_once(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    """20 pages opened together and kept connected: all served, the server answering the
    whole time; memory per kernel and in total reported (and within KERNEL_BYTES)."""
    data = tmp_path / "fills.csv"
    assert cli.main(["demo", "-o", str(data), "--days", "2"]) == 0
    capsys.readouterr()
    roles = ["--value", "net_g", "--subgroup", "round", "--time", "taken_at", "--factors",
             "crew", "shift", "nozzle", "--measured-by", "crew"]  # fmt: skip
    process, address = harness.launch(
        [str(data), *roles, "--max-pages", str(VIEWERS + 4), "--log-folder", str(tmp_path)],
        env=environment(tmp_path),
    )  # fmt: skip
    server = Server(process, address)
    probes: list[tuple[int, float]] = []
    done = threading.Event()

    def probe() -> None:  # the server keeps answering while the pages are opened
        while not done.is_set():
            started = time.monotonic()
            try:
                status = harness.fetch(address + STATIC, timeout=60).status
            except OSError:
                status = 0
            probes.append((status, time.monotonic() - started))
            done.wait(0.5)

    opened: list[tuple[int, str]] = []
    held: list[Any] = []
    lock = threading.Lock()

    def viewer() -> None:
        try:
            page = harness.fetch(address, timeout=180)
            kernel = KERNEL_ID.search(page.text).group(1) if page.status == 200 else ""
        except OSError as error:
            page, kernel = harness.Response(0, {}, str(error).encode()), ""
        status = 0
        if kernel:
            status, connection = server.websocket(
                f"api/kernels/{kernel}/channels", headers={"Origin": server.origin}
            )
            with lock:
                held.append(connection)
        with lock:
            opened.append((page.status, kernel if status == 101 else ""))

    watcher = threading.Thread(target=probe, daemon=True)
    watcher.start()
    started = time.monotonic()
    try:
        crowd = [threading.Thread(target=viewer, daemon=True) for _ in range(VIEWERS)]
        for person in crowd:
            person.start()
        for person in crowd:
            person.join(240)
        elapsed = time.monotonic() - started
        pids = server.kernels()
        sizes = [harness.memory(pid) for pid in pids]
        own = harness.memory(process.pid)
    finally:
        done.set()
        watcher.join(60)
        for connection in held:
            connection.close()
        harness.stop(process)
    rss = [s["rss"] for s in sizes]
    pss = [s["pss"] for s in sizes]
    mb = 2**20
    with capsys.disabled():
        print(f"\n{VIEWERS} viewers: all pages served and connected in {elapsed:.0f} s; "
              f"kernel memory each: resident {min(rss) / mb:.0f}-{max(rss) / mb:.0f} MB "
              f"(proportional {min(pss) / mb:.0f}-{max(pss) / mb:.0f} MB); in total "
              f"{sum(pss) / mb:.0f} MB proportional, {sum(rss) / mb:.0f} MB resident; the "
              f"server {own['rss'] / mb:.0f} MB; {len(probes)} probes, slowest "
              f"{max(t for _, t in probes):.1f} s")  # fmt: skip
    assert sorted(status for status, _ in opened) == [200] * VIEWERS
    assert all(kernel for _, kernel in opened) and len({k for _, k in opened}) == VIEWERS
    assert len(pids) == VIEWERS
    assert probes and all(status == 200 for status, _ in probes)
    assert max(rss) < kernels.KERNEL_BYTES  # the estimate the default cap is sized with
