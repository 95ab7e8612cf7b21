"""Real HTTP receivers on loopback for the delivery tests (no mocks: the worker really sends).

``Receiver`` is a threaded ``http.server`` on 127.0.0.1 that records every request and answers
from a script of actions: an int status code, ``("sleep", seconds)`` to stall past the
sender's timeout, ``("trickle", seconds)`` to dribble the answer's headers a byte at a time,
or ``("redirect", location)``. It can be started late and stopped and
restarted on the same port, to play a receiver that is down.
"""

from __future__ import annotations

import json
import socket
import ssl
import threading
import time
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@dataclass
class Received:
    path: str
    headers: dict[str, str]
    body: bytes
    status: int


@dataclass
class Receiver:
    port: int = field(default_factory=free_port)
    script: list = field(default_factory=list)  # actions used in order; then `default`
    default: object = 200
    chat: bool = False  # True: a chat-style endpoint that takes only {"text": str}
    ssl_context: ssl.SSLContext | None = None
    received: list[Received] = field(default_factory=list)
    _server: ThreadingHTTPServer | None = None

    @property
    def url(self) -> str:
        scheme = "https" if self.ssl_context else "http"
        return f"{scheme}://127.0.0.1:{self.port}/hook"

    def start(self) -> Receiver:
        owner = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *args):  # keep test output quiet
                pass

            def do_POST(self):
                length = int(self.headers.get("content-length", 0))
                body = self.rfile.read(length)
                action = owner.script.pop(0) if owner.script else owner.default
                if owner.chat:
                    action = 200 if _chat_acceptable(self.headers, body) else 400
                if isinstance(action, tuple) and action[0] == "trickle":
                    # One header byte every 0.2 s: each read is quick, the whole answer slow.
                    owner.received.append(
                        Received(
                            self.path, {k.lower(): v for k, v in self.headers.items()}, body, 200
                        )
                    )
                    try:
                        self.wfile.write(b"HTTP/1.1 200 OK\r\nX-Slow: ")
                        until = time.monotonic() + action[1]
                        while time.monotonic() < until:
                            self.wfile.write(b"z")
                            time.sleep(0.2)
                        self.wfile.write(b"\r\ncontent-length: 0\r\n\r\n")
                    except OSError:
                        pass
                    return
                if isinstance(action, tuple) and action[0] == "sleep":
                    time.sleep(action[1])
                    action = 200
                location = None
                if isinstance(action, tuple) and action[0] == "redirect":
                    location, action = action[1], 302
                owner.received.append(
                    Received(
                        self.path, {k.lower(): v for k, v in self.headers.items()}, body, action
                    )
                )
                try:
                    reply = b'{"ok": true}' if action < 300 else b"receiver said no " * 100
                    self.send_response(action)
                    if location:
                        self.send_header("location", location)
                    self.send_header("content-length", str(len(reply)))
                    self.end_headers()
                    self.wfile.write(reply)
                except (BrokenPipeError, ConnectionResetError):
                    pass

        server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        server.daemon_threads = True
        if self.ssl_context is not None:
            server.socket = self.ssl_context.wrap_socket(server.socket, server_side=True)
        self._server = server
        threading.Thread(target=server.serve_forever, daemon=True).start()
        return self

    def stop(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._server = None


def _chat_acceptable(headers, body: bytes) -> bool:
    """What a minimal chat incoming-webhook demands: JSON object with exactly a string text."""
    if not headers.get("content-type", "").startswith("application/json"):
        return False
    try:
        document = json.loads(body)
    except ValueError:
        return False
    return (
        isinstance(document, dict)
        and set(document) == {"text"}
        and isinstance(document["text"], str)
        and 0 < len(document["text"]) <= 4000
    )
