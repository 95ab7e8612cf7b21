"""The API forms of cases, their timeline and their history (docs/CONTRACTS.md "Case").

One function per form, used by the REST routes, the web pages and the ``case.updated``
webhook body alike, so they can never disagree. Role names are the roles' current names;
reviewer names come from ``names`` (``{key_id: name}``, see ``store.keys.key_names``).
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any
from urllib.parse import quote

from rolewatch.clock import to_rfc3339
from rolewatch.engine.headline import compose_headline
from rolewatch.review.states import DISMISS_REASONS
from rolewatch.store.review import CaseAlertRow, CaseRecord, HistoryEntry, RoleMove

RoleNames = Mapping[tuple[str, int], str]


def case_url(base_url: str, case_id: int) -> str:
    """The web address of a case."""
    return f"{base_url.rstrip('/')}/cases/{int(case_id)}"


def account_case_url(base_url: str, account: str, case_id: int) -> str:
    """The account page showing the case (where its review buttons are)."""
    return f"{base_url.rstrip('/')}/accounts/{quote(account, safe='')}?case={int(case_id)}#case"


def person(key_id: str | None, names: Mapping[str, str]) -> dict[str, str] | None:
    """A reviewer as the API shows one: ``{"key_id", "name"}`` (None for nobody)."""
    if key_id is None:
        return None
    return {"key_id": key_id, "name": names.get(key_id, key_id)}


def role_ref(names: RoleNames, basis_version: str, role_id: int | None) -> dict[str, Any] | None:
    if role_id is None:
        return None
    return {"id": role_id, "name": names.get((basis_version, role_id), f"role {role_id}")}


def move_refs(move: RoleMove | None) -> tuple[dict[str, Any] | None, dict[str, Any] | None]:
    """The role refs (before, after) of a case's newest alert."""
    if move is None:
        return None, None
    before = None
    if move.role_before is not None:
        before = {"id": move.role_before, "name": move.before_name or f"role {move.role_before}"}
    return before, {"id": move.role_after, "name": move.after_name or f"role {move.role_after}"}


def _decision(case: CaseRecord, names: Mapping[str, str]) -> dict[str, Any] | None:
    if case.decision is None or case.decided_us is None:
        return None
    return {
        "state": case.decision,
        "reason": case.decision_reason,
        "reason_label": DISMISS_REASONS.get(case.decision_reason or ""),
        "text": case.decision_text,
        "by": person(case.decided_by, names),
        "at": to_rfc3339(case.decided_us),
    }


def case_form(
    case: CaseRecord, *, move: RoleMove | None, names: Mapping[str, str], base_url: str
) -> dict[str, Any]:
    """A case in its API form; ``move`` is its newest alert's role move.

    ``last_decision`` is the latest confirmation or dismissal, kept when the case is
    reopened (then ``state`` is ``open`` again).
    """
    role_before, role_after = move_refs(move)
    return {
        "id": case.id,
        "account": case.account,
        "state": case.state,
        "version": case.version,
        "assignee": person(case.assignee, names),
        "opened": to_rfc3339(case.opened_us),
        "updated": to_rfc3339(case.updated_us),
        "first_window_end": to_rfc3339(case.first_window_end_us),
        "last_window_end": to_rfc3339(case.last_window_end_us),
        "alert_count": case.alert_count,
        "peak_score": case.peak_score,
        "latest_score": case.latest_score,
        "latest_alert_id": case.latest_alert_id,
        "role_before": role_before,
        "role_after": role_after,
        "last_decision": _decision(case, names),
        "url": case_url(base_url, case.id),
    }


def timeline_form(row: CaseAlertRow, role_names: RoleNames) -> dict[str, Any]:
    """One alert on a case's timeline, with its headline (what changed)."""
    before = role_ref(role_names, row.basis_version, row.role_before)
    after = role_ref(role_names, row.basis_version, row.role_after)
    evidence = json.loads(row.evidence or "{}")
    headline = compose_headline(
        before["name"] if before else None,
        after["name"] if after else f"role {row.role_after}",
        same_role=row.role_before == row.role_after,
        change=str(evidence.get("change") or "role mixture shifted"),
        baseline=evidence.get("baseline") is not None,
    )
    return {
        "alert_id": row.alert_id,
        "window_id": row.window_id,
        "window_start": to_rfc3339(row.window_start_us),
        "window_end": to_rfc3339(row.window_end_us),
        "raised": to_rfc3339(row.created_us),
        "joined": to_rfc3339(row.joined_us),
        "score": row.score,
        "role_before": before,
        "role_after": after,
        "headline": headline,
        "decision": row.decision,
        "reason": row.reason,
    }


def history_form(entry: HistoryEntry, names: Mapping[str, str]) -> dict[str, Any]:
    """One audit entry. ``by`` is None for the window close; its name is the one the key had
    when the entry was written."""
    by = None
    if entry.actor is not None:
        by = {"key_id": entry.actor, "name": entry.actor_name or names.get(entry.actor)}
    return {
        "id": entry.id,
        "at": to_rfc3339(entry.at_us),
        "action": entry.action,
        "by": by,
        "from_state": entry.from_state,
        "to_state": entry.to_state,
        "reason": entry.reason,
        "text": entry.text,
        "alert_id": entry.alert_id,
        "assignee": person(entry.assignee, names),
        "version": entry.version,
    }
