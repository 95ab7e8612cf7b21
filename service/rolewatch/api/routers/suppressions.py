"""The suppression list: accounts or id patterns that raise no alert until an expiry date.

Reading needs the read scope; adding and lifting entries need the review scope (admin
implies it). Entries are never deleted: lifting one ends it now and records who did.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, HTTPException, Path, Query, status
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import ReadKey, ReviewKey, SettingsDep, StoreDep
from rolewatch.api.models import Problem
from rolewatch.api.review_models import Suppression, SuppressionCreate, SuppressionList
from rolewatch.api.timeparams import time_param
from rolewatch.clock import now_micros
from rolewatch.review import suppression_list
from rolewatch.review.suppression import SuppressionError

router = APIRouter(tags=["review"])
ERRORS: dict[int | str, dict[str, Any]] = {401: {"model": Problem}, 403: {"model": Problem}}


@router.get(
    "/v1/suppressions",
    response_model=SuppressionList,
    summary="Suppression entries, newest first (those in force unless all=true)",
    responses=ERRORS,
)
async def list_suppressions(
    store: StoreDep,
    _key: ReadKey,
    all: bool = Query(False, description="Also lifted and expired entries."),
) -> dict[str, Any]:
    found = await run_in_threadpool(
        suppression_list.list_entries, store, now_us=now_micros(), include_inactive=all
    )
    return {"suppressions": found}


@router.post(
    "/v1/suppressions",
    status_code=201,
    response_model=Suppression,
    summary="Suppress an account or an id pattern until an expiry date (review scope)",
    responses={**ERRORS, 400: {"model": Problem}, 422: {"model": Problem}},
)
async def add_suppression(
    store: StoreDep, settings: SettingsDep, key: ReviewKey, body: SuppressionCreate
) -> dict[str, Any]:
    expires_us = time_param("expires", body.expires)
    try:
        return await run_in_threadpool(
            lambda: suppression_list.add_entry(
                store,
                settings,
                key,
                kind=body.kind,
                value=body.value,
                reason=body.reason,
                expires_us=expires_us,
                now_us=now_micros(),
            )
        )
    except SuppressionError as error:
        raise HTTPException(422, detail=str(error)) from None


@router.delete(
    "/v1/suppressions/{entry_id}",
    response_model=Suppression,
    summary="Lift a suppression now (review scope); the entry is kept, marked lifted",
    responses={**ERRORS, 404: {"model": Problem}, 409: {"model": Problem}},
)
async def lift_suppression(
    store: StoreDep, key: ReviewKey, entry_id: int = Path(ge=1, le=2**63 - 1)
) -> dict[str, Any]:
    try:
        return await run_in_threadpool(
            suppression_list.lift_entry, store, key, entry_id, now_us=now_micros()
        )
    except suppression_list.SuppressionNotFound as error:
        raise HTTPException(status.HTTP_404_NOT_FOUND, detail=str(error).strip("'\"")) from None
    except SuppressionError as error:
        raise HTTPException(status.HTTP_409_CONFLICT, detail=str(error)) from None
