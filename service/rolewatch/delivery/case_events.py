"""``case.updated`` webhooks: a case's review changes, queued in the same outbox as alerts.

Subscriptions that chose the ``case.updated`` event type get one delivery per change that
moves a case's version (opened, a new alert joined, reopened, state changed, assigned),
queued in the transaction that makes the change and signed by the worker exactly like
alerts (Standard Webhooks). Notes and views are not sent: they stay in the audit history.

Bodies: ``json`` is ``{"type": "case.updated", "timestamp", "data": {"case": <case API
form>, "change": {...}}}``; ``text`` is a short chat summary with a link to the case, with
every value neutralised like the alert summaries (:func:`rolewatch.delivery.payloads.plain`).
The subscription's filters apply to the case: ``min_score`` to its peak score, ``roles`` to
the new dominant role of its newest alert.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from typing import Any

from rolewatch.clock import to_rfc3339
from rolewatch.delivery.ids import message_id
from rolewatch.delivery.payloads import REVIEW_LINE, TEXT_LIMIT, plain, safe_link
from rolewatch.delivery.subscriptions import wants
from rolewatch.store import outbox as outbox_store
from rolewatch.store import subscriptions as subscription_store
from rolewatch.store.db import Connection
from rolewatch.store.outbox import NewDelivery
from rolewatch.store.subscriptions import SubscriptionRecord

CASE_UPDATED = "case.updated"
_ACTIONS = {
    "opened": "opened",
    "alert_added": "got a new alert",
    "reopened": "reopened",
    "state": "changed",
    "assigned": "assigned",
}


def case_matches(subscription: SubscriptionRecord, update: dict[str, Any]) -> bool:
    """True when the case passes the subscription's score and role filters."""
    case = update["case"]
    if float(case.get("peak_score") or 0.0) < float(subscription.min_score or 0.0):
        return False
    if subscription.roles is not None:
        return (case.get("role_after") or {}).get("id") in set(subscription.roles)
    return True


def case_text(update: dict[str, Any]) -> str:
    """A short summary of one case change for chat channels."""
    case, change = update["case"], update["change"]
    state = plain(case.get("state"), 20).replace("_", " ")
    what = _ACTIONS.get(change.get("action"), "changed")
    by = change.get("by")
    who = f" by {plain(by.get('name'), 60)}" if isinstance(by, dict) else ""
    lines = [
        f"Case {plain(case.get('id'), 20)} for account {plain(case.get('account'), 200)} "
        f"{what}{who}: now {state}"
    ]
    decision = case.get("last_decision") or {}
    if case.get("state") in ("confirmed", "dismissed") and decision.get("reason_label"):
        lines.append(f"Reason: {plain(decision['reason_label'], 80)}")
    assignee = case.get("assignee")
    if isinstance(assignee, dict):
        lines.append(f"Assigned to {plain(assignee.get('name'), 60)}")
    lines.append(
        f"{plain(case.get('alert_count'), 10)} alert(s), highest score "
        f"{float(case.get('peak_score') or 0.0):.3g}"
    )
    lines.append(f"Case: {safe_link(case.get('url'))}")
    lines.append(REVIEW_LINE)
    return "\n".join(lines)[:TEXT_LIMIT]


def case_body(fmt: str, update: dict[str, Any], timestamp_us: int) -> bytes:
    """The body bytes of one ``case.updated`` delivery in the subscription's format."""
    if fmt == "text":
        document: dict[str, Any] = {"text": case_text(update)}
    elif fmt == "json":
        document = {"type": CASE_UPDATED, "timestamp": to_rfc3339(timestamp_us), "data": update}
    else:
        raise ValueError(f"unknown webhook format {fmt!r}: use json or text")
    return json.dumps(document, ensure_ascii=False, separators=(",", ":")).encode("utf-8")


def enqueue_case_updates(
    connection: Connection, updates: Iterable[dict[str, Any]], *, now_us: int
) -> list[str]:
    """Queue one delivery per case change and live subscription that receives
    ``case.updated`` and whose filters the case passes. Runs in the caller's transaction;
    returns the new delivery (``webhook-id``) ids."""
    updates = list(updates)
    if not updates:
        return []
    live = [
        subscription
        for subscription in subscription_store.list_live_subscriptions(connection)
        if wants(subscription, CASE_UPDATED)
    ]
    new = [
        NewDelivery(
            id=message_id(now_us),
            subscription_id=subscription.id,
            alert_id=None,
            event_type=CASE_UPDATED,
            body=case_body(subscription.format, update, now_us).decode("utf-8"),
            created_us=now_us,
        )
        for update in updates
        for subscription in live
        if case_matches(subscription, update)
    ]
    outbox_store.insert_deliveries(connection, new)
    return [delivery.id for delivery in new]
