"""Working a case: read the queue and a case, change its state or assignee, add notes.

Every change runs in one write transaction that locks the case's row, checks the version
the reviewer saw (a stale version raises :class:`VersionConflict` carrying the current
case: two reviewers changing one case at once, one wins and the other is told what
changed), applies the move (:mod:`rolewatch.review.states`), stamps the decision on the
case's alerts, appends the audit history and queues the ``case.updated`` webhooks. Notes
and views only append to the history: they never conflict and never move the version.

Who may do what is checked by the callers (REST routes, web pages): changing a case needs
the ``review`` scope (admin implies it); notes need ``read``.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any

from sqlalchemy.engine import Engine

from rolewatch.clock import now_micros
from rolewatch.config import Settings
from rolewatch.delivery.case_events import enqueue_case_updates
from rolewatch.review.forms import case_form, history_form, person, timeline_form
from rolewatch.review.intake import case_updates
from rolewatch.review.states import (
    DISMISSED,
    IN_REVIEW,
    ReviewRuleError,
    StateChange,
    check_move,
    clean_text,
)
from rolewatch.store import queries
from rolewatch.store import review as case_store
from rolewatch.store.db import Connection, write_transaction
from rolewatch.store.keys import ApiKey, key_names, list_keys
from rolewatch.store.review import CaseFilters, CaseRecord, HistoryEntry

# A reviewer's views of one case are recorded at most once per hour (common practice for
# access logs that stay readable, no source): enough to tell who looked, not every reload.
VIEW_INTERVAL_US = 3600 * 1_000_000
UNSET: Any = object()


class CaseNotFound(LookupError):
    """No case has this id."""


class VersionConflict(Exception):
    """The case changed since the reviewer read it; ``current`` is its form now."""

    def __init__(self, current: dict[str, Any]) -> None:
        super().__init__(
            f"case {current['id']} changed since the version you sent; it is now at version "
            f"{current['version']} ({current['state']}): reload it and decide again"
        )
        self.current = current


@dataclass(frozen=True)
class CaseChange:
    """What a reviewer asks for: the version they saw and the changes (``assignee`` left
    :data:`UNSET` keeps the assignee; ``None`` unassigns)."""

    version: int
    state: str | None = None
    reason: str | None = None
    text: str | None = None
    assignee: Any = UNSET


def reviewers(engine: Engine) -> list[dict[str, str]]:
    """Active keys allowed to review, as ``{"key_id", "name"}``, by name."""
    found = [key for key in list_keys(engine, include_revoked=False) if key.allows("review")]
    return sorted(
        ({"key_id": key.key_id, "name": key.name} for key in found),
        key=lambda item: (item["name"].lower(), item["key_id"]),
    )


def list_queue(
    engine: Engine, settings: Settings, filters: CaseFilters, *, limit: int, offset: int = 0
) -> tuple[list[dict[str, Any]], int]:
    """One page of the case queue in the API form, and the number of matching cases."""
    with engine.connect() as connection:
        rows, total = case_store.list_cases(connection, filters, limit=limit, offset=offset)
        names = key_names(connection)
    forms = [
        case_form(row.case, move=row.move, names=names, base_url=settings.public_url)
        for row in rows
    ]
    return forms, total


def _detail(connection: Connection, settings: Settings, case: CaseRecord) -> dict[str, Any]:
    names = key_names(connection)
    moves = case_store.role_moves(connection, [case.id])
    timeline = case_store.case_alert_rows(connection, case.id)
    role_names = queries.role_names(connection.engine, {row.basis_version for row in timeline})
    form = case_form(case, move=moves.get(case.id), names=names, base_url=settings.public_url)
    form["alerts"] = [timeline_form(row, role_names) for row in timeline]
    form["history"] = [
        history_form(entry, names) for entry in case_store.history_of(connection, case.id)
    ]
    return form


def _record_view(connection: Connection, case: CaseRecord, viewer: ApiKey, now_us: int) -> None:
    last = case_store.last_view_us(connection, case.id, viewer.key_id)
    if last is not None and now_us - last < VIEW_INTERVAL_US:
        return
    case_store.append_history(
        connection,
        HistoryEntry(case.id, now_us, viewer.key_id, viewer.name, "viewed", case.version),
    )


def case_detail(
    engine: Engine,
    settings: Settings,
    case_id: int,
    *,
    viewer: ApiKey | None = None,
    now_us: int | None = None,
) -> dict[str, Any]:
    """The case with its timeline and audit history; a ``viewer`` is recorded as having
    seen it (at most once per hour each). :class:`CaseNotFound` for an unknown id."""
    if viewer is None:
        with engine.connect() as connection:
            case = case_store.find_case(connection, case_id)
            if case is None:
                raise CaseNotFound(f"no case {case_id}")
            return _detail(connection, settings, case)
    with write_transaction(engine) as connection:
        case = case_store.find_case(connection, case_id)
        if case is None:
            raise CaseNotFound(f"no case {case_id}")
        _record_view(connection, case, viewer, now_micros() if now_us is None else now_us)
        return _detail(connection, settings, case)


def account_cases(engine: Engine, settings: Settings, account: str) -> list[dict[str, Any]]:
    """The account's cases, newest first (API form, without timeline and history)."""
    with engine.connect() as connection:
        found = case_store.cases_of_account(connection, account)
        names = key_names(connection)
        moves = case_store.role_moves(connection, [case.id for case in found])
    return [
        case_form(case, move=moves.get(case.id), names=names, base_url=settings.public_url)
        for case in found
    ]


