"""Delivery records for the API: list, read with attempts, and redeliver."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select, update
from sqlalchemy.engine import Connection

from rolewatch.clock import to_rfc3339
from rolewatch.store.schema import deliveries, delivery_attempts, subscriptions

STATUSES = ("pending", "delivered", "failed")


class DeliveryNotFound(LookupError):
    """No delivery has this id."""


class CannotRedeliver(ValueError):
    """The delivery's subscription is deleted, so there is nowhere to send it."""


def delivery_view(row: Any) -> dict[str, Any]:
    """A delivery as the API shows it (no body, no secret)."""
    return {
        "id": row.id,
        "subscription_id": row.subscription_id,
        "alert_id": row.alert_id,
        "event_type": row.event_type,
        "status": row.status,
        "attempts": row.attempts,
        "created": to_rfc3339(row.created_us),
        "next_attempt": to_rfc3339(row.next_attempt_us) if row.status == "pending" else None,
        "delivered": to_rfc3339(row.delivered_us) if row.delivered_us else None,
        "last_status_code": row.last_status_code,
        "last_error": row.last_error,
    }


def list_deliveries(
    connection: Connection,
    *,
    status: str | None = None,
    subscription_id: str | None = None,
    limit: int = 100,
    before: str | None = None,
) -> list[dict[str, Any]]:
    """Deliveries newest first (ids are time-ordered ULIDs), optionally filtered."""
    query = select(deliveries).order_by(deliveries.c.id.desc()).limit(limit)
    if status is not None:
        query = query.where(deliveries.c.status == status)
    if subscription_id is not None:
        query = query.where(deliveries.c.subscription_id == subscription_id)
    if before is not None:
        query = query.where(deliveries.c.id < before)
    return [delivery_view(row) for row in connection.execute(query)]


def get_delivery(connection: Connection, delivery_id: str) -> dict[str, Any]:
    """One delivery with its attempts, oldest first (``DeliveryNotFound`` otherwise)."""
    row = connection.execute(select(deliveries).where(deliveries.c.id == delivery_id)).first()
    if row is None:
        raise DeliveryNotFound(f"no delivery {delivery_id!r}")
    view = delivery_view(row)
    attempts = connection.execute(
        select(delivery_attempts)
        .where(delivery_attempts.c.delivery_id == delivery_id)
        .order_by(delivery_attempts.c.id)
    )
    view["attempt_log"] = [
        {
            "time": to_rfc3339(a.attempted_us),
            "status_code": a.status_code,
            "error": a.error,
            "duration_ms": a.duration_ms,
        }
        for a in attempts
    ]
    return view


def redeliver(connection: Connection, delivery_id: str, *, now_us: int) -> dict[str, Any]:
    """Send a delivery again: back to ``pending``, due now, attempt count reset, same
    ``webhook-id`` and body. Its earlier attempts stay in the log."""
    row = connection.execute(
        select(deliveries.c.id, subscriptions.c.deleted_us)
        .join(subscriptions, subscriptions.c.id == deliveries.c.subscription_id)
        .where(deliveries.c.id == delivery_id)
    ).first()
    if row is None:
        raise DeliveryNotFound(f"no delivery {delivery_id!r}")
    if row.deleted_us is not None:
        raise CannotRedeliver(
            f"delivery {delivery_id!r} belongs to a deleted subscription; create a new one"
        )
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
    return get_delivery(connection, delivery_id)
