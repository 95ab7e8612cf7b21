"""Webhook subscriptions in the store: create, list, read, delete, rotate, pause and resume.

The signing secret is returned only by ``create_subscription`` and ``rotate_secret``; every
other view goes through ``public_view``, which leaves the secrets out.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.engine import Connection

from rolewatch.clock import to_rfc3339
from rolewatch.delivery.ids import subscription_id
from rolewatch.delivery.signing import new_secret
from rolewatch.delivery.urlguard import Resolver, check_url_for
from rolewatch.store.schema import deliveries, subscriptions

FORMATS = ("json", "text")


class SubscriptionNotFound(LookupError):
    """No live subscription has this id."""


@dataclass(frozen=True)
class NewSecret:
    """A subscription view together with the secret shown this once."""

    subscription: dict[str, Any]
    secret: str


def public_view(row: Any) -> dict[str, Any]:
    """The subscription as the API shows it: no secrets, times in RFC 3339."""
    row = row._mapping if hasattr(row, "_mapping") else row
    return {
        "id": row["id"],
        "url": row["url"],
        "format": row["format"],
        "min_score": row["min_score"],
        "roles": json.loads(row["roles"]) if row["roles"] else None,
        "created": to_rfc3339(row["created_us"]),
        "paused": bool(row["paused"]),
        "paused_reason": row["paused_reason"],
        "consecutive_failures": row["consecutive_failures"],
        "rotating_until": (
            to_rfc3339(row["previous_secret_until_us"])
            if row["previous_secret"] and row["previous_secret_until_us"]
            else None
        ),
    }


def active_secrets(row: Any, now_us: int) -> list[str]:
    """Secrets that sign a message sent at ``now_us``: the current one, and the previous one
    while its rotation overlap lasts."""
    row = row._mapping if hasattr(row, "_mapping") else row
    found = [row["secret"]]
    until = row["previous_secret_until_us"]
    if row["previous_secret"] and until is not None and now_us < until:
        found.append(row["previous_secret"])
    return found


def _validate(fmt: str, min_score: float, roles: list[int] | None) -> None:
    if fmt not in FORMATS:
        raise ValueError(f"format must be one of {', '.join(FORMATS)}, not {fmt!r}")
    if not (min_score >= 0):  # also refuses NaN
        raise ValueError("min_score must be a number ≥ 0")
    if roles is not None and not all(isinstance(r, int) and not isinstance(r, bool) for r in roles):
        raise ValueError("roles must be a list of integer role ids")
    if roles is not None and not roles:
        raise ValueError("roles must list at least one role id, or be left out for every role")


def create_subscription(
    connection: Connection,
    settings,
    *,
    url: str,
    fmt: str = "json",
    min_score: float = 0.0,
    roles: list[int] | None = None,
    now_us: int,
    resolver: Resolver | None = None,
) -> NewSecret:
    """Check ``url`` (``UnsafeURL`` on refusal), store the subscription, return it with its secret."""
    _validate(fmt, min_score, roles)
    check_url_for(url, settings, resolver)
    secret = new_secret()
    values = {
        "id": subscription_id(),
        "url": url,
        "format": fmt,
        "min_score": float(min_score),
        "roles": json.dumps(sorted(set(roles))) if roles is not None else None,
        "secret": secret,
        "previous_secret": None,
        "previous_secret_until_us": None,
        "created_us": now_us,
        "paused": False,
        "paused_reason": None,
        "consecutive_failures": 0,
        "deleted_us": None,
    }
    connection.execute(subscriptions.insert().values(**values))
    return NewSecret(public_view(values), secret)


def _live(connection: Connection, sub_id: str, *, lock: bool = False):
    query = select(subscriptions).where(
        subscriptions.c.id == sub_id, subscriptions.c.deleted_us.is_(None)
    )
    if lock:
        query = query.with_for_update()
    row = connection.execute(query).first()
    if row is None:
        raise SubscriptionNotFound(f"no subscription {sub_id!r}")
    return row


def get_subscription(connection: Connection, sub_id: str) -> dict[str, Any]:
    """The public view of one live subscription (``SubscriptionNotFound`` otherwise)."""
    return public_view(_live(connection, sub_id))


def list_subscriptions(connection: Connection) -> list[dict[str, Any]]:
    """Public views of every live subscription, oldest first."""
    rows = connection.execute(
        select(subscriptions)
        .where(subscriptions.c.deleted_us.is_(None))
        .order_by(subscriptions.c.created_us, subscriptions.c.id)
    )
    return [public_view(row) for row in rows]


def delete_subscription(connection: Connection, sub_id: str, *, now_us: int) -> None:
    """Delete a subscription: it gets no new deliveries and its pending ones are failed.

    The row is kept (marked deleted, secrets wiped) so past deliveries keep their owner.
    """
    _live(connection, sub_id, lock=True)
    connection.execute(
        update(subscriptions)
        .where(subscriptions.c.id == sub_id)
        .values(deleted_us=now_us, secret="", previous_secret=None, previous_secret_until_us=None)
    )
    connection.execute(
        update(deliveries)
        .where(deliveries.c.subscription_id == sub_id, deliveries.c.status == "pending")
        .values(status="failed", last_error="subscription deleted")
    )


def rotate_secret(connection: Connection, sub_id: str, settings, *, now_us: int) -> NewSecret:
    """Give the subscription a new secret; the old one keeps signing for ``secret_overlap``."""
    row = _live(connection, sub_id, lock=True)
    secret = new_secret()
    until = now_us + int(settings.secret_overlap.total_seconds() * 1_000_000)
    connection.execute(
        update(subscriptions)
        .where(subscriptions.c.id == sub_id)
        .values(secret=secret, previous_secret=row.secret, previous_secret_until_us=until)
    )
    return NewSecret(public_view(_live(connection, sub_id)), secret)


def pause_subscription(connection: Connection, sub_id: str, reason: str) -> None:
    """Stop sending to the subscription until an admin resumes it."""
    connection.execute(
        update(subscriptions)
        .where(subscriptions.c.id == sub_id)
        .values(paused=True, paused_reason=reason)
    )


def resume_subscription(connection: Connection, sub_id: str) -> dict[str, Any]:
    """Unpause the subscription and reset its failure count; queued deliveries go out again."""
    _live(connection, sub_id, lock=True)
    connection.execute(
        update(subscriptions)
        .where(subscriptions.c.id == sub_id)
        .values(paused=False, paused_reason=None, consecutive_failures=0)
    )
    return public_view(_live(connection, sub_id))