def case_of_alert(engine: Engine, alert_id: int) -> int | None:
    """The id of the case an alert was filed into, or None."""
    with engine.connect() as connection:
        return case_store.case_of_alert(connection, alert_id)


def _check_assignee(engine_names: dict[str, ApiKey], assignee: Any) -> str | None:
    if assignee is None:
        return None
    key = engine_names.get(str(assignee))
    if key is None or not key.allows("review"):
        raise ReviewRuleError(
            f"no active reviewer has key id {assignee!r}: assign a key with the review scope "
            "(GET /v1/reviewers lists them)"
        )
    return key.key_id


def _values(case: CaseRecord, move: StateChange | None, key: ApiKey, now_us: int) -> dict:
    values: dict[str, Any] = {"updated_us": now_us}
    if move is None:
        return values
    values["state"] = move.to_state
    if move.is_decision:
        values.update(
            decision=move.to_state,
            decision_reason=move.reason,
            decision_text=move.text,
            decided_us=now_us,
            decided_by=key.key_id,
        )
        if move.to_state == DISMISSED:
            values["dismissed_score"] = case.peak_score
    return values


def _plan(
    engine: Engine, case: CaseRecord, change: CaseChange, key: ApiKey
) -> tuple[StateChange | None, str | None]:
    """Check the requested change against the case: the move (or None) and the assignee."""
    move = None
    if change.state is not None:
        move = check_move(case.state, change.state, change.reason, change.text)
    elif change.reason is not None or change.text is not None:
        raise ReviewRuleError(
            "a reason or text goes with a state change; add a note to comment on a case"
        )
    assignee = case.assignee
    if change.assignee is not UNSET:
        keys = {found.key_id: found for found in list_keys(engine, include_revoked=False)}
        assignee = _check_assignee(keys, change.assignee)
    elif move is not None and move.to_state == IN_REVIEW and case.assignee is None:
        assignee = key.key_id  # starting a review takes the case, unless it is assigned
    if move is None and assignee == case.assignee:
        raise ReviewRuleError("nothing to change: give a new state and/or assignee")
    return move, assignee


def change_case(
    engine: Engine,
    settings: Settings,
    case_id: int,
    key: ApiKey,
    change: CaseChange,
    *,
    now_us: int | None = None,
) -> dict[str, Any]:
    """Apply a reviewer's change; returns the case with its timeline and history.

    Raises :class:`CaseNotFound`, :class:`VersionConflict` (stale version) or
    :class:`~rolewatch.review.states.ReviewRuleError` (a move or value the rules refuse).
    """
    now_us = now_micros() if now_us is None else now_us
    with write_transaction(engine) as connection:
        case = case_store.find_case(connection, case_id, lock=True)
        if case is None:
            raise CaseNotFound(f"no case {case_id}")
        if case.version != change.version:
            raise VersionConflict(_detail(connection, settings, case))
        move, assignee = _plan(engine, case, change, key)
        values = _values(case, move, key, now_us)
        values["assignee"] = assignee
        if not case_store.update_case(
            connection, case.id, expected_version=case.version, values=values
        ):
            raise VersionConflict(_detail(connection, settings, case))
        _after_change(connection, settings, case, move, assignee, key, now_us)
        updated = case_store.find_case(connection, case_id)
        assert updated is not None
        return _detail(connection, settings, updated)


def _after_change(
    connection: Connection,
    settings: Settings,
    case: CaseRecord,
    move: StateChange | None,
    assignee: str | None,
    key: ApiKey,
    now_us: int,
) -> None:
    """Stamp the alerts, append the history and queue the webhooks of an applied change."""
    version = case.version + 1
    if move is not None and (move.is_decision or move.is_reopen):
        case_store.decide_alerts(
            connection,
            case.id,
            decision=move.to_state if move.is_decision else None,
            reason=move.reason,
            decided_us=now_us,
        )
    if move is not None:
        case_store.append_history(
            connection,
            HistoryEntry(
                case.id,
                now_us,
                key.key_id,
                key.name,
                "state",
                version,
                from_state=move.from_state,
                to_state=move.to_state,
                reason=move.reason,
                text=move.text,
            ),
        )
    if assignee != case.assignee:
        case_store.append_history(
            connection,
            HistoryEntry(
                case.id, now_us, key.key_id, key.name, "assigned", version, assignee=assignee
            ),
        )
    action = "state" if move is not None else "assigned"
    updates = case_updates(
        connection,
        settings,
        {case.id: action},
        by=person(key.key_id, {key.key_id: key.name}),
        from_states={case.id: case.state},
    )
    enqueue_case_updates(connection, updates, now_us=now_us)


def add_note(
    engine: Engine,
    settings: Settings,
    case_id: int,
    key: ApiKey,
    text: str,
    *,
    now_us: int | None = None,
) -> dict[str, Any]:
    """Append a note to the case's history; returns the entry. Notes never conflict."""
    cleaned = clean_text(text)
    if cleaned is None:
        raise ReviewRuleError("a note needs some text")
    now_us = now_micros() if now_us is None else now_us
    with write_transaction(engine) as connection:
        case = case_store.find_case(connection, case_id)
        if case is None:
            raise CaseNotFound(f"no case {case_id}")
        entry = HistoryEntry(
            case.id, now_us, key.key_id, key.name, "note", case.version, text=cleaned
        )
        entry_id = case_store.append_history(connection, entry)
        names = key_names(connection)
    return history_form(replace(entry, id=entry_id), names)
