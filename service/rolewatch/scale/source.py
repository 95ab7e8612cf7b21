"""Where a window close reads its events: the SQL store, or the Parquet event archive
together with the events ingested into the store (``event_source``).

The closer calls these instead of the store's reads; with ``event_source = "store"`` they
are exactly the store's reads.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, fields
from datetime import datetime, timedelta
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from rolewatch.clock import EPOCH
from rolewatch.config import Settings
from rolewatch.pipeline.loading import WindowEvents, from_codes
from rolewatch.pipeline.loading import start_window_events as start_window_events_in_store
from rolewatch.store import windows as stored_windows
from rolewatch.store.account_codes import coded_accounts
from rolewatch.store.alerts import WindowRef
from rolewatch.store.db import Connection, Engine
from rolewatch.store.windows import StreamState

# the archive's columns a close reads (kind is not part of a window's graph)
_COLUMNS = ["id", "time", "actor", "target", "weight"]

__all__ = [
    "ArchivedWindowEvents",
    "first_event_time_from",
    "stored_part",
    "start_window_events",
    "stored_events_reader",
    "stream_state",
    "window_events",
]


@dataclass(frozen=True)
class ArchivedWindowEvents(WindowEvents):
    """A window's events read from the archive and the store; ``from_store`` of them came
    from the store (the closer's re-check counts those)."""

    from_store: int = 0


def _archive(settings: Settings) -> str | None:
    return settings.event_archive if settings.event_source == "archive" else None


def stream_state(connection: Connection, settings: Settings) -> StreamState:
    """The store's stream state, its event time bounds widened by the archive's."""
    state = stored_windows.read_stream_state(connection)
    archive = _archive(settings)
    if archive is None:
        return state
    from rolewatch.scale.archive import archive_span

    span = archive_span(archive)
    if span is None:
        return state
    low = [t for t in (state.min_event_us, span.min_us) if t is not None]
    high = [t for t in (state.max_event_us, span.max_us) if t is not None]
    return StreamState(
        min_event_us=min(low),
        max_event_us=max(high),
        last_closed_end_us=state.last_closed_end_us,
        last_ingest_us=state.last_ingest_us,
    )


def first_event_time_from(connection: Connection, settings: Settings, start_us: int) -> int | None:
    """The earliest event time at or after ``start_us`` in the store or the archive."""
    stored = stored_windows.first_event_time_from(connection, start_us)
    archive = _archive(settings)
    if archive is None:
        return stored
    from rolewatch.scale.archive import first_time_from

    archived = first_time_from(archive, start_us)
    found = [t for t in (stored, archived) if t is not None]
    return min(found) if found else None


def window_events(
    connection: Connection, settings: Settings, start_us: int, end_us: int
) -> WindowEvents:
    """The window's events from the archive and the store (an id in both counts once),
    sorted by (time, id) as the store alone sorts them."""
    return start_window_events(connection, settings, start_us, end_us)()


def start_window_events(
    connection: Connection, settings: Settings, start_us: int, end_us: int
) -> Callable[[], WindowEvents]:
    """:func:`window_events`, finished by calling the returned function while
    ``connection`` is open: the store alone reads a large SQLite window in the meantime
    (:func:`rolewatch.pipeline.loading.start_window_events`); with the archive everything is
    read when it is called."""
    archive = _archive(settings)
    if archive is None:
        return start_window_events_in_store(connection, start_us, end_us)
    return lambda: _archived_window_events(connection, archive, start_us, end_us)


def _archived_window_events(
    connection: Connection, archive: str, start_us: int, end_us: int
) -> ArchivedWindowEvents:
    from rolewatch.scale.archive import read_window
    from rolewatch.store.event_times import timed_events_between

    table = read_window(archive, start_us, end_us).select(_COLUMNS)
    rows = timed_events_between(connection, start_us, end_us)
    both = pa.concat_tables([table, _stored_table(rows, table.schema)])
    # (time, id) order, stable: of an id in both, the archive's row (first) comes first
    order = pc.sort_indices(both, [("time", "ascending"), ("id", "ascending")]).to_numpy()
    id_code = both.column("id").combine_chunks().dictionary_encode().indices.to_numpy()
    _, first = np.unique(id_code[order], return_index=True)
    kept = both.take(pa.array(order[np.sort(first)]))
    names, actor_code, target_code = coded_accounts(kept.column("actor"), kept.column("target"))
    events = from_codes(
        kept.column("id").combine_chunks(),
        names,
        actor_code,
        target_code,
        kept.column("weight").to_numpy(),
    )
    return ArchivedWindowEvents(
        **{field.name: getattr(events, field.name) for field in fields(events)},
        from_store=len(rows),
    )


def _stored_table(rows: list[Any], schema: pa.Schema) -> pa.Table:
    """The store's ``(event_id, time_us, actor, target, weight)`` rows as a table of the
    archive's columns and types."""
    columns: list[tuple[Any, ...]] = list(zip(*rows, strict=True)) if rows else [()] * 5
    return pa.table(
        [pa.array(values, type=field.type) for values, field in zip(columns, schema, strict=True)],
        schema=schema,
    )


def stored_part(events: WindowEvents) -> int:
    """How many of the window's events the store holds (what the close re-check counts)."""
    return events.from_store if isinstance(events, ArchivedWindowEvents) else len(events)


def stored_events_reader(
    engine: Engine, settings: Settings
) -> Callable[[WindowRef], WindowEvents | None]:
    """Reads an earlier window's events back (for the features an alert shows as "before");
    None once retention purged them."""

    def read(ref: WindowRef) -> WindowEvents | None:
        with engine.connect() as connection:
            events = window_events(connection, settings, _micros(ref.start), _micros(ref.end))
        return events if len(events) else None

    return read


def _micros(text: str) -> int:
    """Microseconds since the epoch of an RFC 3339 time written by ``to_rfc3339``."""
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return (moment - EPOCH) // timedelta(microseconds=1)
