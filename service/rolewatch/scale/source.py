"""Where a window close reads its events: the SQL store, or the Parquet event archive
together with the events ingested into the store (``event_source``).

The closer calls these instead of the store's reads; with ``event_source = "store"`` they
are exactly the store's reads. pyarrow is imported only when the archive is used.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from rolewatch.config import Settings
from rolewatch.pipeline.loading import WindowEvents, load_window_events
from rolewatch.store import windows as stored_windows
from rolewatch.store.db import Connection
from rolewatch.store.windows import StreamState

__all__ = [
    "ArchivedWindowEvents",
    "first_event_time_from",
    "stored_part",
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
    archive = _archive(settings)
    if archive is None:
        return load_window_events(connection, start_us, end_us)
    from rolewatch.scale.archive import read_window
    from rolewatch.store.event_times import timed_events_between

    table = read_window(archive, start_us, end_us)
    rows = timed_events_between(connection, start_us, end_us)
    stored: list[tuple[Any, ...]] = list(zip(*rows, strict=True)) if rows else [()] * 5
    ids = np.concatenate(
        [table.column("id").to_numpy(zero_copy_only=False), np.asarray(stored[0])]
    ).astype(str)
    times = np.concatenate([table.column("time").to_numpy(), np.asarray(stored[1], dtype=np.int64)])
    order = np.lexsort((ids, times))
    _, first = np.unique(ids[order], return_index=True)  # archive rows come first per id
    keep = order[np.sort(first)]

    def column(name: str, index: int, dtype: type) -> np.ndarray:
        archived: np.ndarray = np.asarray(
            table.column(name).to_numpy(zero_copy_only=False), dtype=dtype
        )
        return np.concatenate([archived, np.asarray(stored[index], dtype=dtype)])[keep]

    return ArchivedWindowEvents(
        event_id=ids.astype(object)[keep],
        actor=column("actor", 2, object),
        target=column("target", 3, object),
        weight=column("weight", 4, np.float64),
        from_store=len(rows),
    )


def stored_part(events: WindowEvents) -> int:
    """How many of the window's events the store holds (what the close re-check counts)."""
    return events.from_store if isinstance(events, ArchivedWindowEvents) else len(events)
