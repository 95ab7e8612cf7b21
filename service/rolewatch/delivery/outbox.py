"""The delivery outbox: one ``deliveries`` row per (alert, matching subscription).

``enqueue_alerts`` runs inside the window's transaction, so alerts and their deliveries are
committed together or not at all. Each row holds the exact body bytes, built now, so every
retry sends identical bytes under the same ``webhook-id``; the worker only signs and sends.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

from rolewatch.clock import now_micros, to_rfc3339
from rolewatch.config import Settings
from rolewatch.delivery.ids import message_id
from rolewatch.delivery.payloads import ALERT_RAISED, ALERT_TEST, build_body
from rolewatch.delivery.subscriptions import live_subscription, wants
from rolewatch.store import outbox as outbox_store
from rolewatch.store import subscriptions as subscription_store
from rolewatch.store.db import Connection
from rolewatch.store.outbox import NewDelivery
from rolewatch.store.subscriptions import SubscriptionRecord


def matches(subscription: SubscriptionRecord, alert: dict[str, Any]) -> bool:
    """True when ``alert`` passes the subscription's filters: score at least ``min_score`` and,
    when a role list is set, the new dominant role (``role_after.id``) in it."""
    score = alert.get("score")
    if score is None or float(score) < float(subscription.min_score or 0.0):
        return False
    if subscription.roles is not None:
        role_after = (alert.get("role_after") or {}).get("id")
        return role_after in set(subscription.roles)
    return True


def _new_delivery(
    subscription: SubscriptionRecord,
    alert: dict[str, Any],
    event_type: str,
    now_us: int,
    case_url: str | None = None,
) -> NewDelivery:
    body = build_body(subscription.format, alert, event_type, now_us, case_url=case_url)
    return NewDelivery(
        id=message_id(now_us),
        subscription_id=subscription.id,
        alert_id=alert.get("id") if event_type == ALERT_RAISED else None,
        event_type=event_type,
        body=body.decode("utf-8"),
        created_us=now_us,
    )


def enqueue_alerts(
    connection: Connection,
    settings: Settings,
    alerts: Iterable[dict[str, Any]],
    *,
    now_us: int | None = None,
    case_urls: Mapping[int, str] | None = None,
) -> list[str]:
    """Queue one delivery per alert and live subscription whose filters it passes.

    ``alerts`` are dicts in the API alert form (docs/CONTRACTS.md). Paused subscriptions get
    their deliveries queued too; the worker holds them until the subscription is resumed.
    Only subscriptions that receive ``alert.raised`` get them; ``case_urls`` (alert id → the
    web address of its case) adds the case link to the text format. Returns the new delivery
    (``webhook-id``) ids. Runs in the caller's transaction.
    """
    alerts = list(alerts)
    if not alerts:
        return []
    now_us = now_micros() if now_us is None else now_us
    live = [
        subscription
        for subscription in subscription_store.list_live_subscriptions(connection)
        if wants(subscription, ALERT_RAISED)
    ]
    links = case_urls or {}
    new = [
        _new_delivery(subscription, alert, ALERT_RAISED, now_us, links.get(alert.get("id") or 0))
        for alert in alerts
        for subscription in live
        if matches(subscription, alert)
    ]
    outbox_store.insert_deliveries(connection, new)
    return [delivery.id for delivery in new]


def sample_alert(settings: Settings, now_us: int) -> dict[str, Any]:
    """A clearly fictional alert for ``POST /v1/subscriptions/{id}/test``."""
    base = settings.public_url.rstrip("/")
    week_us = 7 * 86_400 * 1_000_000
    end_us = now_us - now_us % week_us
    return {
        "id": 0,
        "account": "test-account",
        "window_id": 0,
        "window_start": to_rfc3339(end_us - week_us),
        "window_end": to_rfc3339(end_us),
        "created": to_rfc3339(now_us),
        "score": 1.0,
        "basis_version": "test",
        "role_before": {"id": 0, "name": "TEST role before"},
        "role_after": {"id": 1, "name": "TEST role after"},
        "headline": "TEST role before → TEST role after: sends to 2 → 30 accounts",
        "evidence": {
            "test": True,
            "notice": "TEST message: no account changed role. Alerts are leads for human "
            "review, not verdicts.",
            "feature_moves": [{"feature": "out_degree", "before": 2.0, "after": 30.0}],
            "activity": {"counterparts": 30, "new_counterparts": 28},
            "change": "sends to 2 → 30 accounts",
            "page_url": f"{base}/accounts/test-account",
        },
    }


def enqueue_test(
    connection: Connection, settings: Settings, subscription_id: str, *, now_us: int
) -> str:
    """Queue a test delivery (event type ``alert.test``) to one subscription, filters aside."""
    subscription = live_subscription(connection, subscription_id)
    new = _new_delivery(subscription, sample_alert(settings, now_us), ALERT_TEST, now_us)
    outbox_store.insert_deliveries(connection, [new])
    return new.id
