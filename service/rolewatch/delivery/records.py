"""Delivery records for the API: list, read with attempts, and redeliver."""

from __future__ import annotations

from typing import Any

from rolewatch.clock import to_rfc3339
from rolewatch.store import outbox as outbox_store
from rolewatch.store.db import Connection
from rolewatch.store.outbox import AttemptRecord, DeliveryRecord


class DeliveryNotFound(LookupError):
    """No delivery has this id."""


class CannotRedeliver(ValueError):
    """The delivery's subscription is deleted, so there is nowhere to send it."""


def delivery_view(delivery: DeliveryRecord) -> dict[str, Any]:
    """A delivery as the API shows it (no body, no secret)."""
    return {
        "id": delivery.id,
        "subscription_id": delivery.subscription_id,
        "alert_id": delivery.alert_id,
        "event_type": delivery.event_type,
        "status": delivery.status,
        "attempts": delivery.attempts,
        "created": to_rfc3339(delivery.created_us),
        "next_attempt": (
            to_rfc3339(delivery.next_attempt_us) if delivery.status == "pending" else None
        ),
        "delivered": to_rfc3339(delivery.delivered_us) if delivery.delivered_us else None,
        "last_status_code": delivery.last_status_code,
        "last_error": delivery.last_error,
    }


def attempt_view(attempt: AttemptRecord) -> dict[str, Any]:
    """One attempt as the API shows it."""
    return {
        "time": to_rfc3339(attempt.attempted_us),
        "status_code": attempt.status_code,
        "error": attempt.error,
        "duration_ms": attempt.duration_ms,
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
    found = outbox_store.list_deliveries(
        connection, status=status, subscription_id=subscription_id, limit=limit, before=before
    )
    return [delivery_view(delivery) for delivery in found]


def get_delivery(connection: Connection, delivery_id: str) -> dict[str, Any]:
    """One delivery with its attempts, oldest first (``DeliveryNotFound`` otherwise)."""
    delivery = outbox_store.find_delivery(connection, delivery_id)
    if delivery is None:
        raise DeliveryNotFound(f"no delivery {delivery_id!r}")
    view = delivery_view(delivery)
    attempts = outbox_store.list_attempts(connection, delivery_id)
    view["attempt_log"] = [attempt_view(attempt) for attempt in attempts]
    return view


def redeliver(connection: Connection, delivery_id: str, *, now_us: int) -> dict[str, Any]:
    """Send a delivery again: back to ``pending``, due now, attempt count reset, same
    ``webhook-id`` and body. Its earlier attempts stay in the log."""
    owner = outbox_store.find_delivery_owner(connection, delivery_id)
    if owner is None:
        raise DeliveryNotFound(f"no delivery {delivery_id!r}")
    if owner.subscription_deleted_us is not None:
        raise CannotRedeliver(
            f"delivery {delivery_id!r} belongs to a deleted subscription; create a new one"
        )
    outbox_store.reset_for_redelivery(connection, delivery_id, now_us=now_us)
    return get_delivery(connection, delivery_id)
