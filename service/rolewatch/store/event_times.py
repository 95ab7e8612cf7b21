"""A window's stored events with their times, for merging them with the Parquet event
archive's (rolewatch.scale.source) in one (time, id) order."""

from __future__ import annotations

from collections.abc import Iterator, Sequence

import sqlalchemy as sa
from sqlalchemy.engine import Connection, Row

from rolewatch.store.schema import events

__all__ = ["BATCH_ROWS", "timed_event_batches", "timed_events_between"]

# Rows fetched at once by :func:`timed_event_batches`: a few tens of MB of Python rows
# (common practice, no source).
BATCH_ROWS = 100_000


def _timed_events(start_us: int, end_us: int) -> sa.Select:
    return sa.select(
        events.c.event_id,
        events.c.time_us,
        events.c.actor,
        events.c.target,
        events.c.weight,
    ).where(events.c.time_us >= start_us, events.c.time_us < end_us)


def timed_events_between(connection: Connection, start_us: int, end_us: int) -> list[Row]:
    """``(event_id, time_us, actor, target, weight)`` of the stored events with
    ``start_us <= time < end_us``, late ones included."""
    return list(connection.execute(_timed_events(start_us, end_us)).all())


def timed_event_batches(
    connection: Connection, start_us: int, end_us: int, batch_rows: int = BATCH_ROWS
) -> Iterator[Sequence[Row]]:
    """:func:`timed_events_between` in batches of at most ``batch_rows`` rows, fetched as
    they are asked for (a server-side cursor where the database has one), so a caller that
    turns each batch into columns never holds a large window's rows as Python objects
    (about 400 bytes an event) all at once."""
    result = connection.execution_options(yield_per=batch_rows).execute(
        _timed_events(start_us, end_us)
    )
    yield from result.partitions()
