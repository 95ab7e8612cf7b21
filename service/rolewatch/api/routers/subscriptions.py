"""Webhook subscriptions (admin scope): create, list, read, delete, rotate, resume, test.

The signing secret (Standard Webhooks ``whsec_<base64>``) is shown once, in the answer to
create and rotate; no other answer carries it.
"""

from __future__ import annotations

import math
from typing import Any, Literal

from fastapi import APIRouter, HTTPException, Response, status
from pydantic import BaseModel, Field, field_validator
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import AdminKey, SettingsDep, StoreDep
from rolewatch.api.models import Problem
from rolewatch.clock import now_micros
from rolewatch.delivery import subscriptions as store
from rolewatch.delivery.outbox import enqueue_test
from rolewatch.delivery.urlguard import CheckedURL, UnsafeURL, check_url_for
from rolewatch.store.db import write_transaction

router = APIRouter(tags=["subscriptions"])
ERRORS: dict[int | str, dict[str, Any]] = {401: {"model": Problem}, 403: {"model": Problem}}
NOT_FOUND: dict[int | str, dict[str, Any]] = {**ERRORS, 404: {"model": Problem}}


class SubscriptionCreate(BaseModel):
    url: str = Field(..., max_length=2000, description="https:// URL that receives the webhooks.")
    format: Literal["json", "text"] = Field(
        "json",
        description='json: {"type", "timestamp", "data": alert}; text: {"text": summary} '
        "for chat channels.",
    )
    min_score: float = Field(0.0, ge=0, description="Only alerts scoring at least this much.")
    roles: list[int] | None = Field(
        None,
        max_length=1000,
        description="Only alerts whose new dominant role is one of these role ids.",
    )
    events: list[Literal["alert.raised", "case.updated"]] | None = Field(
        None,
        min_length=1,
        description="Event types to receive: alert.raised (new alerts) and/or case.updated "
        "(review changes of cases). Left out: alert.raised only.",
    )

    @field_validator("min_score")
    @classmethod
    def _finite(cls, value: float) -> float:
        if not math.isfinite(value):
            raise ValueError("min_score must be a finite number")
        return value


class Subscription(BaseModel):
    id: str
    url: str
    format: str
    min_score: float
    roles: list[int] | None
    events: list[str] = Field(["alert.raised"], description="Event types this URL receives.")
    created: str
    paused: bool
    paused_reason: str | None
    consecutive_failures: int
    rotating_until: str | None = Field(
        None, description="While set, the previous secret still signs beside the new one."
    )


class SubscriptionWithSecret(Subscription):
    secret: str = Field(
        ..., description="Signing secret, shown only now: keep it to verify webhook-signature."
    )


class SubscriptionList(BaseModel):
    subscriptions: list[Subscription]


class TestQueued(BaseModel):
    delivery_id: str
    status: str


def _now_us() -> int:
    return now_micros()


def _not_found(error: LookupError) -> HTTPException:
    return HTTPException(status.HTTP_404_NOT_FOUND, detail=str(error).strip("'\""))


@router.post(
    "/v1/subscriptions",
    status_code=201,
    response_model=SubscriptionWithSecret,
    summary="Subscribe a URL to alerts; the answer shows the signing secret once",
    responses={**ERRORS, 422: {"model": Problem}},
)
async def create(
    engine: StoreDep, settings: SettingsDep, _key: AdminKey, body: SubscriptionCreate
) -> dict:
    def work(checked: CheckedURL):
        with write_transaction(engine) as connection:
            return store.create_subscription(
                connection,
                settings,
                url=body.url,
                fmt=body.format,
                min_score=body.min_score,
                roles=body.roles,
                now_us=_now_us(),
                events=list(body.events) if body.events is not None else None,
                checked=checked,
            )

    try:
        # The DNS lookup happens before the transaction: a slow resolver must not hold the
        # store's write lock (on SQLite that would stall every ingest meanwhile).
        checked = await run_in_threadpool(check_url_for, body.url, settings)
        made = await run_in_threadpool(work, checked)
    except (UnsafeURL, ValueError) as error:
        raise HTTPException(422, detail=str(error)) from None
    return {**made.subscription, "secret": made.secret}


@router.get(
    "/v1/subscriptions",
    response_model=SubscriptionList,
    responses=ERRORS,
    summary="Every subscription (without secrets)",
)
async def list_all(engine: StoreDep, _key: AdminKey) -> dict:
    def work():
        with engine.connect() as connection:
            return store.list_subscriptions(connection)

    return {"subscriptions": await run_in_threadpool(work)}


@router.get(
    "/v1/subscriptions/{sub_id}",
    response_model=Subscription,
    responses=NOT_FOUND,
    summary="One subscription (without its secret)",
)
async def get_one(engine: StoreDep, _key: AdminKey, sub_id: str) -> dict:
    def work():
        with engine.connect() as connection:
            return store.get_subscription(connection, sub_id)

    try:
        return await run_in_threadpool(work)
    except store.SubscriptionNotFound as error:
        raise _not_found(error) from None


@router.delete(
    "/v1/subscriptions/{sub_id}",
    status_code=204,
    responses=NOT_FOUND,
    summary="Delete a subscription; its pending deliveries are dropped",
)
async def delete(engine: StoreDep, _key: AdminKey, sub_id: str) -> Response:
    def work():
        with write_transaction(engine) as connection:
            store.delete_subscription(connection, sub_id, now_us=_now_us())

    try:
        await run_in_threadpool(work)
    except store.SubscriptionNotFound as error:
        raise _not_found(error) from None
    return Response(status_code=204)


@router.post(
    "/v1/subscriptions/{sub_id}/rotate",
    response_model=SubscriptionWithSecret,
    responses=NOT_FOUND,
    summary="New signing secret (shown once); the old one keeps signing for the overlap",
)
async def rotate(engine: StoreDep, settings: SettingsDep, _key: AdminKey, sub_id: str) -> dict:
    def work():
        with write_transaction(engine) as connection:
            return store.rotate_secret(connection, sub_id, settings, now_us=_now_us())

    try:
        made = await run_in_threadpool(work)
    except store.SubscriptionNotFound as error:
        raise _not_found(error) from None
    return {**made.subscription, "secret": made.secret}


@router.post(
    "/v1/subscriptions/{sub_id}/resume",
    response_model=Subscription,
    responses=NOT_FOUND,
    summary="Unpause a subscription; held deliveries go out again",
)
async def resume(engine: StoreDep, _key: AdminKey, sub_id: str) -> dict:
    def work():
        with write_transaction(engine) as connection:
            return store.resume_subscription(connection, sub_id)

    try:
        return await run_in_threadpool(work)
    except store.SubscriptionNotFound as error:
        raise _not_found(error) from None


@router.post(
    "/v1/subscriptions/{sub_id}/test",
    status_code=202,
    response_model=TestQueued,
    responses=NOT_FOUND,
    summary="Queue a clearly marked test alert (event type alert.test)",
)
async def send_test(engine: StoreDep, settings: SettingsDep, _key: AdminKey, sub_id: str) -> dict:
    def work():
        with write_transaction(engine) as connection:
            return enqueue_test(connection, settings, sub_id, now_us=_now_us())

    try:
        delivery_id = await run_in_threadpool(work)
    except store.SubscriptionNotFound as error:
        raise _not_found(error) from None
    return {"delivery_id": delivery_id, "status": "pending"}
