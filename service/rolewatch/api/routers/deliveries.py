"""Webhook deliveries: list and read (read scope), redeliver (admin scope)."""

from __future__ import annotations

from typing import Any, Literal

from fastapi import APIRouter, HTTPException, Query, status
from pydantic import BaseModel
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import AdminKey, ReadKey, StoreDep
from rolewatch.api.models import Problem
from rolewatch.clock import now_micros
from rolewatch.delivery import records
from rolewatch.store.db import write_transaction

router = APIRouter(tags=["deliveries"])
ERRORS: dict[int | str, dict[str, Any]] = {401: {"model": Problem}, 403: {"model": Problem}}
NOT_FOUND: dict[int | str, dict[str, Any]] = {**ERRORS, 404: {"model": Problem}}


class Delivery(BaseModel):
    id: str
    subscription_id: str
    alert_id: int | None
    event_type: str
    status: str
    attempts: int
    created: str
    next_attempt: str | None
    delivered: str | None
    last_status_code: int | None
    last_error: str | None


class Attempt(BaseModel):
    time: str
    status_code: int | None
    error: str | None
    duration_ms: float | None


class DeliveryDetail(Delivery):
    attempt_log: list[Attempt]


class DeliveryList(BaseModel):
    deliveries: list[Delivery]
    next_cursor: str | None


@router.get(
    "/v1/deliveries",
    response_model=DeliveryList,
    responses=ERRORS,
    summary="Webhook deliveries, newest first",
)
async def list_deliveries(
    store: StoreDep,
    _key: ReadKey,
    status_: Literal["pending", "delivered", "failed"] | None = Query(None, alias="status"),
    subscription: str | None = Query(None, max_length=40),
    limit: int = Query(100, ge=1, le=500),
    cursor: str | None = Query(
        None, max_length=64, description="next_cursor of the previous page."
    ),
) -> dict:
    def work():
        with store.connect() as connection:
            return records.list_deliveries(
                connection,
                status=status_,
                subscription_id=subscription,
                limit=limit,
                before=cursor,
            )

    found = await run_in_threadpool(work)
    return {"deliveries": found, "next_cursor": found[-1]["id"] if len(found) == limit else None}


@router.get(
    "/v1/deliveries/{delivery_id}",
    response_model=DeliveryDetail,
    responses=NOT_FOUND,
    summary="One delivery with its attempts",
)
async def get_delivery(store: StoreDep, _key: ReadKey, delivery_id: str) -> dict:
    def work():
        with store.connect() as connection:
            return records.get_delivery(connection, delivery_id)

    try:
        return await run_in_threadpool(work)
    except records.DeliveryNotFound as error:
        raise HTTPException(
            status.HTTP_404_NOT_FOUND, detail=f"no delivery {delivery_id}"
        ) from error


@router.post(
    "/v1/deliveries/{delivery_id}/redeliver",
    response_model=DeliveryDetail,
    responses={**NOT_FOUND, 409: {"model": Problem}},
    summary="Send a delivery again with the same webhook-id (admin)",
)
async def redeliver(store: StoreDep, _key: AdminKey, delivery_id: str) -> dict:
    def work():
        with write_transaction(store) as connection:
            return records.redeliver(connection, delivery_id, now_us=now_micros())

    try:
        return await run_in_threadpool(work)
    except records.DeliveryNotFound:
        raise HTTPException(
            status.HTTP_404_NOT_FOUND, detail=f"no delivery {delivery_id}"
        ) from None
    except records.CannotRedeliver as error:
        raise HTTPException(status.HTTP_409_CONFLICT, detail=str(error)) from None
