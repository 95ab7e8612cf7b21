"""The body gate: what a request must show before its body is read, and how much body and
how slow a body the service accepts.

Without it FastAPI reads a route's whole JSON body before any dependency, the key check
included, runs: a client without a key could make the server hold a body of any size. The
gate, an ASGI middleware in front of the routes, therefore

* refuses a body whose ``Content-Length`` exceeds the route's limit at once, before reading
  any of it (413): ``max_batch_bytes`` for ``POST /v1/events``, ``max_body_bytes`` for every
  other route;
* for ``/v1/`` routes, checks that a valid API key is presented before reading any body
  (401 otherwise); the scope is checked later by the route, as before;
* cuts a body sent without a length (chunked) as soon as it passes the limit (413);
* drops a body that stops arriving for ``http_body_timeout`` (408).

Every refusal closes the connection (``Connection: close``), so the rest of the body is
never read; so does any answer given before the route read the whole body.
"""

from __future__ import annotations

import asyncio
from collections.abc import MutableMapping
from typing import Any

from fastapi import HTTPException, status
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import Headers, MutableHeaders
from starlette.responses import JSONResponse
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from rolewatch.api.auth import MISSING_KEY, UNKNOWN_KEY, challenge
from rolewatch.config import Settings
from rolewatch.store.keys import verify_key

INGEST_PATH = "/v1/events"
#: ``scope["state"]`` entry holding ``(presented key, ApiKey)`` once the gate has checked it.
CHECKED_KEY = "rolewatch_checked_key"
_CLOSE = {"Connection": "close"}


def body_limit(settings: Settings, path: str) -> int:
    """The most bytes a request body to ``path`` may hold."""
    return settings.max_batch_bytes if path == INGEST_PATH else settings.max_body_bytes


def _refusal(status_code: int, detail: str, **headers: str) -> JSONResponse:
    return JSONResponse({"detail": detail}, status_code, headers={**_CLOSE, **headers})


def _declared_length(headers: Headers) -> int | None | str:
    """The Content-Length as a number, None when absent, or the problem with it."""
    declared = headers.get("content-length")
    if declared is None:
        return None
    declared = declared.strip()
    if not (declared.isascii() and declared.isdigit()) or len(declared) > 18:
        return "Content-Length must be a number of bytes in ASCII digits"
    return int(declared)


def bearer_token(headers: Headers) -> str | None:
    """The credential of an ``Authorization: Bearer ...`` header, or None."""
    scheme, _, credential = headers.get("authorization", "").partition(" ")
    if scheme.lower() != "bearer" or not credential.strip():
        return None
    return credential.strip()


class BodyGate:
    """ASGI middleware enforcing the rules in the module docstring."""

    def __init__(self, app: ASGIApp, settings: Settings) -> None:
        self.app = app
        self.settings = settings

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = Headers(scope=scope)
        declared = _declared_length(headers)
        chunked = "transfer-encoding" in headers
        if not chunked and not declared:  # no body (absent or zero length)
            await self.app(scope, receive, send)
            return
        refusal = await self._refusal(scope, headers, declared)
        if refusal is not None:
            await refusal(scope, receive, send)
            return
        await self._pass_on(scope, receive, send)

    async def _refusal(
        self, scope: Scope, headers: Headers, declared: int | None | str
    ) -> JSONResponse | None:
        """The answer that refuses this request before its body is read, or None."""
        if isinstance(declared, str):
            return _refusal(status.HTTP_400_BAD_REQUEST, declared)
        if scope["path"].startswith("/v1/"):
            refusal = await self._key_refusal(scope, headers)
            if refusal is not None:
                return refusal
        limit = body_limit(self.settings, scope["path"])
        if declared is not None and declared > limit:
            return _refusal(
                status.HTTP_413_CONTENT_TOO_LARGE,
                f"the body has {declared} bytes, at most {limit} allowed on this route; "
                "nothing was read",
            )
        return None

    async def _key_refusal(self, scope: Scope, headers: Headers) -> JSONResponse | None:
        """401 unless a valid API key is presented (its scope is the route's business)."""
        presented = bearer_token(headers)
        if presented is None:
            return _refusal(401, MISSING_KEY, **{"WWW-Authenticate": challenge(False)})
        engine = scope["app"].state.engine
        key = (
            await run_in_threadpool(verify_key, engine, presented) if len(presented) < 300 else None
        )
        if key is None:
            return _refusal(401, UNKNOWN_KEY, **{"WWW-Authenticate": challenge(True)})
        scope.setdefault("state", {})[CHECKED_KEY] = (presented, key)
        return None

    async def _pass_on(self, scope: Scope, receive: Receive, send: Send) -> None:
        """Run the route with a receive that counts, limits and times the body."""
        limit = body_limit(self.settings, scope["path"])
        timeout = self.settings.http_body_timeout.total_seconds()
        received = 0
        finished = False

        async def limited_receive() -> Message:
            nonlocal received, finished
            try:
                message = await asyncio.wait_for(receive(), timeout)
            except TimeoutError:
                raise HTTPException(
                    status.HTTP_408_REQUEST_TIMEOUT,
                    detail=f"the body stopped arriving for {timeout:g} s; nothing was stored",
                    headers=_CLOSE,
                ) from None
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                finished = not message.get("more_body", False)
                if received > limit:
                    raise HTTPException(
                        status.HTTP_413_CONTENT_TOO_LARGE,
                        detail=f"the body has more than {limit} bytes allowed on this route; "
                        "nothing was stored",
                        headers=_CLOSE,
                    )
            return message

        async def closing_send(message: Message) -> None:
            if message["type"] == "http.response.start" and not finished:
                MutableHeaders(scope=message)["connection"] = "close"
            await send(message)

        await self.app(scope, limited_receive, closing_send)


def checked_key(scope: MutableMapping[str, Any], presented: str) -> Any:
    """The key the gate already verified for this request when ``presented`` is the same
    credential, else None (the route then verifies it itself)."""
    found = scope.get("state", {}).get(CHECKED_KEY)
    if found is not None and found[0] == presented:
        return found[1]
    return None
