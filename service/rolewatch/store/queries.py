"""Read functions behind the REST API and the web pages (plus the one rename they allow).

Times come back as integer microseconds (``*_us``) unless a function says it returns the API
form; :func:`rolewatch.clock.to_rfc3339` turns them into RFC 3339 "Z" strings.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from typing import Any

from sqlalchemy import and_, func, or_, select, update
from sqlalchemy.engine import Engine

from rolewatch.config import Settings
from rolewatch.store.alerts import StoredAlert, alert_form
from rolewatch.store.db import write_transaction
from rolewatch.store.schema import (
    MAX_ACCOUNT_CHARS,
    alerts,
    bases,
    events,
    memberships,
    roles,
    service_state,
    windows,
)


def _us(value) -> int:
    return int(value.total_seconds() * 1_000_000)


# --- accounts --------------------------------------------------------------------------------


# C0 and C1 controls and lone surrogates: ingest has never stored them (PostgreSQL refuses
# NUL in a parameter). Ingest's current rule (rolewatch.identifiers) refuses more, but ids
# stored before it must stay reachable.
_NEVER_STORED = re.compile("[\x00-\x1f\x7f-\x9f\ud800-\udfff]")


def _could_be_stored(account: str) -> bool:
    """False for ids ingest never stores (too long, control characters): such an account
    cannot exist, and PostgreSQL refuses NUL in a query parameter."""
    return len(account) <= MAX_ACCOUNT_CHARS and not _NEVER_STORED.search(account)


def account_exists(engine: Engine, account: str) -> bool:
    """True when ``account`` was active in a closed window or has an event not yet closed.

    Every account of a closed window has a membership row (primary key lookup), except in
    windows kept only in the Parquet outputs (``rolewatch.scale.history.account_known``
    looks there); events after the latest closed window are searched through the time
    index, so an unknown account never costs a scan of the whole event table. (An account
    seen only in late events is not found.)
    """
    if not _could_be_stored(account):
        return False
    with engine.connect() as connection:
        query = select(memberships.c.account).where(memberships.c.account == account).limit(1)
        if connection.execute(query).first() is not None:
            return True
        closed_end = connection.execute(
            select(func.max(windows.c.end_us)).where(windows.c.status == "closed")
        ).scalar()
        recent = select(events.c.seq).where(
            or_(events.c.actor == account, events.c.target == account)
        )
        if closed_end is not None:
            recent = recent.where(events.c.time_us >= closed_end)
        return connection.execute(recent.limit(1)).first() is not None


def account_history(
    engine: Engine, account: str, from_us: int | None = None, to_us: int | None = None
) -> list[dict[str, Any]]:
    """One entry per closed window in which ``account`` was active, oldest first.

    With ``from_us``/``to_us``, only windows overlapping ``[from_us, to_us)``. Each entry:
    window id/start/end, basis version, mixture ``{role_id: weight}`` (string keys, sums to 1),
    dominant role, shift score (None on first appearance or when not scored), status,
    activity counts and the relative reconstruction error.
    """
    if not _could_be_stored(account):
        return []
    query = (
        select(
            memberships.c.window_id,
            windows.c.start_us,
            windows.c.end_us,
            memberships.c.basis_version,
            memberships.c.mixture,
            memberships.c.dominant_role,
            memberships.c.score,
            memberships.c.status,
            memberships.c.events_out,
            memberships.c.events_in,
            memberships.c.counterparts,
            memberships.c.new_counterparts,
            memberships.c.error,
        )
        .join(windows, windows.c.id == memberships.c.window_id)
        .where(memberships.c.account == account)
        .order_by(windows.c.end_us)
    )
    if from_us is not None:
        query = query.where(windows.c.end_us > from_us)
    if to_us is not None:
        query = query.where(windows.c.start_us < to_us)
    with engine.connect() as connection:
        rows = connection.execute(query).all()
    return [
        {
            "window_id": row.window_id,
            "window_start_us": row.start_us,
            "window_end_us": row.end_us,
            "basis_version": row.basis_version,
            "mixture": json.loads(row.mixture),
            "dominant_role": row.dominant_role,
            "score": row.score,
            "status": row.status,
            "events_out": row.events_out,
            "events_in": row.events_in,
            "counterparts": row.counterparts,
            "new_counterparts": row.new_counterparts,
            "error": row.error,
        }
        for row in rows
    ]


def windows_without_memberships(
    engine: Engine, from_us: int | None = None, to_us: int | None = None
) -> list[dict[str, Any]]:
    """Measured windows (oldest first) whose memberships the store does not hold: they went
    only to the Parquet outputs (``store_memberships_max_accounts``). Each: id, start_us,
    end_us; ``from_us``/``to_us`` as in :func:`account_history`."""
    held = select(memberships.c.window_id).where(memberships.c.window_id == windows.c.id)
    query = (
        select(windows.c.id, windows.c.start_us, windows.c.end_us)
        .where(windows.c.basis_version.is_not(None), ~held.exists())
        .order_by(windows.c.end_us)
    )
    if from_us is not None:
        query = query.where(windows.c.end_us > from_us)
    if to_us is not None:
        query = query.where(windows.c.start_us < to_us)
    with engine.connect() as connection:
        return [dict(row._mapping) for row in connection.execute(query)]


# --- windows ---------------------------------------------------------------------------------


def list_windows(engine: Engine, *, limit: int = 200) -> list[dict[str, Any]]:
    """Closed windows, newest first, with their counts and reconstruction error."""
    query = select(windows).order_by(windows.c.end_us.desc()).limit(limit)
    with engine.connect() as connection:
        return [dict(row._mapping) for row in connection.execute(query)]


def get_state(engine: Engine, key: str) -> str | None:
    """One ``service_state`` value, or None."""
    with engine.connect() as connection:
        return connection.execute(
            select(service_state.c.value).where(service_state.c.key == key)
        ).scalar()


def open_windows(
    engine: Engine, settings: Settings, *, now_us: int, limit: int = 20
) -> dict[str, Any]:
    """The windows not closed yet that hold events, from the settings and the watermark.

    Returns ``{"watermark_us", "max_event_us", "windows": [...]}``; each window has start/end,
    ``status`` ("open": the watermark has not passed its end; "due": it has, or the idle rule
    applies, and the closer will close it at its next tick) and the number of events so far.
    At most ``limit`` windows, the newest.
    """
    period, span, lateness = (
        _us(settings.window_period),
        _us(settings.window_span),
        _us(settings.window_lateness),
    )
    with engine.connect() as connection:
        max_event = connection.execute(
            select(func.max(events.c.time_us)).where(events.c.late.is_(False))
        ).scalar()
        last_closed = connection.execute(
            select(func.max(windows.c.end_us)).where(windows.c.status == "closed")
        ).scalar()
        first_event = None
        if last_closed is None and max_event is not None:
            first_event = connection.execute(select(func.min(events.c.time_us))).scalar()
        result: dict[str, Any] = {
            "watermark_us": None if max_event is None else max_event - lateness,
            "max_event_us": max_event,
            "windows": [],
        }
        if max_event is None:
            return result
        # Every aligned window end after the last closed one, up to the window holding the
        # newest event; with nothing closed yet, from the first window holding an event.
        last_end = (max_event // period + 1) * period
        if last_closed is not None:
            first_end = last_closed + period
        else:
            assert first_event is not None  # some event exists: max_event is set
            first_end = (first_event // period + 1) * period
        first_end = max(first_end, last_end - (limit - 1) * period)
        watermark = max_event - lateness
        last_ingest = get_state(engine, "last_ingest_us")
        idle = last_ingest is not None and now_us - int(last_ingest) >= _us(
            settings.idle_close_after
        )
        for end in range(first_end, last_end + 1, period):
            start = end - span
            count = connection.execute(
                select(func.count())
                .select_from(events)
                .where(events.c.time_us >= start, events.c.time_us < end)
            ).scalar()
            due = end <= watermark or (idle and end + lateness <= now_us)
            result["windows"].append(
                {
                    "start_us": start,
                    "end_us": end,
                    "status": "due" if due else "open",
                    "event_count": count,
                }
            )
    return result


# --- roles -----------------------------------------------------------------------------------


def active_basis(engine: Engine) -> dict[str, Any] | None:
    """The active role basis (without its body), or None before the first fit."""
    query = (
        select(
            bases.c.version,
            bases.c.recipe_version,
            bases.c.created_us,
            bases.c.trained_from_us,
            bases.c.trained_to_us,
        )
        .where(bases.c.active.is_(True))
        .order_by(bases.c.created_us.desc())
        .limit(1)
    )
    with engine.connect() as connection:
        row = connection.execute(query).first()
    return None if row is None else dict(row._mapping)


def list_roles(engine: Engine) -> dict[str, Any]:
    """``{"basis": <active basis or None>, "roles": [...]}``; each role: id, name,
    description, profile (parsed JSON)."""
    basis = active_basis(engine)
    if basis is None:
        return {"basis": None, "roles": []}
    query = select(roles).where(roles.c.basis_version == basis["version"]).order_by(roles.c.role_id)
    with engine.connect() as connection:
        rows = connection.execute(query).all()
    return {
        "basis": basis,
        "roles": [
            {
                "id": row.role_id,
                "name": row.name,
                "description": row.description,
                "profile": json.loads(row.profile),
            }
            for row in rows
        ],
    }


def rename_role(engine: Engine, role_id: int, name: str) -> dict[str, Any] | None:
    """Rename a role of the active basis; the renamed role, or None when there is no such role."""
    basis = active_basis(engine)
    if basis is None:
        return None
    with write_transaction(engine) as connection:
        changed = connection.execute(
            update(roles)
            .where(roles.c.basis_version == basis["version"], roles.c.role_id == role_id)
            .values(name=name)
        ).rowcount
    if changed != 1:
        return None
    return next(role for role in list_roles(engine)["roles"] if role["id"] == role_id)


def role_names(engine: Engine, basis_versions) -> dict[tuple[str, int], str]:
    """Current names of the roles of the given bases: ``{(basis_version, role_id): name}``."""
    versions = sorted(set(basis_versions))
    if not versions:
        return {}
    query = select(roles.c.basis_version, roles.c.role_id, roles.c.name).where(
        roles.c.basis_version.in_(versions)
    )
    with engine.connect() as connection:
        return {(r.basis_version, r.role_id): r.name for r in connection.execute(query)}


# --- alerts ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class AlertFilters:
    """Filters of :func:`list_alerts`; ``from_us``/``to_us`` bound the window end."""

    from_us: int | None = None
    to_us: int | None = None
    account: str | None = None
    min_score: float | None = None


_ALERT_COLUMNS = (
    alerts.c.id,
    alerts.c.window_id,
    alerts.c.account,
    alerts.c.created_us,
    alerts.c.window_end_us,
    windows.c.start_us.label("window_start_us"),
    alerts.c.score,
    alerts.c.basis_version,
    alerts.c.role_before,
    alerts.c.role_after,
    alerts.c.evidence,
)


def list_alerts(
    engine: Engine,
    filters: AlertFilters | None = None,
    limit: int = 50,
    cursor: int | None = None,
) -> tuple[list[dict[str, Any]], int | None]:
    """Alerts in the API form, newest first, and the cursor of the next page (None at the end).

    ``cursor`` is the id returned as the previous page's next cursor: the page continues with
    older alerts (smaller ids), so pages stay stable while new alerts arrive.
    """
    filters = filters or AlertFilters()
    if filters.account is not None and not _could_be_stored(filters.account):
        return [], None
    conditions = []
    if filters.from_us is not None:
        conditions.append(alerts.c.window_end_us >= filters.from_us)
    if filters.to_us is not None:
        conditions.append(alerts.c.window_end_us < filters.to_us)
    if filters.account is not None:
        conditions.append(alerts.c.account == filters.account)
    if filters.min_score is not None:
        conditions.append(alerts.c.score >= filters.min_score)
    if cursor is not None:
        conditions.append(alerts.c.id < cursor)
    query = (
        select(*_ALERT_COLUMNS)
        .join(windows, windows.c.id == alerts.c.window_id)
        .where(and_(True, *conditions))
        .order_by(alerts.c.id.desc())
        .limit(limit + 1)
    )
    with engine.connect() as connection:
        rows = connection.execute(query).all()
    more = len(rows) > limit
    rows = rows[:limit]
    names = role_names(engine, (row.basis_version for row in rows))
    next_cursor = rows[-1].id if more and rows else None
    return [alert_form(StoredAlert(**row._mapping), names).to_dict() for row in rows], next_cursor


def get_alert(engine: Engine, alert_id: int) -> dict[str, Any] | None:
    """One alert in the API form, or None."""
    query = (
        select(*_ALERT_COLUMNS)
        .join(windows, windows.c.id == alerts.c.window_id)
        .where(alerts.c.id == alert_id)
    )
    with engine.connect() as connection:
        row = connection.execute(query).first()
    if row is None:
        return None
    return alert_form(
        StoredAlert(**row._mapping), role_names(engine, [row.basis_version])
    ).to_dict()


__all__ = [
    "AlertFilters",
    "account_exists",
    "account_history",
    "active_basis",
    "get_alert",
    "get_state",
    "list_alerts",
    "list_roles",
    "list_windows",
    "open_windows",
    "rename_role",
    "role_names",
    "windows_without_memberships",
]
