"""Who may talk to the served app: Host and Origin checks in front of every request.

A web page the user visits elsewhere could otherwise reach the app through the user's
browser: with a DNS name of its own pointed at this machine (DNS rebinding) it would read the
page with its data and drive the kernel's widgets over the websocket. So every request (the
page, static files, the kernel API and its websockets) is checked before the app sees it:

- its Host must be a loopback address, ``localhost``, or the address or name the server was
  given with ``--host``; with an address for all interfaces (``0.0.0.0``, ``::``) also this
  machine's name and any address written as digits (no DNS name, so no rebinding);
- an Origin, which browsers send on websockets, posts and cross-site reads, must be the
  page's own: the same scheme, host and port as the request.

Anything else gets a plain 403 page, and nothing of the app.
"""

from __future__ import annotations

import html
import ipaddress
import socket
from collections.abc import Awaitable
from urllib.parse import urlsplit

from tornado import httputil

#: Hosts that listen on every interface.
WILDCARD_HOSTS = ("", "0.0.0.0", "::")


def host_name(header: str) -> str:
    """The host of a Host header, without its port or IPv6 brackets, in lower case.

    Examples
    --------
    >>> host_name("127.0.0.1:8866"), host_name("[::1]:8866"), host_name("Plant-PC")
    ('127.0.0.1', '::1', 'plant-pc')
    """
    header = header.strip().lower()
    if header.startswith("["):
        return header[1 : header.find("]")] if "]" in header else ""
    if header.count(":") == 1:
        return header.split(":")[0]
    return header


def _address(text: str) -> ipaddress.IPv4Address | ipaddress.IPv6Address | None:
    try:
        return ipaddress.ip_address(text)
    except ValueError:
        return None


class HostPolicy:
    """The names and addresses a server listening on ``host`` answers at.

    Examples
    --------
    >>> local = HostPolicy("127.0.0.1")
    >>> local.host_allowed("localhost:8866"), local.host_allowed("evil.example:8866")
    (True, False)
    >>> HostPolicy("0.0.0.0").host_allowed("192.168.1.20:8866")
    True
    >>> local.refusal({"Host": "127.0.0.1:8866", "Origin": "http://evil.example"})
    'Requests from other web pages are refused.'
    """

    def __init__(self, host: str, *, scheme: str = "http") -> None:
        self.scheme = scheme
        self.wildcard = host in WILDCARD_HOSTS
        names = {"localhost"}
        if self.wildcard:
            names.add(socket.gethostname().lower())
        else:
            names.add(host_name(host))
        self.names = frozenset(names)
        self.address = None if self.wildcard else _address(host_name(host))

    def host_allowed(self, header: str | None) -> bool:
        """Whether a request with this Host header is for this server."""
        if not header:
            return False
        name = host_name(header)
        if name in self.names:
            return True
        address = _address(name)
        if address is None:
            return False
        return address.is_loopback or self.wildcard or address == self.address

    def origin_allowed(self, origin: str | None, host: str) -> bool:
        """Whether a request with this Origin (None: not sent) comes from the app's page."""
        if origin is None:
            return True
        parts = urlsplit(origin.strip().lower())
        return parts.scheme == self.scheme and parts.netloc == host.strip().lower()

    def refusal(self, headers: httputil.HTTPHeaders | dict) -> str | None:
        """Why a request with these headers is refused (None: it is let in)."""
        host = headers.get("Host")
        if not self.host_allowed(host):
            return "This app answers only at its own address."
        origin = headers.get("Origin") or headers.get("Sec-WebSocket-Origin")
        if not self.origin_allowed(origin, host or ""):
            return "Requests from other web pages are refused."
        return None


class Guard(httputil.HTTPServerConnectionDelegate):
    """The app (a tornado Application) behind the checks of a :class:`HostPolicy`."""

    def __init__(self, app: httputil.HTTPServerConnectionDelegate, policy: HostPolicy) -> None:
        self.app = app
        self.policy = policy

    def start_request(
        self, server_conn: object, request_conn: httputil.HTTPConnection
    ) -> httputil.HTTPMessageDelegate:
        inner = self.app.start_request(server_conn, request_conn)
        return _Checked(inner, request_conn, self.policy)

    def on_close(self, server_conn: object) -> None:
        self.app.on_close(server_conn)


class _Checked(httputil.HTTPMessageDelegate):
    """One request: answered 403 here, or handed on to the app whole."""

    def __init__(
        self,
        inner: httputil.HTTPMessageDelegate,
        connection: httputil.HTTPConnection,
        policy: HostPolicy,
    ) -> None:
        self.inner = inner
        self.connection = connection
        self.policy = policy
        self.refused = False

    def headers_received(
        self,
        start_line: httputil.RequestStartLine | httputil.ResponseStartLine,
        headers: httputil.HTTPHeaders,
    ) -> Awaitable[None] | None:
        reason = self.policy.refusal(headers)
        if reason is None:
            return self.inner.headers_received(start_line, headers)
        self.refused = True
        body = b""
        if getattr(start_line, "method", "GET") != "HEAD":
            body = (
                "<!doctype html><html><head><meta charset='utf-8'><title>Refused</title></head>"
                f"<body><h1>403: refused</h1><p>{html.escape(reason)}</p></body></html>"
            ).encode()
        response = httputil.HTTPHeaders(
            {
                "Content-Type": "text/html; charset=utf-8",
                "Content-Length": str(len(body)),
                "Cache-Control": "no-store",
                "Connection": "close",
            }
        )
        self.connection.write_headers(
            httputil.ResponseStartLine("HTTP/1.1", 403, "Forbidden"), response, body
        )
        self.connection.finish()
        return None

    def data_received(self, chunk: bytes) -> Awaitable[None] | None:
        if not self.refused:
            return self.inner.data_received(chunk)
        return None

    def finish(self) -> None:
        if not self.refused:
            self.inner.finish()

    def on_connection_close(self) -> None:
        if not self.refused:
            self.inner.on_connection_close()
