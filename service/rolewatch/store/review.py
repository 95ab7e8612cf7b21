"""Cases in the database: ``cases``, ``case_alerts`` and the append-only ``case_history``.

Every statement on these tables lives here; :mod:`rolewatch.review` decides when to call
them. A case's state changes only through :func:`update_case`, which checks the version the
caller read (optimistic concurrency: no row changes when another writer got there first).
History rows are only ever inserted.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, fields
from typing import Any

from sqlalchemy import and_, func, select, update
from sqlalchemy.engine import Connection

from rolewatch.store.db import inserted_id, inserted_ids
from rolewatch.store.review_schema import case_alerts, case_history, cases
from rolewatch.store.schema import alerts, roles, windows

_IN_CHUNK = 500  # ids per IN (...) list: well under every driver's parameter limit


@dataclass(frozen=True)
class CaseRecord:
    """One ``cases`` row."""

    id: int
    account: str
    state: str
    version: int
    assignee: str | None
    opened_us: int
    updated_us: int
    first_window_end_us: int
    last_window_end_us: int
    alert_count: int
    peak_score: float
    latest_score: float
    latest_alert_id: int
    decision: str | None
    decision_reason: str | None
    decision_text: str | None
    decided_us: int | None
    decided_by: str | None
    dismissed_score: float | None


_CASE_FIELDS = tuple(item.name for item in fields(CaseRecord))


@dataclass(frozen=True)
class RoleMove:
    """The roles of a case's newest alert, with their current names (None when the basis'
    roles are gone)."""

    basis_version: str
    role_before: int | None
    role_after: int
    before_name: str | None
    after_name: str | None


@dataclass(frozen=True)
class QueueRow:
    """A case with the role move of its newest alert (what the queue shows)."""

    case: CaseRecord
    move: RoleMove


@dataclass(frozen=True)
class HistoryEntry:
    """One ``case_history`` row (``id`` is None before it is stored)."""

    case_id: int
    at_us: int
    actor: str | None
    actor_name: str | None
    action: str
    version: int
    from_state: str | None = None
    to_state: str | None = None
    reason: str | None = None
    text: str | None = None
    alert_id: int | None = None
    assignee: str | None = None
    id: int | None = None


@dataclass(frozen=True)
class CaseAlertRow:
    """An alert of a case, with its window and the decision that applies to it."""

    alert_id: int
    window_id: int
    window_start_us: int
    window_end_us: int
    created_us: int
    score: float
    basis_version: str
    role_before: int | None
    role_after: int
    joined_us: int
    decision: str | None
    reason: str | None
    evidence: str = "{}"  # the alert's evidence (JSON text)


@dataclass(frozen=True)
class CaseFilters:
    """Filters of :func:`list_cases`. ``assignee`` is a key id or ``"none"`` (unassigned);
    ``from_us``/``to_us`` keep cases with an alert in a window ending in ``[from, to)``
    (judged by their first and last window)."""

    states: tuple[str, ...] = ()
    assignee: str | None = None
    min_score: float | None = None
    from_us: int | None = None
    to_us: int | None = None
    account: str | None = None


def _case(row: Any) -> CaseRecord:
    return CaseRecord(**{name: getattr(row, name) for name in _CASE_FIELDS})


def _chunks(items: Sequence[Any]) -> Iterable[Sequence[Any]]:
    for start in range(0, len(items), _IN_CHUNK):
        yield items[start : start + _IN_CHUNK]


# --- writes ----------------------------------------------------------------------------------


def insert_case(
    connection: Connection,
    *,
    account: str,
    state: str,
    now_us: int,
    window_end_us: int,
    score: float,
    alert_id: int,
) -> int:
    """Open a case for ``account`` with its first alert; returns the new case id."""
    return inserted_id(
        connection.execute(
            cases.insert().values(
                account=account,
                state=state,
                version=1,
                assignee=None,
                opened_us=now_us,
                updated_us=now_us,
                first_window_end_us=window_end_us,
                last_window_end_us=window_end_us,
                alert_count=1,
                peak_score=score,
                latest_score=score,
                latest_alert_id=alert_id,
            )
        )
    )


def open_cases(
    connection: Connection,
    firsts: Sequence[tuple[str, int, float]],
    *,
    state: str,
    now_us: int,
    window_end_us: int,
) -> list[int]:
    """Open one case per ``(account, alert id, score)`` with that first alert, in a few
    batched statements: the case rows, their timeline links and an ``opened`` history entry
    each. Returns the new case ids in ``firsts`` order."""
    case_ids = inserted_ids(
        connection,
        cases.insert(),
        [
            {
                "account": account,
                "state": state,
                "version": 1,
                "assignee": None,
                "opened_us": now_us,
                "updated_us": now_us,
                "first_window_end_us": window_end_us,
                "last_window_end_us": window_end_us,
                "alert_count": 1,
                "peak_score": score,
                "latest_score": score,
                "latest_alert_id": alert_id,
            }
            for account, alert_id, score in firsts
        ],
    )
    if not case_ids:
        return []
    links = [
        {
            "alert_id": alert_id,
            "case_id": case_id,
            "joined_us": now_us,
            "decision": None,
            "reason": None,
        }
        for case_id, (_, alert_id, _) in zip(case_ids, firsts, strict=True)
    ]
    connection.execute(case_alerts.insert(), links)
    entries = [
        HistoryEntry(case_id, now_us, None, None, "opened", 1, to_state=state, alert_id=alert_id)
        for case_id, (_, alert_id, _) in zip(case_ids, firsts, strict=True)
    ]
    connection.execute(case_history.insert(), [_history_values(entry) for entry in entries])
    return case_ids


def link_alert(
    connection: Connection,
    case_id: int,
    alert_id: int,
    *,
    joined_us: int,
    decision: str | None = None,
    reason: str | None = None,
) -> None:
    """Put the alert on the case's timeline: undecided, or under the standing decision of a
    case it joins without reopening (no first decision time: nobody looked at it)."""
    connection.execute(
        case_alerts.insert().values(
            alert_id=alert_id,
            case_id=case_id,
            joined_us=joined_us,
            decision=decision,
            reason=reason,
        )
    )


def update_case(
    connection: Connection, case_id: int, *, expected_version: int, values: dict[str, Any]
) -> bool:
    """Apply ``values`` and add one to the version, only if the case is still at
    ``expected_version``; False when another change came first (nothing written)."""
    changed = connection.execute(
        update(cases)
        .where(cases.c.id == case_id, cases.c.version == expected_version)
        .values(**values, version=expected_version + 1)
    ).rowcount
    return changed == 1


def decide_alerts(
    connection: Connection,
    case_id: int,
    *,
    decision: str | None,
    reason: str | None,
    decided_us: int,
) -> None:
    """Stamp the case's decision on all its alerts (``None`` clears it, on reopening); the
    first decision time of each alert is kept."""
    values: dict[str, Any] = {"decision": decision, "reason": reason}
    if decision is not None:
        values["first_decided_us"] = func.coalesce(case_alerts.c.first_decided_us, decided_us)
    connection.execute(update(case_alerts).where(case_alerts.c.case_id == case_id).values(values))


def append_history(connection: Connection, entry: HistoryEntry) -> int:
    """Add one entry to the case's audit history (the only write this table gets)."""
    return inserted_id(connection.execute(case_history.insert().values(**_history_values(entry))))


