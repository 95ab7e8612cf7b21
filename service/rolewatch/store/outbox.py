"""The webhook outbox in the database: ``deliveries`` and their ``delivery_attempts``.

Every statement on these two tables lives here, behind named functions; the delivery layer
(``rolewatch.delivery``) decides when to call them. Rows leave as typed records.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.engine import Connection

from rolewatch.store.schema import deliveries, delivery_attempts, subscriptions


@dataclass(frozen=True)
class NewDelivery:
    """A delivery to queue: ``pending``, no attempts yet, due at ``created_us``."""

    id: str  # the webhook-id, reused on every retry
    subscription_id: str
    alert_id: int | None  # None for test messages
    event_type: str
    body: str = field(repr=False)  # the exact bytes (UTF-8) signed and sent on every attempt
    created_us: int


@dataclass(frozen=True)
class DeliveryRecord:
    """One ``deliveries`` row without its body."""

    id: str
    subscription_id: str
    alert_id: int | None
    event_type: str
    status: str
    attempts: int
    created_us: int
    next_attempt_us: int
    delivered_us: int | None
    last_status_code: int | None
    last_error: str | None


@dataclass(frozen=True)
class AttemptRecord:
    """One ``delivery_attempts`` row: what one send of a delivery did."""

    attempted_us: int
    status_code: int | None
    error: str | None
    duration_ms: float | None


@dataclass(frozen=True)
class DeliveryOwner:
    """A delivery and the deletion time of the subscription it belongs to (``None``: live)."""

    delivery_id: str
    subscription_deleted_us: int | None


@dataclass(frozen=True)
class ClaimedRow:
    """A delivery claimed for one attempt, with what sending it needs from its subscription."""

    delivery_id: str
    subscription_id: str
    attempt: int  # the attempt this claim counts (1 for the first send)
    body: str = field(repr=False)
    url: str = field(repr=False)  # may carry a receiver's token in its path
    secret: str = field(repr=False)
    previous_secret: str | None = field(repr=False)
    previous_secret_until_us: int | None


@dataclass(frozen=True)
class DeliveryProgress:
    """Where a delivery stands now: its status and how many attempts it has counted."""

    status: str
    attempts: int


def insert_deliveries(connection: Connection, new: list[NewDelivery]) -> None:
    """Queue the deliveries in ``new`` (nothing to do when it is empty)."""
    if not new:
        return
    rows = [
        {
            "id": item.id,
            "subscription_id": item.subscription_id,
            "alert_id": item.alert_id,
            "event_type": item.event_type,
            "body": item.body,
            "status": "pending",
            "attempts": 0,
            "next_attempt_us": item.created_us,
            "created_us": item.created_us,
            "delivered_us": None,
            "last_status_code": None,
            "last_error": None,
        }
        for item in new
    ]
    connection.execute(deliveries.insert(), rows)


def _delivery(row: Any) -> DeliveryRecord:
    return DeliveryRecord(
        id=row.id,
        subscription_id=row.subscription_id,
        alert_id=row.alert_id,
        event_type=row.event_type,
        status=row.status,
        attempts=row.attempts,
        created_us=row.created_us,
        next_attempt_us=row.next_attempt_us,
        delivered_us=row.delivered_us,
        last_status_code=row.last_status_code,
        last_error=row.last_error,
    )


def list_deliveries(
    connection: Connection,
    *,
    status: str | None = None,
    subscription_id: str | None = None,
    limit: int = 100,
    before: str | None = None,
) -> list[DeliveryRecord]:
    """Deliveries newest first (ids are time-ordered ULIDs), optionally filtered by status,
    subscription, and ``before`` (only ids below it: the next page)."""
    query = select(deliveries).order_by(deliveries.c.id.desc()).limit(limit)
    if status is not None:
        query = query.where(deliveries.c.status == status)
    if subscription_id is not None:
        query = query.where(deliveries.c.subscription_id == subscription_id)
    if before is not None:
        query = query.where(deliveries.c.id < before)
    return [_delivery(row) for row in connection.execute(query)]


def find_delivery(connection: Connection, delivery_id: str) -> DeliveryRecord | None:
    """One delivery, or ``None`` when no delivery has this id."""
    row = connection.execute(select(deliveries).where(deliveries.c.id == delivery_id)).first()
    return None if row is None else _delivery(row)


def list_attempts(connection: Connection, delivery_id: str) -> list[AttemptRecord]:
    """The delivery's attempts, oldest first."""
    rows = connection.execute(
        select(delivery_attempts)
        .where(delivery_attempts.c.delivery_id == delivery_id)
        .order_by(delivery_attempts.c.id)
    )
    return [
        AttemptRecord(
            attempted_us=row.attempted_us,
            status_code=row.status_code,
            error=row.error,
            duration_ms=row.duration_ms,
        )
        for row in rows
    ]


def find_delivery_owner(connection: Connection, delivery_id: str) -> DeliveryOwner | None:
    """The delivery with its subscription's deletion time, or ``None`` for an unknown id."""
    row = connection.execute(
        select(deliveries.c.id, subscriptions.c.deleted_us)
        .join(subscriptions, subscriptions.c.id == deliveries.c.subscription_id)
        .where(deliveries.c.id == delivery_id)
    ).first()
    return None if row is None else DeliveryOwner(row.id, row.deleted_us)


