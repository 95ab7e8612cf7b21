"""The FastAPI application: ``create_app(settings)`` wires the store, routers, auth, metrics,
logging and the background scheduler (see docs/CONTRACTS.md "Service wiring")."""

from __future__ import annotations

import logging
import re
import time
import uuid
from contextlib import asynccontextmanager

from fastapi import Depends, FastAPI, Request
from fastapi.responses import JSONResponse, Response
from fastapi.security import HTTPAuthorizationCredentials
from sqlalchemy import text
from starlette.concurrency import run_in_threadpool

from rolewatch import metrics
from rolewatch.api.auth import _bearer, require_scope
from rolewatch.api.models import Health
from rolewatch.api.routers import (
    accounts,
    admin,
    alerts,
    deliveries,
    events,
    roles,
    subscriptions,
    windows,
)
from rolewatch.logs import REQUEST_ID
from rolewatch.web.pages import include_pages

log = logging.getLogger("rolewatch.http")
_REQUEST_ID_OK = re.compile(r"[A-Za-z0-9._-]{1,64}")

DESCRIPTION = """Streaming detection of structural role changes in an interaction graph.

Post events to `/v1/events`; windows close automatically; query account role histories,
roles, windows and alerts. Every route except `/healthz` needs an API key:
`Authorization: Bearer rwk_<key_id>_<secret>` (make one with `rolewatch keys create --scope read`).
Scopes: ingest, read, admin (admin implies the others).

Alerts are leads for human review, not verdicts.
"""


class RequestContext:
    """ASGI middleware: request id (``X-Request-ID`` in and out), one log line per request
    and the request counter labelled with the route template (never the raw path)."""

    def __init__(self, app) -> None:
        self.app = app

    async def __call__(self, scope, receive, send):
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

        async def send_with_id(message):
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


def create_app(settings, *, run_jobs: bool | None = None) -> FastAPI:
    """The rolewatch application for ``settings``.

    The lifespan opens the store (migrating it to head) and, when ``settings.role`` is
    ``all`` or ``worker`` (``run_jobs=None``) or ``run_jobs=True``, starts the scheduler that
    closes windows and delivers webhooks every ``tick_interval``; ``run_jobs=False`` never
    starts it. Shutdown waits for running jobs, then closes the store.
    """
    from rolewatch.store.db import open_store

    jobs_wanted = settings.role in ("all", "worker") if run_jobs is None else run_jobs

    @asynccontextmanager
    async def lifespan(app: FastAPI):
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
        docs_url="/docs",
        openapi_url="/openapi.json",
    )
    app.state.settings = settings
    app.add_middleware(RequestContext)
    for module in (events, accounts, roles, windows, alerts, admin):
        app.include_router(module.router)
    app.include_router(subscriptions.router)
    app.include_router(deliveries.router)
    include_pages(app)  # the HTML pages and /static

    @app.get(
        "/healthz",
        response_model=Health,
        tags=["service"],
        summary="Liveness and database check (no key)",
    )
    async def healthz(request: Request):
        def check() -> bool:
            try:
                with request.app.state.engine.connect() as connection:
                    connection.execute(text("SELECT 1"))
                return True
            except Exception:
                log.exception("health check: database unreachable")
                return False

        if await run_in_threadpool(check):
            return {"status": "ok", "database": "ok"}
        return JSONResponse({"status": "unavailable", "database": "unreachable"}, status_code=503)

    read_scope = require_scope("read")

    def metrics_access(
        request: Request, credentials: HTTPAuthorizationCredentials | None = Depends(_bearer)
    ):
        if not settings.metrics_public:
            read_scope(request, credentials)

    @app.get(
        "/metrics",
        tags=["service"],
        dependencies=[Depends(metrics_access)],
        summary="Prometheus text exposition (read scope unless metrics_public)",
        response_class=Response,
    )
    async def metrics_endpoint():
        body, content_type = metrics.exposition()
        return Response(body, media_type=content_type)

    return app