def _history_values(entry: HistoryEntry) -> dict[str, Any]:
    return {item.name: getattr(entry, item.name) for item in fields(entry) if item.name != "id"}


# --- reads -----------------------------------------------------------------------------------


def find_case(connection: Connection, case_id: int, *, lock: bool = False) -> CaseRecord | None:
    """One case, or None; ``lock`` holds its row (``FOR UPDATE`` on PostgreSQL)."""
    query = select(cases).where(cases.c.id == case_id)
    if lock:
        query = query.with_for_update()
    row = connection.execute(query).first()
    return None if row is None else _case(row)


def find_cases(connection: Connection, case_ids: Iterable[int]) -> dict[int, CaseRecord]:
    """The cases with these ids that exist, by id (a few statements for any number)."""
    wanted = sorted(set(case_ids))
    found: dict[int, CaseRecord] = {}
    for chunk in _chunks(wanted):
        for row in connection.execute(select(cases).where(cases.c.id.in_(chunk))):
            found[int(row.id)] = _case(row)
    return found


def latest_cases(connection: Connection, accounts: Iterable[str]) -> dict[str, CaseRecord]:
    """Each account's newest case (highest id), for the accounts that have one."""
    wanted = sorted(set(accounts))
    found: dict[str, CaseRecord] = {}
    for chunk in _chunks(wanted):
        rows = connection.execute(
            select(cases).where(cases.c.account.in_(chunk)).order_by(cases.c.id)
        )
        for row in rows:
            found[row.account] = _case(row)
    return found


def cases_of_account(connection: Connection, account: str) -> list[CaseRecord]:
    """The account's cases, newest first."""
    rows = connection.execute(
        select(cases).where(cases.c.account == account).order_by(cases.c.id.desc())
    )
    return [_case(row) for row in rows]


def case_of_alert(connection: Connection, alert_id: int) -> int | None:
    """The id of the case holding the alert, or None."""
    return connection.execute(
        select(case_alerts.c.case_id).where(case_alerts.c.alert_id == alert_id)
    ).scalar()


