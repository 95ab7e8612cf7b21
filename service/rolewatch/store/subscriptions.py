"""Webhook subscriptions in the database: the rows and every statement that reads or writes them.

The delivery layer (``rolewatch.delivery``) decides what a subscription may do; this module
only stores and fetches. Rows leave it as ``SubscriptionRecord``; the role filter, kept as a
JSON list in the ``roles`` column, leaves it decoded.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.engine import Connection

from rolewatch.store.schema import subscriptions


@dataclass(frozen=True)
class SubscriptionRecord:
    """One ``subscriptions`` row. ``roles`` is ``None`` when every role passes the filter."""

    id: str
    url: str = field(repr=False)  # may carry a receiver's token in its path
    format: str
    min_score: float
    roles: tuple[int, ...] | None
    secret: str = field(repr=False)
    previous_secret: str | None = field(repr=False)
    previous_secret_until_us: int | None
    created_us: int
    paused: bool
    paused_reason: str | None
    consecutive_failures: int
    deleted_us: int | None
    # The event types sent; None: alert.raised only (what subscriptions got before types).
    event_types: tuple[str, ...] | None = None


@dataclass(frozen=True)
class FailureCount:
    """The part of a subscription the delivery worker updates after each attempt."""

    consecutive_failures: int
    paused: bool


def _record(row: Any) -> SubscriptionRecord:
    return SubscriptionRecord(
        id=row.id,
        url=row.url,
        format=row.format,
        min_score=row.min_score,
        roles=tuple(json.loads(row.roles)) if row.roles else None,
        secret=row.secret,
        previous_secret=row.previous_secret,
        previous_secret_until_us=row.previous_secret_until_us,
        created_us=row.created_us,
        paused=bool(row.paused),
        paused_reason=row.paused_reason,
        consecutive_failures=row.consecutive_failures,
        deleted_us=row.deleted_us,
        event_types=tuple(json.loads(row.event_types)) if row.event_types else None,
    )


def insert_subscription(connection: Connection, record: SubscriptionRecord) -> None:
    """Store a new subscription (its role filter as a JSON list)."""
    connection.execute(
        subscriptions.insert().values(
            id=record.id,
            url=record.url,
            format=record.format,
            min_score=record.min_score,
            roles=json.dumps(list(record.roles)) if record.roles is not None else None,
            secret=record.secret,
            previous_secret=record.previous_secret,
            previous_secret_until_us=record.previous_secret_until_us,
            created_us=record.created_us,
            paused=record.paused,
            paused_reason=record.paused_reason,
            consecutive_failures=record.consecutive_failures,
            deleted_us=record.deleted_us,
            event_types=(
                json.dumps(list(record.event_types)) if record.event_types is not None else None
            ),
        )
    )


def find_live_subscription(
    connection: Connection, subscription_id: str, *, lock: bool = False
) -> SubscriptionRecord | None:
    """The subscription unless it is deleted or unknown; ``lock`` holds its row (``FOR
    UPDATE`` on PostgreSQL) until the transaction ends."""
    query = select(subscriptions).where(
        subscriptions.c.id == subscription_id, subscriptions.c.deleted_us.is_(None)
    )
    if lock:
        query = query.with_for_update()
    row = connection.execute(query).first()
    return None if row is None else _record(row)


def list_live_subscriptions(connection: Connection) -> list[SubscriptionRecord]:
    """Every subscription not deleted, oldest first."""
    rows = connection.execute(
        select(subscriptions)
        .where(subscriptions.c.deleted_us.is_(None))
        .order_by(subscriptions.c.created_us, subscriptions.c.id)
    )
    return [_record(row) for row in rows]


def mark_deleted(connection: Connection, subscription_id: str, *, now_us: int) -> None:
    """Mark the subscription deleted at ``now_us`` and wipe its secrets; the row stays, so
    past deliveries keep their owner."""
    connection.execute(
        update(subscriptions)
        .where(subscriptions.c.id == subscription_id)
        .values(deleted_us=now_us, secret="", previous_secret=None, previous_secret_until_us=None)
    )


def replace_secret(
    connection: Connection,
    subscription_id: str,
    *,
    secret: str,
    previous_secret: str,
    previous_until_us: int,
) -> None:
    """Sign with ``secret`` from now on, and with ``previous_secret`` too until
    ``previous_until_us``."""
    connection.execute(
        update(subscriptions)
        .where(subscriptions.c.id == subscription_id)
        .values(
            secret=secret,
            previous_secret=previous_secret,
            previous_secret_until_us=previous_until_us,
        )
    )


def unpause(connection: Connection, subscription_id: str) -> None:
    """Clear the pause and its reason, and start the failure count again from zero."""
    connection.execute(
        update(subscriptions)
        .where(subscriptions.c.id == subscription_id)
        .values(paused=False, paused_reason=None, consecutive_failures=0)
    )


def failure_count(connection: Connection, subscription_id: str) -> FailureCount | None:
    """The subscription's consecutive failures and whether it is paused (``None``: no row)."""
    row = connection.execute(
        select(subscriptions.c.consecutive_failures, subscriptions.c.paused).where(
            subscriptions.c.id == subscription_id
        )
    ).first()
    return None if row is None else FailureCount(row.consecutive_failures, bool(row.paused))


def reset_failures(connection: Connection, subscription_id: str) -> None:
    """A send succeeded: the consecutive failure count starts again from zero."""
    connection.execute(
        update(subscriptions)
        .where(subscriptions.c.id == subscription_id)
        .values(consecutive_failures=0)
    )


def record_failures(
    connection: Connection,
    subscription_id: str,
    *,
    consecutive_failures: int,
    pause_reason: str | None = None,
) -> None:
    """Store the new consecutive failure count; with ``pause_reason``, also pause the
    subscription for that reason."""
    values: dict[str, Any] = {"consecutive_failures": consecutive_failures}
    if pause_reason is not None:
        values.update(paused=True, paused_reason=pause_reason)
    connection.execute(
        update(subscriptions).where(subscriptions.c.id == subscription_id).values(**values)
    )