def reset_for_redelivery(connection: Connection, delivery_id: str, *, now_us: int) -> None:
    """Back to ``pending``, due at ``now_us``, attempt count and last outcome cleared."""
    connection.execute(
        update(deliveries)
        .where(deliveries.c.id == delivery_id)
        .values(
            status="pending",
            attempts=0,
            next_attempt_us=now_us,
            last_error=None,
            last_status_code=None,
            delivered_us=None,
        )
    )


def fail_pending_of(connection: Connection, subscription_id: str, *, error: str) -> None:
    """Fail every pending delivery of the subscription with ``error`` as the last error."""
    connection.execute(
        update(deliveries)
        .where(deliveries.c.subscription_id == subscription_id, deliveries.c.status == "pending")
        .values(status="failed", last_error=error)
    )


def claim_due(
    connection: Connection, *, now_us: int, limit: int, lease_until_us: int
) -> list[ClaimedRow]:
    """Claim up to ``limit`` due pending deliveries of live, unpaused subscriptions, oldest
    due first: count the attempt and push ``next_attempt_us`` to ``lease_until_us`` so no
    other worker takes them while they are sent.

    Run it in a write transaction. On PostgreSQL the rows are taken ``FOR UPDATE SKIP
    LOCKED``: rows another worker is claiming are skipped, not waited for. SQLite has no row
    locks and the clause is left out; the write lock taken at ``BEGIN IMMEDIATE`` already
    lets one claimer in at a time.
    """
    query = (
        select(
            deliveries.c.id,
            deliveries.c.attempts,
            deliveries.c.body,
            deliveries.c.subscription_id,
            subscriptions.c.url,
            subscriptions.c.secret,
            subscriptions.c.previous_secret,
            subscriptions.c.previous_secret_until_us,
        )
        .join(subscriptions, subscriptions.c.id == deliveries.c.subscription_id)
        .where(
            deliveries.c.status == "pending",
            deliveries.c.next_attempt_us <= now_us,
            subscriptions.c.paused.is_(False),
            subscriptions.c.deleted_us.is_(None),
        )
        .order_by(deliveries.c.next_attempt_us, deliveries.c.id)
        .limit(limit)
        .with_for_update(of=deliveries, skip_locked=True)
    )
    claimed = []
    for row in connection.execute(query).all():
        attempt = row.attempts + 1
        connection.execute(
            update(deliveries)
            .where(deliveries.c.id == row.id)
            .values(attempts=attempt, next_attempt_us=lease_until_us)
        )
        claimed.append(
            ClaimedRow(
                delivery_id=row.id,
                subscription_id=row.subscription_id,
                attempt=attempt,
                body=row.body,
                url=row.url,
                secret=row.secret,
                previous_secret=row.previous_secret,
                previous_secret_until_us=row.previous_secret_until_us,
            )
        )
    return claimed


def release_claim(connection: Connection, delivery_id: str, *, attempt: int, now_us: int) -> None:
    """Undo the claim that counted ``attempt``: the count goes back one and the delivery is
    due at ``now_us``. Does nothing if the delivery has moved on since (another count)."""
    connection.execute(
        update(deliveries)
        .where(deliveries.c.id == delivery_id, deliveries.c.attempts == attempt)
        .values(attempts=attempt - 1, next_attempt_us=now_us)
    )


def insert_attempt(
    connection: Connection,
    delivery_id: str,
    *,
    attempted_us: int,
    status_code: int | None,
    error: str | None,
    duration_ms: float,
) -> None:
    """Log one send of the delivery."""
    connection.execute(
        delivery_attempts.insert().values(
            delivery_id=delivery_id,
            attempted_us=attempted_us,
            status_code=status_code,
            error=error,
            duration_ms=duration_ms,
        )
    )


def delivery_progress(connection: Connection, delivery_id: str) -> DeliveryProgress | None:
    """The delivery's status and attempt count now (``None``: no such delivery)."""
    row = connection.execute(
        select(deliveries.c.status, deliveries.c.attempts).where(deliveries.c.id == delivery_id)
    ).first()
    return None if row is None else DeliveryProgress(row.status, row.attempts)


def mark_delivered(
    connection: Connection,
    delivery_id: str,
    *,
    delivered_us: int,
    status_code: int | None,
    error: str | None,
) -> None:
    """The receiver accepted the delivery at ``delivered_us``."""
    connection.execute(
        update(deliveries)
        .where(deliveries.c.id == delivery_id)
        .values(
            status="delivered",
            delivered_us=delivered_us,
            last_status_code=status_code,
            last_error=error,
        )
    )


def mark_failed(
    connection: Connection, delivery_id: str, *, status_code: int | None, error: str | None
) -> None:
    """No more attempts: the delivery failed with this last outcome."""
    connection.execute(
        update(deliveries)
        .where(deliveries.c.id == delivery_id)
        .values(status="failed", last_status_code=status_code, last_error=error)
    )


def schedule_retry(
    connection: Connection,
    delivery_id: str,
    *,
    next_attempt_us: int,
    status_code: int | None,
    error: str | None,
) -> None:
    """The attempt failed; send again at ``next_attempt_us``."""
    connection.execute(
        update(deliveries)
        .where(deliveries.c.id == delivery_id)
        .values(next_attempt_us=next_attempt_us, last_status_code=status_code, last_error=error)
    )
