"""Read-only summaries the web pages show beyond :mod:`rolewatch.store.queries`, and the
store check behind ``GET /healthz``.

Every statement here is a SQLAlchemy Core read; nothing in this module writes.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import and_, func, literal_column, or_, select
from sqlalchemy.engine import Engine

from rolewatch.store import queries
from rolewatch.store.schema import memberships, windows


def ping(engine: Engine) -> None:
    """Run ``SELECT 1`` on a fresh connection; raises when the database cannot answer."""
    with engine.connect() as connection:
        connection.execute(select(literal_column("1")))


def windows_oldest_first(engine: Engine, *, limit: int = 520) -> list[dict[str, Any]]:
    """Closed windows, oldest first (at most ``limit``, the newest ones)."""
    return list(reversed(queries.list_windows(engine, limit=limit)))


def dominant_counts(engine: Engine, window_id: int) -> dict[int, int]:
    """``{role_id: number of accounts whose dominant role it is}`` in one window."""
    query = (
        select(memberships.c.dominant_role, func.count())
        .where(memberships.c.window_id == window_id)
        .group_by(memberships.c.dominant_role)
    )
    with engine.connect() as connection:
        return {int(role): int(count) for role, count in connection.execute(query)}


def holders_by_window(
    engine: Engine, basis_version: str, *, limit: int = 26
) -> tuple[list[dict[str, Any]], dict[int, dict[int, int]]]:
    """The newest ``limit`` windows measured against ``basis_version`` (oldest first) and,
    per role, ``{window_id: accounts whose dominant role it is}``."""
    measured = (
        select(windows)
        .where(
            windows.c.id.in_(
                select(memberships.c.window_id)
                .where(memberships.c.basis_version == basis_version)
                .distinct()
            )
        )
        .order_by(windows.c.end_us.desc())
        .limit(limit)
    )
    with engine.connect() as connection:
        found = [dict(row._mapping) for row in connection.execute(measured)][::-1]
        counts = connection.execute(
            select(memberships.c.window_id, memberships.c.dominant_role, func.count())
            .where(
                memberships.c.window_id.in_([w["id"] for w in found]),
                memberships.c.basis_version == basis_version,
                memberships.c.dominant_role.is_not(None),
            )
            .group_by(memberships.c.window_id, memberships.c.dominant_role)
        ).all()
    by_role: dict[int, dict[int, int]] = {}
    for window_id, role, count in counts:
        by_role.setdefault(int(role), {})[int(window_id)] = int(count)
    return found, by_role


def role_transitions(engine: Engine, window_ids: list[int]) -> dict[tuple[int, int], int]:
    """``{(role before, role after): accounts}`` whose dominant role changed from one of
    ``window_ids`` (oldest first) to the next one."""
    pairs = list(zip(window_ids, window_ids[1:], strict=False))
    if not pairs:
        return {}
    before, after = memberships.alias("before"), memberships.alias("after")
    query = (
        select(before.c.dominant_role, after.c.dominant_role, func.count())
        .select_from(before.join(after, before.c.account == after.c.account))
        .where(
            or_(*(and_(before.c.window_id == a, after.c.window_id == b) for a, b in pairs)),
            before.c.dominant_role != after.c.dominant_role,
        )
        .group_by(before.c.dominant_role, after.c.dominant_role)
    )
    with engine.connect() as connection:
        return {(int(a), int(b)): int(n) for a, b, n in connection.execute(query)}


def latest_window_with_members(engine: Engine) -> dict[str, Any] | None:
    """The newest closed window that holds memberships, or None."""
    query = (
        select(windows)
        .where(windows.c.id.in_(select(memberships.c.window_id).distinct()))
        .order_by(windows.c.end_us.desc())
        .limit(1)
    )
    with engine.connect() as connection:
        row = connection.execute(query).first()
    return None if row is None else dict(row._mapping)


def alerts_by_window(
    engine: Engine, account: str, *, limit: int = 1000
) -> dict[int, dict[str, Any]]:
    """The account's alerts in the API form, keyed by window id."""
    found, _ = queries.list_alerts(engine, queries.AlertFilters(account=account), limit=limit)
    return {alert["window_id"]: alert for alert in found}
