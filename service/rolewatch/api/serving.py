"""The HTTP server's connection protocol: uvicorn's httptools protocol with a deadline on
the request head.

uvicorn closes idle keep-alive connections, but a connection that is opened and never sends
a complete request head (request line and headers) stays open for ever, and enough of them
exhaust the server's sockets. This protocol gives every request head ``http_header_timeout``
from its first byte (or from the connection's opening) to arrive whole; otherwise it answers
408 and closes the connection. Slow bodies are the body gate's job
(:mod:`rolewatch.api.limits`, ``http_body_timeout``).
"""

from __future__ import annotations

import asyncio

from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol

from rolewatch.config import Settings

_TIMEOUT_ANSWER = (
    b"HTTP/1.1 408 Request Timeout\r\n"
    b"content-type: text/plain; charset=utf-8\r\n"
    b"content-length: 40\r\n"
    b"connection: close\r\n"
    b"\r\n"
    b"the request head did not arrive in time\n"
)


class HeadDeadlineProtocol(HttpToolsProtocol):
    """HttpToolsProtocol that closes a connection whose request head is late."""

    header_timeout: float = 10.0
    _head_timer: asyncio.TimerHandle | None = None

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        self._arm_head_timer()

    def on_message_begin(self) -> None:
        super().on_message_begin()
        if self._head_timer is None:
            self._arm_head_timer()

    def on_headers_complete(self) -> None:
        self._disarm_head_timer()
        super().on_headers_complete()

    def connection_lost(self, exc: Exception | None) -> None:
        self._disarm_head_timer()
        super().connection_lost(exc)

    def _arm_head_timer(self) -> None:
        self._disarm_head_timer()
        self._head_timer = self.loop.call_later(self.header_timeout, self._head_too_late)

    def _disarm_head_timer(self) -> None:
        if self._head_timer is not None:
            self._head_timer.cancel()
            self._head_timer = None

    def _head_too_late(self) -> None:
        self._head_timer = None
        if self.transport.is_closing():
            return
        if self.cycle is None or self.cycle.response_complete:  # not in the middle of a response
            self.transport.write(_TIMEOUT_ANSWER)
        self.transport.close()


def http_protocol(settings: Settings) -> type[HeadDeadlineProtocol]:
    """The protocol class for ``uvicorn.run(..., http=...)`` with the configured deadline."""
    return type(
        "RolewatchHttpProtocol",
        (HeadDeadlineProtocol,),
        {"header_timeout": settings.http_header_timeout.total_seconds()},
    )
