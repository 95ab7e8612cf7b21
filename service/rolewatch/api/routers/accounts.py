"""GET /v1/accounts/{account}/roles: an account's role history over closed windows."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, HTTPException, Query, status
from sqlalchemy.engine import Engine
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import ReadKey, SettingsDep, StoreDep
from rolewatch.api.models import AccountHistory, Problem
from rolewatch.api.timeparams import time_range
from rolewatch.clock import to_rfc3339
from rolewatch.config import Settings
from rolewatch.scale import history as archived_history
from rolewatch.store import queries

router = APIRouter(tags=["accounts"])


def history_document(
    engine: Engine, settings: Settings, account: str, from_us: int | None, to_us: int | None
) -> dict[str, Any] | None:
    """The API form of an account's history (windows whose memberships are kept only in the
    Parquet outputs included), or None when the account is unknown."""
    entries = archived_history.account_history(engine, settings, account, from_us, to_us)
    if not entries and not archived_history.account_known(engine, settings, account):
        return None
    names = queries.role_names(engine, (e["basis_version"] for e in entries))
    return {
        "account": account,
        "windows": [
            {
                "window_id": e["window_id"],
                "window_start": to_rfc3339(e["window_start_us"]),
                "window_end": to_rfc3339(e["window_end_us"]),
                "basis_version": e["basis_version"],
                "mixture": e["mixture"],
                "dominant_role": (
                    None
                    if e["dominant_role"] is None
                    else {
                        "id": e["dominant_role"],
                        "name": names.get(
                            (e["basis_version"], e["dominant_role"]),
                            f"role {e['dominant_role']}",
                        ),
                    }
                ),
                "score": e["score"],
                "status": e["status"],
                "activity": {
                    "events_out": e["events_out"],
                    "events_in": e["events_in"],
                    "counterparts": e["counterparts"],
                    "new_counterparts": e["new_counterparts"],
                },
                "reconstruction_error": e["error"],
            }
            for e in entries
        ],
    }


@router.get(
    "/v1/accounts/{account:path}/roles",
    response_model=AccountHistory,
    summary="An account's role history",
    responses={
        400: {"model": Problem},
        401: {"model": Problem},
        403: {"model": Problem},
        404: {"model": Problem},
    },
)
async def account_roles(
    store: StoreDep,
    settings: SettingsDep,
    _key: ReadKey,
    account: str,
    from_: str | None = Query(None, alias="from", description="RFC 3339; windows ending after it."),
    to: str | None = Query(None, description="RFC 3339; windows starting before it."),
) -> dict[str, Any]:
    """One entry per closed window in which the account was active, oldest first."""
    start, end = time_range(from_, to)
    document = await run_in_threadpool(history_document, store, settings, account, start, end)
    if document is None:
        raise HTTPException(
            status.HTTP_404_NOT_FOUND,
            detail=f"unknown account {account!r}: no stored event or closed window mentions it",
        )
    return document
