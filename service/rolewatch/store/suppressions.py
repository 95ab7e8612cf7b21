"""Suppression entries and the alerts they held back: ``suppressions`` and
``suppressed_alerts``.

An entry is never deleted: lifting it early stamps ``lifted_us``/``lifted_by``, and it stops
applying at ``expires_us`` either way, so the list also tells who silenced which accounts,
why and until when. :mod:`rolewatch.review.suppression` holds the matching rules.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, fields
from typing import Any

from sqlalchemy import func, select, update
from sqlalchemy.engine import Connection

from rolewatch.store.db import inserted_id
from rolewatch.store.review_schema import suppressed_alerts, suppressions


@dataclass(frozen=True)
class SuppressionRecord:
    """One entry with how many alerts it held back and the latest window it did so in."""

    id: int
    kind: str
    value: str
    reason: str
    created_us: int
    created_by: str | None
    expires_us: int
    lifted_us: int | None
    lifted_by: str | None
    hits: int = 0
    last_hit_window_id: int | None = None


@dataclass(frozen=True)
class HeldBack:
    """An alert a suppression held back in a window (scores and roles kept for the figures)."""

    window_id: int
    account: str
    suppression_id: int
    score: float
    basis_version: str
    role_before: int | None
    role_after: int


_ENTRY_COLUMNS = [
    column
    for column in suppressions.c
    if column.name in {f.name for f in fields(SuppressionRecord)}
]


def insert_suppression(
    connection: Connection,
    *,
    kind: str,
    value: str,
    reason: str,
    created_us: int,
    created_by: str | None,
    expires_us: int,
) -> int:
    """Store a new entry; returns its id."""
    return inserted_id(
        connection.execute(
            suppressions.insert().values(
                kind=kind,
                value=value,
                reason=reason,
                created_us=created_us,
                created_by=created_by,
                expires_us=expires_us,
            )
        )
    )


def _active(now_us: int) -> Any:
    return (suppressions.c.lifted_us.is_(None)) & (suppressions.c.expires_us > now_us)


def active_entries(connection: Connection, now_us: int) -> list[SuppressionRecord]:
    """Entries in force at ``now_us`` (not lifted, not expired), oldest first."""
    rows = connection.execute(
        select(*_ENTRY_COLUMNS).where(_active(now_us)).order_by(suppressions.c.id)
    )
    return [SuppressionRecord(**row._mapping) for row in rows]


def list_entries(
    connection: Connection, *, now_us: int, include_inactive: bool, entry_id: int | None = None
) -> list[SuppressionRecord]:
    """Entries newest first, each with its hit count; only those in force unless
    ``include_inactive``; only the one with ``entry_id`` when given."""
    hits = (
        select(
            suppressed_alerts.c.suppression_id,
            func.count().label("hits"),
            func.max(suppressed_alerts.c.window_id).label("last_hit_window_id"),
        )
        .group_by(suppressed_alerts.c.suppression_id)
        .subquery()
    )
    query = (
        select(
            *_ENTRY_COLUMNS,
            func.coalesce(hits.c.hits, 0).label("hits"),
            hits.c.last_hit_window_id,
        )
        .outerjoin(hits, hits.c.suppression_id == suppressions.c.id)
        .order_by(suppressions.c.id.desc())
    )
    if not include_inactive:
        query = query.where(_active(now_us))
    if entry_id is not None:
        query = query.where(suppressions.c.id == entry_id)
    return [SuppressionRecord(**row._mapping) for row in connection.execute(query)]


def find_entry(connection: Connection, entry_id: int) -> SuppressionRecord | None:
    row = connection.execute(select(*_ENTRY_COLUMNS).where(suppressions.c.id == entry_id)).first()
    return None if row is None else SuppressionRecord(**row._mapping)


def lift_entry(connection: Connection, entry_id: int, *, now_us: int, by: str | None) -> bool:
    """End an entry now; False when it was already lifted or has expired."""
    changed = connection.execute(
        update(suppressions)
        .where(
            suppressions.c.id == entry_id,
            suppressions.c.lifted_us.is_(None),
            suppressions.c.expires_us > now_us,
        )
        .values(lifted_us=now_us, lifted_by=by)
    ).rowcount
    return changed == 1


def insert_held_back(connection: Connection, rows: Sequence[HeldBack]) -> None:
    """Record the alerts held back in one window close."""
    if rows:
        connection.execute(
            suppressed_alerts.insert(),
            [{item.name: getattr(row, item.name) for item in fields(row)} for row in rows],
        )
