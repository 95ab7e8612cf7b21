"""What a window close does for review, inside its own write transaction.

Two steps around the alerts' insert (pipeline.closer calls both):

1. :func:`screen_alerts`, before anything is written: alerts of accounts covered by an
   active suppression are held back. They raise no alert and no delivery, but the window's
   memberships and scores are stored as usual, so the history stays complete.
2. :func:`file_window_alerts`, after the alerts are stored: the held-back alerts are
   recorded (counted per window and per suppression), and every new alert is filed into its
   account's case (:mod:`rolewatch.review.grouping`), with an audit entry and a
   ``case.updated`` webhook per case change.

Being in the close's transaction, a window's alerts, cases and deliveries are committed
together or not at all.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from rolewatch.config import Settings
from rolewatch.delivery.case_events import enqueue_case_updates
from rolewatch.review.forms import case_form, case_url
from rolewatch.review.grouping import GroupingRule, LatestCase, Placement, place_alert
from rolewatch.review.states import DECIDED, DISMISSED, OPEN
from rolewatch.review.suppression import Matcher, Rule
from rolewatch.store import review as case_store
from rolewatch.store import suppressions as suppression_store
from rolewatch.store.alerts import Alert, NewAlert
from rolewatch.store.db import Connection
from rolewatch.store.keys import key_names
from rolewatch.store.review import CaseRecord, HistoryEntry
from rolewatch.store.suppressions import HeldBack


@dataclass(frozen=True)
class Screened:
    """A window's alerts split into those raised and those held back (with the id of the
    suppression that held each one back)."""

    kept: list[NewAlert]
    held_back: list[tuple[NewAlert, int]] = field(default_factory=list)


@dataclass(frozen=True)
class Filed:
    """What filing a window's alerts did: each alert's case link, and changes made."""

    case_urls: dict[int, str]
    suppressed: int
    case_updates: list[dict[str, Any]]


def screen_alerts(connection: Connection, raised: Sequence[NewAlert], *, now_us: int) -> Screened:
    """Hold back the alerts of accounts covered by a suppression in force at ``now_us``."""
    if not raised:
        return Screened(list(raised))
    entries = suppression_store.active_entries(connection, now_us)
    if not entries:
        return Screened(list(raised))
    matcher = Matcher(Rule(entry.id, entry.kind, entry.value) for entry in entries)
    kept, held_back = [], []
    for alert in raised:
        rule_id = matcher.match(alert.account)
        if rule_id is None:
            kept.append(alert)
        else:
            held_back.append((alert, rule_id))
    return Screened(kept, held_back)


def grouping_rule(settings: Settings) -> GroupingRule:
    return GroupingRule(
        group_windows=settings.case_group_windows,
        period_us=int(settings.window_period.total_seconds() * 1_000_000),
        reopen_ratio=settings.case_reopen_ratio,
    )


def _record_held_back(
    connection: Connection, screened: Screened, window_id: int, basis_version: str
) -> None:
    suppression_store.insert_held_back(
        connection,
        [
            HeldBack(
                window_id=window_id,
                account=alert.account,
                suppression_id=rule_id,
                score=alert.score,
                basis_version=basis_version,
                role_before=alert.role_before,
                role_after=alert.role_after,
            )
            for alert, rule_id in screened.held_back
        ],
    )


def _join_case(
    connection: Connection,
    case: CaseRecord,
    alert: Alert,
    placement: Placement,
    now_us: int,
    end_us: int,
    ratio: float,
) -> None:
    """Add the alert to ``case`` (row locked by the caller), reopening it when placed so."""
    reopen = placement is Placement.REOPEN
    values: dict[str, Any] = {
        "last_window_end_us": max(case.last_window_end_us, end_us),
        "alert_count": case.alert_count + 1,
        "peak_score": max(case.peak_score, alert.score),
        "latest_score": alert.score,
        "latest_alert_id": alert.id,
        "updated_us": now_us,
    }
    if reopen:
        values["state"] = OPEN
    if not case_store.update_case(
        connection, case.id, expected_version=case.version, values=values
    ):
        raise RuntimeError(f"case {case.id} changed while its row was locked")
    standing = case.state in DECIDED and not reopen
    case_store.link_alert(
        connection,
        case.id,
        alert.id,
        joined_us=now_us,
        decision=case.decision if standing else None,
        reason=case.decision_reason if standing else None,
    )
    if reopen:
        case_store.decide_alerts(connection, case.id, decision=None, reason=None, decided_us=now_us)
    text = None
    if reopen:
        text = (
            f"new alert scored {alert.score:.3g}, at least {ratio:g} × the "
            f"{case.dismissed_score or 0.0:.3g} the case was dismissed at"
        )
    case_store.append_history(
        connection,
        HistoryEntry(
            case.id,
            now_us,
            None,
            None,
            "reopened" if reopen else "alert_added",
            case.version + 1,
            from_state=case.state,
            to_state=OPEN if reopen else case.state,
            text=text,
            alert_id=alert.id,
        ),
    )


def file_window_alerts(
    connection: Connection,
    settings: Settings,
    *,
    window_id: int,
    window_end_us: int,
    basis_version: str,
    alerts: Sequence[Alert],
    screened: Screened,
    now_us: int,
) -> Filed:
    """Record the held-back alerts and file the stored ``alerts`` into cases; queue a
    ``case.updated`` webhook per case change. Runs in the window close's transaction."""
    _record_held_back(connection, screened, window_id, basis_version)
    if not alerts:
        return Filed({}, len(screened.held_back), [])
    rule = grouping_rule(settings)
    latest = case_store.latest_cases(connection, (alert.account for alert in alerts))
    before: dict[int, str] = {}  # case id -> its state before this window
    joined: dict[int, tuple[int, str]] = {}  # alert id -> (case id, action)
    firsts: list[Alert] = []  # alerts that open a case, opened together below
    for alert in alerts:
        found = latest.get(alert.account)
        if found is not None:
            found = case_store.find_case(connection, found.id, lock=True) or found
        snapshot = None
        if found is not None:
            snapshot = LatestCase(
                found.id, found.state, found.last_window_end_us, found.dismissed_score
            )
        placement = place_alert(snapshot, window_end_us, alert.score, rule)
        if found is None or placement is Placement.NEW_CASE:
            firsts.append(alert)
            continue
        _join_case(connection, found, alert, placement, now_us, window_end_us, rule.reopen_ratio)
        action = "reopened" if placement is Placement.REOPEN else "alert_added"
        joined[alert.id] = (found.id, action)
        before.setdefault(found.id, found.state)
    opened = case_store.open_cases(
        connection,
        [(alert.account, alert.id, alert.score) for alert in firsts],
        state=OPEN,
        now_us=now_us,
        window_end_us=window_end_us,
    )
    joined.update(
        {alert.id: (case_id, "opened") for alert, case_id in zip(firsts, opened, strict=True)}
    )
    changed: dict[int, str] = {}  # case id -> the action that changed it, in alert order
    case_of: dict[int, int] = {}
    for alert in alerts:
        case_id, action = joined[alert.id]
        changed[case_id] = action
        case_of[alert.id] = case_id
    updates = case_updates(connection, settings, changed, from_states=before)
    enqueue_case_updates(connection, updates, now_us=now_us)
    return Filed(
        {alert_id: case_url(settings.public_url, case_id) for alert_id, case_id in case_of.items()},
        len(screened.held_back),
        updates,
    )


def case_updates(
    connection: Connection,
    settings: Settings,
    changed: dict[int, str],
    *,
    by: dict[str, str] | None = None,
    from_states: dict[int, str] | None = None,
) -> list[dict[str, Any]]:
    """The ``case.updated`` documents of the changed cases, read back in the transaction."""
    if not changed:
        return []
    names = key_names(connection)
    moves = case_store.role_moves(connection, changed)
    updates = []
    found = case_store.find_cases(connection, changed)
    for case_id, action in changed.items():
        case = found.get(case_id)
        if case is None:
            continue
        form = case_form(case, move=moves.get(case_id), names=names, base_url=settings.public_url)
        change = {
            "action": action,
            "at": form["updated"],
            "by": by,
            "from_state": (from_states or {}).get(case_id),
            "to_state": case.state,
            "reason": case.decision_reason if case.state == DISMISSED else None,
        }
        updates.append({"case": form, "change": change})
    return updates
