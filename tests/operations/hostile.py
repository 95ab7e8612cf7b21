"""Helpers of the hostile-input suite: a live ``rolewatch serve`` with keys of each scope, and
raw-socket exchanges for requests no well-behaved client library would send (a body that
stops half-way, a Content-Length far beyond what is sent, headers that never end).

Everything runs over real HTTP on loopback against the installed ``rolewatch`` command, on a
real SQLite file or the real PostgreSQL server (see ``conftest.py``).
"""

from __future__ import annotations

import re
import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

import httpx

from .servers import Server

# Short read timeouts so the suite can watch a half-sent request being dropped.
LIVE_SETTINGS = {
    "role": "api",
    "max_event_age": "365d",  # the default, which servers.py otherwise turns off
    "http_header_timeout": "2s",
    "http_body_timeout": "2s",
}


@dataclass
class Live:
    """A running server, its store URL and one key per scope."""

    server: Server
    database_url: str
    keys: dict[str, str] = field(default_factory=dict)

    @property
    def url(self) -> str:
        return self.server.url

    def headers(self, scope: str | None = "admin", **extra: str) -> dict[str, str]:
        found = {} if scope is None else {"Authorization": f"Bearer {self.keys[scope]}"}
        return {**found, **extra}

    def request(
        self, method: str, path: str, scope: str | None = "admin", **kwargs
    ) -> httpx.Response:
        headers = {**self.headers(scope), **kwargs.pop("headers", {})}
        return httpx.request(method, self.url + path, headers=headers, timeout=60, **kwargs)


def recent(hours: float = 1.0) -> str:
    """An RFC 3339 time ``hours`` before now (inside every default age limit)."""
    moment = datetime.now(UTC) - timedelta(hours=hours)
    return moment.strftime("%Y-%m-%dT%H:%M:%SZ")


def connect(live: Live) -> socket.socket:
    sock = socket.create_connection(("127.0.0.1", live.server.port), timeout=30)
    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    return sock


def head(method: str, path: str, headers: dict[str, str]) -> bytes:
    """An HTTP/1.1 request head with ``headers`` (Host added)."""
    lines = [f"{method} {path} HTTP/1.1", "Host: 127.0.0.1"]
    lines += [f"{name}: {value}" for name, value in headers.items()]
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1")


def read_response(sock: socket.socket, timeout: float) -> bytes:
    """What the server sends within ``timeout`` seconds (until it closes, or a full response
    head and the body its Content-Length announces). Empty when it sends nothing."""
    sock.settimeout(timeout)
    received = b""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            chunk = sock.recv(65536)
        except TimeoutError:
            break
        except ConnectionResetError:
            break
        if not chunk:
            break
        received += chunk
        if b"\r\n\r\n" in received:
            header, _, body = received.partition(b"\r\n\r\n")
            length = _content_length(header)
            if length is not None and len(body) >= length:
                break
    return received


def _content_length(header: bytes) -> int | None:
    for line in header.split(b"\r\n")[1:]:
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            return int(value.strip())
    return None


def status_of(response: bytes) -> int | None:
    """The status code of a raw response, or None when nothing came back."""
    if not response.startswith(b"HTTP/1.1 "):
        return None
    return int(response[9:12])


def closed_by_server(sock: socket.socket, within: float) -> bool:
    """True when the server closes the connection (EOF or reset) within ``within`` seconds,
    reading and dropping whatever it sends before."""
    sock.settimeout(1.0)
    deadline = time.monotonic() + within
    while time.monotonic() < deadline:
        try:
            chunk = sock.recv(65536)
        except TimeoutError:
            continue
        except (ConnectionResetError, BrokenPipeError):
            return True
        if not chunk:
            return True
    return False


_TOKEN = re.compile(r'name="token" value="([^"]*)"')


def form_token(html: str) -> str:
    """The value of the page's first hidden ``token`` field."""
    found = _TOKEN.search(html)
    assert found is not None, "the page has no form token"
    return found.group(1)


def sign_in_http(client: httpx.Client, key: str, next_path: str = "/", **headers: str):
    """Sign ``client`` in the way the sign-in form does: fetch the form (which sets its
    token cookie), then post the key with the form's token."""
    page = client.get("/signin")
    assert page.status_code == 200
    data = {"key": key, "next": next_path, "token": form_token(page.text)}
    return client.post("/signin", data=data, headers=headers, follow_redirects=False)


@contextmanager
def serve_in_thread(app) -> Iterator[str]:
    """Serve ``app`` with uvicorn on a loopback port in a thread of this process (for tests
    that change the process's environment, such as its resolver); yields the base URL."""
    import threading

    import uvicorn

    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", lifespan="on"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        assert time.monotonic() < deadline and thread.is_alive(), "the app did not start"
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{sock.getsockname()[1]}"
    finally:
        server.should_exit = True
        thread.join(timeout=15)
        sock.close()
