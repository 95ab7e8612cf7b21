"""Webhook subscriptions: create, list, read, delete, rotate and resume.

The rows and their statements live in ``rolewatch.store.subscriptions``; this module holds
the rules (validation, URL checks, secret rotation, what the API shows). Pausing happens in
the delivery worker, which counts failures.

The signing secret is returned only by ``create_subscription`` and ``rotate_secret``; every
other view goes through ``public_view``, which leaves the secrets out.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from rolewatch.clock import to_rfc3339
from rolewatch.config import Settings
from rolewatch.delivery.ids import subscription_id
from rolewatch.delivery.signing import new_secret
from rolewatch.delivery.urlguard import CheckedURL, Resolver, check_url_for
from rolewatch.store import outbox as outbox_store
from rolewatch.store import subscriptions as subscription_store
from rolewatch.store.db import Connection
from rolewatch.store.subscriptions import SubscriptionRecord

FORMATS = ("json", "text")
DELETED_ERROR = "subscription deleted"
# Event types a subscription can choose; one made without a choice gets alerts only.
EVENT_TYPES = ("alert.raised", "case.updated")
DEFAULT_EVENT_TYPES = ("alert.raised",)


def event_types_of(subscription: SubscriptionRecord) -> tuple[str, ...]:
    """The event types the subscription receives (alerts only when it never chose)."""
    return subscription.event_types or DEFAULT_EVENT_TYPES


def wants(subscription: SubscriptionRecord, event_type: str) -> bool:
    """True when the subscription receives events of ``event_type``."""
    return event_type in event_types_of(subscription)


class SubscriptionNotFound(LookupError):
    """No live subscription has this id."""


@dataclass(frozen=True)
class NewSecret:
    """A subscription view together with the secret shown this once."""

    subscription: dict[str, Any]
    secret: str


def public_view(subscription: SubscriptionRecord) -> dict[str, Any]:
    """The subscription as the API shows it: no secrets, times in RFC 3339."""
    return {
        "id": subscription.id,
        "url": subscription.url,
        "format": subscription.format,
        "min_score": subscription.min_score,
        "roles": list(subscription.roles) if subscription.roles is not None else None,
        "events": list(event_types_of(subscription)),
        "created": to_rfc3339(subscription.created_us),
        "paused": subscription.paused,
        "paused_reason": subscription.paused_reason,
        "consecutive_failures": subscription.consecutive_failures,
        "rotating_until": (
            to_rfc3339(subscription.previous_secret_until_us)
            if subscription.previous_secret and subscription.previous_secret_until_us
            else None
        ),
    }


def active_secrets(
    secret: str, previous_secret: str | None, previous_until_us: int | None, now_us: int
) -> list[str]:
    """Secrets that sign a message sent at ``now_us``: the current one, and the previous one
    while its rotation overlap lasts."""
    found = [secret]
    if previous_secret and previous_until_us is not None and now_us < previous_until_us:
        found.append(previous_secret)
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


def _check_events(events: list[str] | None) -> tuple[str, ...]:
    if events is None:
        return DEFAULT_EVENT_TYPES
    unknown = [event for event in events if event not in EVENT_TYPES]
    if unknown or not events:
        raise ValueError(f"events must list one or more of {', '.join(EVENT_TYPES)}")
    return tuple(event for event in EVENT_TYPES if event in events)


def create_subscription(
    connection: Connection,
    settings: Settings,
    *,
    url: str,
    fmt: str = "json",
    min_score: float = 0.0,
    roles: list[int] | None = None,
    now_us: int,
    resolver: Resolver | None = None,
    events: list[str] | None = None,
    checked: CheckedURL | None = None,
) -> NewSecret:
    """Check ``url`` (``UnsafeURL`` on refusal), store the subscription, return it with its
    secret. ``events`` chooses the event types sent (default: alerts only). ``checked`` is the
    result of :func:`check_url_for` when the caller checked the URL before its transaction
    (the DNS lookup must not hold the write lock)."""
    _validate(fmt, min_score, roles)
    event_types = _check_events(events)
    if checked is None or checked.url != url:
        check_url_for(url, settings, resolver)
    secret = new_secret()
    record = SubscriptionRecord(
        id=subscription_id(),
        url=url,
        format=fmt,
        min_score=float(min_score),
        roles=tuple(sorted(set(roles))) if roles is not None else None,
        secret=secret,
        previous_secret=None,
        previous_secret_until_us=None,
        created_us=now_us,
        paused=False,
        paused_reason=None,
        consecutive_failures=0,
        deleted_us=None,
        event_types=event_types,
    )
    subscription_store.insert_subscription(connection, record)
    return NewSecret(public_view(record), secret)


def live_subscription(
    connection: Connection, sub_id: str, *, lock: bool = False
) -> SubscriptionRecord:
    """The subscription unless deleted or unknown (``SubscriptionNotFound``); ``lock`` holds
    its row until the transaction ends."""
    found = subscription_store.find_live_subscription(connection, sub_id, lock=lock)
    if found is None:
        raise SubscriptionNotFound(f"no subscription {sub_id!r}")
    return found


def get_subscription(connection: Connection, sub_id: str) -> dict[str, Any]:
    """The public view of one live subscription (``SubscriptionNotFound`` otherwise)."""
    return public_view(live_subscription(connection, sub_id))


def list_subscriptions(connection: Connection) -> list[dict[str, Any]]:
    """Public views of every live subscription, oldest first."""
    return [public_view(found) for found in subscription_store.list_live_subscriptions(connection)]


def delete_subscription(connection: Connection, sub_id: str, *, now_us: int) -> None:
    """Delete a subscription: it gets no new deliveries and its pending ones are failed.

    The row is kept (marked deleted, secrets wiped) so past deliveries keep their owner.
    """
    live_subscription(connection, sub_id, lock=True)
    subscription_store.mark_deleted(connection, sub_id, now_us=now_us)
    outbox_store.fail_pending_of(connection, sub_id, error=DELETED_ERROR)


def rotate_secret(
    connection: Connection, sub_id: str, settings: Settings, *, now_us: int
) -> NewSecret:
    """Give the subscription a new secret; the old one keeps signing for ``secret_overlap``."""
    current = live_subscription(connection, sub_id, lock=True)
    secret = new_secret()
    until = now_us + int(settings.secret_overlap.total_seconds() * 1_000_000)
    subscription_store.replace_secret(
        connection, sub_id, secret=secret, previous_secret=current.secret, previous_until_us=until
    )
    return NewSecret(public_view(live_subscription(connection, sub_id)), secret)


def resume_subscription(connection: Connection, sub_id: str) -> dict[str, Any]:
    """Unpause the subscription and reset its failure count; queued deliveries go out again."""
    live_subscription(connection, sub_id, lock=True)
    subscription_store.unpause(connection, sub_id)
    return public_view(live_subscription(connection, sub_id))
