"""The FastAPI application: ``create_app(settings)`` wires the store, routers, auth, metrics,
logging and the background scheduler (see docs/CONTRACTS.md "Service wiring")."""

from __future__ import annotations

import logging
import re
import time
import uuid
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import APIRouter, Depends, FastAPI, Request
from fastapi.responses import JSONResponse, PlainTextResponse, Response
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from rolewatch import metrics
from rolewatch.api.auth import check_scope
from rolewatch.api.deps import BearerCredentials, ReadKey, SettingsDep, StoreDep
from rolewatch.api.limits import BodyGate
from rolewatch.api.models import Health
from rolewatch.api.routers import (
    accounts,
    admin,
    alerts,
    deliveries,
    events,
    review,
    roles,
    subscriptions,
    suppressions,
    windows,
)
from rolewatch.config import Settings
from rolewatch.logs import REQUEST_ID
from rolewatch.store.summaries import ping
from rolewatch.web.pages import include_pages
from rolewatch.web.review_pages import include_review_pages

log = logging.getLogger("rolewatch.http")
_REQUEST_ID_OK = re.compile(r"[A-Za-z0-9._-]{1,64}")
SECURITY_HEADERS = {
    "Content-Security-Policy": "default-src 'self'; img-src 'self' data:; style-src 'self'; "
    "script-src 'self'; object-src 'none'; base-uri 'none'; form-action 'self'; "
    "frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    # same-origin, not no-referrer: with no-referrer browsers send "Origin: null" on the
    # pages' own form posts (Fetch standard, "append a request Origin header"), and the
    # sign-in and sign-out forms are checked by their Origin (web/session.py).
    "Referrer-Policy": "same-origin",
    "Cache-Control": "no-store",
}
OPENAPI_URL = "/openapi.json"

DESCRIPTION = """Streaming detection of structural role changes in an interaction graph.

Post events to `/v1/events`; windows close automatically; query account role histories,
roles, windows and alerts. Every route except `/healthz` (this document included) needs an
API key:
`Authorization: Bearer rwk_<key_id>_<secret>` (make one with `rolewatch keys create --scope read`).
Scopes: ingest, read, review, admin (admin implies the others; review implies read).

Alerts are leads for human review, not verdicts.
"""


class SecurityHeaders:
    """ASGI middleware: :data:`SECURITY_HEADERS` on every response (pages, API answers,
    errors, redirects, static files), replacing any value a route set.

    An unhandled error is answered here with Starlette's plain 500 (so it carries the headers
    too) and raised on for the server to log.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def send_with_headers(message: Message) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
                headers = MutableHeaders(scope=message)
                for name, value in SECURITY_HEADERS.items():
                    headers[name] = value
            await send(message)

        try:
            await self.app(scope, receive, send_with_headers)
        except Exception:
            if not started:
                error = PlainTextResponse("Internal Server Error", status_code=500)
                await error(scope, receive, send_with_headers)
            raise


class RequestContext:
    """ASGI middleware: request id (``X-Request-ID`` in and out), one log line per request
    and the request counter labelled with the route template (never the raw path)."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        incoming = next((v for k, v in scope["headers"] if k == b"x-request-id"), b"").decode(
            "latin-1"
        )
        request_id = incoming if _REQUEST_ID_OK.fullmatch(incoming) else uuid.uuid4().hex[:16]
        token = REQUEST_ID.set(request_id)
        started = time.perf_counter()
        status_code = 500

        async def send_with_id(message: Message) -> None:
            nonlocal status_code
            if message["type"] == "http.response.start":
                status_code = message["status"]
                message.setdefault("headers", [])
                message["headers"] = list(message["headers"]) + [
                    (b"x-request-id", request_id.encode())
                ]
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            route = scope.get("route")
            template = getattr(route, "path", None) or "(unmatched)"
            metrics.HTTP_REQUESTS.labels(scope["method"], template, str(status_code)).inc()
            log.info(
                "%s %s %s",
                scope["method"],
                template,
                status_code,
                extra={
                    "fields": {
                        "method": scope["method"],
                        "route": template,
                        "status": status_code,
                        "ms": round((time.perf_counter() - started) * 1000, 2),
                    }
                },
            )
            REQUEST_ID.reset(token)