def _filter_conditions(filters: CaseFilters) -> list[Any]:
    conditions: list[Any] = []
    if filters.states:
        conditions.append(cases.c.state.in_(filters.states))
    if filters.assignee == "none":
        conditions.append(cases.c.assignee.is_(None))
    elif filters.assignee is not None:
        conditions.append(cases.c.assignee == filters.assignee)
    if filters.min_score is not None:
        conditions.append(cases.c.latest_score >= filters.min_score)
    if filters.from_us is not None:
        conditions.append(cases.c.last_window_end_us >= filters.from_us)
    if filters.to_us is not None:
        conditions.append(cases.c.first_window_end_us < filters.to_us)
    if filters.account is not None:
        conditions.append(cases.c.account == filters.account)
    return conditions


def named_roles(table: Any) -> tuple[Any, Any, Any]:
    """``table`` joined (outer: a basis' roles may be gone) to the current names of its
    ``role_before`` and ``role_after``; returns the join and the two labelled name columns
    (``before_name``, ``after_name``)."""
    before = roles.alias(f"{table.name}_role_before")
    after = roles.alias(f"{table.name}_role_after")
    joined = table.outerjoin(
        before,
        (before.c.basis_version == table.c.basis_version)
        & (before.c.role_id == table.c.role_before),
    ).outerjoin(
        after,
        (after.c.basis_version == table.c.basis_version) & (after.c.role_id == table.c.role_after),
    )
    return joined, before.c.name.label("before_name"), after.c.name.label("after_name")


def _with_move(query_columns: Sequence[Any]) -> Any:
    """SELECT ``query_columns`` plus the newest alert's role move, from cases."""
    joined, before_name, after_name = named_roles(alerts)
    return select(
        *query_columns,
        alerts.c.basis_version,
        alerts.c.role_before,
        alerts.c.role_after,
        before_name,
        after_name,
    ).select_from(cases.join(joined, alerts.c.id == cases.c.latest_alert_id))


def _move(row: Any) -> RoleMove:
    return RoleMove(
        row.basis_version, row.role_before, row.role_after, row.before_name, row.after_name
    )


def list_cases(
    connection: Connection, filters: CaseFilters, *, limit: int, offset: int = 0
) -> tuple[list[QueueRow], int]:
    """Cases matching ``filters``, highest latest score first (then newest), one page; and
    how many match in all."""
    where = and_(True, *_filter_conditions(filters))
    total = connection.execute(select(func.count()).select_from(cases).where(where)).scalar()
    query = (
        _with_move(list(cases.c))
        .where(where)
        .order_by(cases.c.latest_score.desc(), cases.c.id.desc())
        .limit(limit)
        .offset(offset)
    )
    rows = [QueueRow(_case(row), _move(row)) for row in connection.execute(query)]
    return rows, int(total or 0)


def role_moves(connection: Connection, case_ids: Iterable[int]) -> dict[int, RoleMove]:
    """The newest alert's role move of each case."""
    wanted = sorted(set(case_ids))
    found: dict[int, RoleMove] = {}
    for chunk in _chunks(wanted):
        for row in connection.execute(_with_move([cases.c.id]).where(cases.c.id.in_(chunk))):
            found[row.id] = _move(row)
    return found


def case_alert_rows(connection: Connection, case_id: int) -> list[CaseAlertRow]:
    """The case's alerts with their windows, oldest first (the case's timeline)."""
    query = (
        select(
            alerts.c.id.label("alert_id"),
            alerts.c.window_id,
            windows.c.start_us.label("window_start_us"),
            alerts.c.window_end_us,
            alerts.c.created_us,
            alerts.c.score,
            alerts.c.basis_version,
            alerts.c.role_before,
            alerts.c.role_after,
            case_alerts.c.joined_us,
            case_alerts.c.decision,
            case_alerts.c.reason,
            alerts.c.evidence,
        )
        .join(alerts, alerts.c.id == case_alerts.c.alert_id)
        .join(windows, windows.c.id == alerts.c.window_id)
        .where(case_alerts.c.case_id == case_id)
        .order_by(alerts.c.window_end_us, alerts.c.id)
    )
    return [CaseAlertRow(**row._mapping) for row in connection.execute(query)]


def history_of(connection: Connection, case_id: int) -> list[HistoryEntry]:
    """The case's audit history, oldest first."""
    rows = connection.execute(
        select(case_history).where(case_history.c.case_id == case_id).order_by(case_history.c.id)
    )
    return [HistoryEntry(**row._mapping) for row in rows]


def last_view_us(connection: Connection, case_id: int, actor: str) -> int | None:
    """When ``actor`` last had a view of the case recorded, or None."""
    return connection.execute(
        select(func.max(case_history.c.at_us)).where(
            case_history.c.case_id == case_id,
            case_history.c.actor == actor,
            case_history.c.action == "viewed",
        )
    ).scalar()
