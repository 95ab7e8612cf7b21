"""A window's stored events with their times, for merging them with the Parquet event
archive's (rolewatch.scale.source) in one (time, id) order."""

from __future__ import annotations

import sqlalchemy as sa
from sqlalchemy.engine import Connection, Row

from rolewatch.store.schema import events


def timed_events_between(connection: Connection, start_us: int, end_us: int) -> list[Row]:
    """``(event_id, time_us, actor, target, weight)`` of the stored events with
    ``start_us <= time < end_us``, late ones included."""
    return list(
        connection.execute(
            sa.select(
                events.c.event_id,
                events.c.time_us,
                events.c.actor,
                events.c.target,
                events.c.weight,
            ).where(events.c.time_us >= start_us, events.c.time_us < end_us)
        ).all()
    )