service = APIRouter(tags=["service"])


@service.get(
    "/healthz",
    response_model=Health,
    summary="Liveness and database check (no key)",
)
async def healthz(store: StoreDep) -> dict[str, str] | JSONResponse:
    try:
        await run_in_threadpool(ping, store)
    except Exception:
        log.exception("health check: database unreachable")
        return JSONResponse({"status": "unavailable", "database": "unreachable"}, status_code=503)
    return {"status": "ok", "database": "ok"}


def metrics_access(settings: SettingsDep, store: StoreDep, credentials: BearerCredentials) -> None:
    """Admit anyone when ``metrics_public`` is set, else keys with the read scope."""
    if not settings.metrics_public:
        check_scope(store, credentials, "read")


@service.get(
    "/metrics",
    dependencies=[Depends(metrics_access)],
    summary="Prometheus text exposition (read scope unless metrics_public)",
    response_class=Response,
)
async def metrics_endpoint() -> Response:
    body, content_type = metrics.exposition()
    return Response(body, media_type=content_type)


@service.get(OPENAPI_URL, include_in_schema=False)
async def openapi_document(request: Request, _key: ReadKey) -> JSONResponse:
    """The OpenAPI document (read scope). No interactive documentation page is served: it
    would need scripts from outside the package; load this document into a local viewer."""
    return JSONResponse(request.app.openapi())


def create_app(settings: Settings, *, run_jobs: bool | None = None) -> FastAPI:
    """The rolewatch application for ``settings``.

    The lifespan opens the store (migrating it to head) and, when ``settings.role`` is
    ``all`` or ``worker`` (``run_jobs=None``) or ``run_jobs=True``, starts the scheduler that
    closes windows and delivers webhooks every ``tick_interval``; ``run_jobs=False`` never
    starts it. Shutdown waits for running jobs, then closes the store. Routes reach the
    settings and the store through :mod:`rolewatch.api.deps`.
    """
    from rolewatch.store.db import open_store

    jobs_wanted = settings.role in ("all", "worker") if run_jobs is None else run_jobs

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        engine = await run_in_threadpool(open_store, settings)
        app.state.engine = engine
        scheduler = None
        if jobs_wanted:
            from rolewatch.api.jobs import start_scheduler

            scheduler = start_scheduler(engine, settings)
        log.info(
            "rolewatch started", extra={"fields": {"role": settings.role, "jobs": bool(scheduler)}}
        )
        try:
            yield
        finally:
            if scheduler is not None:
                from rolewatch.api.jobs import stop_scheduler

                await run_in_threadpool(stop_scheduler, scheduler)
            engine.dispose()
            log.info("rolewatch stopped")

    app = FastAPI(
        title="rolewatch",
        version="0.1.0",
        description=DESCRIPTION,
        lifespan=lifespan,
        docs_url=None,
        redoc_url=None,
        openapi_url=None,
    )
    app.state.settings = settings
    app.add_middleware(BodyGate, settings=settings)  # inside SecurityHeaders: its refusals too
    app.add_middleware(SecurityHeaders)
    app.add_middleware(RequestContext)  # outermost: its log line and id cover the 500s too
    for module in (events, accounts, roles, windows, alerts, admin):
        app.include_router(module.router)
    app.include_router(subscriptions.router)
    app.include_router(deliveries.router)
    # Review: cases, notes, reviewers, figures, the suppression list, and their pages.
    app.include_router(review.router)
    app.include_router(suppressions.router)
    include_review_pages(app)
    include_pages(app)  # the HTML pages, their sign-in redirect and /static
    app.include_router(service)
    return app
