"""GET /v1/alerts (filtered, paged newest first) and GET /v1/alerts/{id}."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, HTTPException, Path, Query, status
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import ReadKey, StoreDep
from rolewatch.api.integers import stored_integer
from rolewatch.api.models import Alert, AlertsPage, Problem
from rolewatch.api.timeparams import time_range
from rolewatch.store import queries

router = APIRouter(tags=["alerts"])


@router.get(
    "/v1/alerts",
    response_model=AlertsPage,
    summary="Alerts, newest first",
    responses={400: {"model": Problem}, 401: {"model": Problem}, 403: {"model": Problem}},
)
async def get_alerts(
    store: StoreDep,
    _key: ReadKey,
    from_: str | None = Query(
        None, alias="from", description="RFC 3339; windows ending at or after it."
    ),
    to: str | None = Query(None, description="RFC 3339; windows ending before it."),
    account: str | None = Query(None, max_length=200),
    min_score: float | None = Query(None, ge=0),
    limit: int = Query(50, ge=1, le=500),
    cursor: str | None = Query(None, description="next_cursor of the previous page."),
) -> dict[str, Any]:
    """Alerts are leads for human review, not verdicts."""
    start, end = time_range(from_, to)
    after = None
    if cursor:
        after = stored_integer(cursor, low=1)
        if after is None:
            raise HTTPException(
                status.HTTP_400_BAD_REQUEST,
                detail="cursor: use the next_cursor value of a previous page",
            )
    filters = queries.AlertFilters(from_us=start, to_us=end, account=account, min_score=min_score)
    found, next_cursor = await run_in_threadpool(queries.list_alerts, store, filters, limit, after)
    return {"alerts": found, "next_cursor": None if next_cursor is None else str(next_cursor)}


@router.get(
    "/v1/alerts/{alert_id}",
    response_model=Alert,
    summary="One alert with its evidence",
    responses={401: {"model": Problem}, 403: {"model": Problem}, 404: {"model": Problem}},
)
async def get_alert(
    store: StoreDep, _key: ReadKey, alert_id: int = Path(ge=1, le=2**63 - 1)
) -> dict[str, Any]:
    found = await run_in_threadpool(queries.get_alert, store, alert_id)
    if found is None:
        raise HTTPException(status.HTTP_404_NOT_FOUND, detail=f"no alert {alert_id}")
    return found
