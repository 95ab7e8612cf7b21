"""The rows behind the review figures: every alert with its review outcome, and every alert a
suppression held back, each with its window and its role move (current role names).

:mod:`rolewatch.review.stats` counts them; this module only reads.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import and_, select
from sqlalchemy.engine import Connection

from rolewatch.store.review import named_roles
from rolewatch.store.review_schema import case_alerts, suppressed_alerts
from rolewatch.store.schema import alerts, windows


def _range(column: Any, from_us: int | None, to_us: int | None) -> Any:
    conditions = []
    if from_us is not None:
        conditions.append(column >= from_us)
    if to_us is not None:
        conditions.append(column < to_us)
    return and_(True, *conditions)


def alert_outcomes(
    connection: Connection, *, from_us: int | None = None, to_us: int | None = None
) -> list[dict[str, Any]]:
    """One row per alert whose window ends in ``[from_us, to_us)``: window, raise time,
    roles, and the decision that applies to it now with its first decision time."""
    joined, before_name, after_name = named_roles(alerts)
    query = (
        select(
            alerts.c.id.label("alert_id"),
            alerts.c.window_id,
            windows.c.start_us.label("window_start_us"),
            alerts.c.window_end_us,
            alerts.c.created_us,
            alerts.c.role_before,
            alerts.c.role_after,
            before_name,
            after_name,
            case_alerts.c.decision,
            case_alerts.c.reason,
            case_alerts.c.first_decided_us,
        )
        .select_from(
            joined.join(windows, windows.c.id == alerts.c.window_id).outerjoin(
                case_alerts, case_alerts.c.alert_id == alerts.c.id
            )
        )
        .where(_range(alerts.c.window_end_us, from_us, to_us))
        .order_by(alerts.c.id)
    )
    return [dict(row._mapping) for row in connection.execute(query)]


def held_back(
    connection: Connection, *, from_us: int | None = None, to_us: int | None = None
) -> list[dict[str, Any]]:
    """One row per alert a suppression held back in a window ending in ``[from_us, to_us)``."""
    joined, before_name, after_name = named_roles(suppressed_alerts)
    query = (
        select(
            suppressed_alerts.c.window_id,
            windows.c.start_us.label("window_start_us"),
            windows.c.end_us.label("window_end_us"),
            suppressed_alerts.c.role_before,
            suppressed_alerts.c.role_after,
            before_name,
            after_name,
        )
        .select_from(joined.join(windows, windows.c.id == suppressed_alerts.c.window_id))
        .where(_range(windows.c.end_us, from_us, to_us))
        .order_by(suppressed_alerts.c.id)
    )
    return [dict(row._mapping) for row in connection.execute(query)]
