"""Where a window close reads its events: the SQL store, or the Parquet event archive
together with the events ingested into the store (``event_source``).

The closer calls these instead of the store's reads; with ``event_source = "store"`` they
are exactly the store's reads.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass, fields
from datetime import datetime, timedelta

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from rolewatch.clock import EPOCH
from rolewatch.config import Settings
from rolewatch.pipeline.loading import (
    ClosingEvents,
    EventsElsewhere,
    WindowEvents,
    from_codes,
    read_with_ids_on_disk,
)
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
    "closing_events",
    "first_event_time_from",
    "read_on_cluster",
    "read_window_events",
    "stored_events",
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

    table = read_window(archive, start_us, end_us).select(_COLUMNS)
    stored = stored_events(connection, start_us, end_us)
    both = pa.concat_tables([table, stored.cast(table.schema)])
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
        from_store=stored.num_rows,
    )


def stored_events(connection: Connection, start_us: int, end_us: int) -> pa.Table:
    """The store's events of ``[start_us, end_us)`` as a table of the archive's columns,
    read in batches (:func:`rolewatch.store.event_times.timed_event_batches`): with the
    archive as source, the store may still hold whole windows from before the switch (a
    baseline the evidence reads again), and a window's rows as Python objects would cost
    the closing process several times the table."""
    from rolewatch.scale.archive_events import stored_batches_table
    from rolewatch.store.event_times import timed_event_batches

    return stored_batches_table(timed_event_batches(connection, start_us, end_us))


def read_window_events(
    connection: Connection, settings: Settings, start_us: int, end_us: int
) -> WindowEvents:
    """:func:`window_events`, a large window's ids kept on disk and the memory Arrow freed
    meanwhile handed back (:func:`rolewatch.pipeline.loading.read_with_ids_on_disk`)."""
    return read_with_ids_on_disk(
        lambda: window_events(connection, settings, start_us, end_us), settings.close_scratch_dir
    )


def stored_part(events: ClosingEvents) -> int:
    """How many of the window's events the store holds (what the close re-check counts)."""
    if isinstance(events, ArchivedWindowEvents | EventsElsewhere):
        return events.from_store
    return len(events)


def closing_events(
    connection: Connection,
    settings: Settings,
    measure: object,
    finish: Callable[[], WindowEvents],
    start_us: int,
    end_us: int,
) -> ClosingEvents:
    """The events of the window a measured close computes: read by the Dask workers when
    they can be (:func:`read_on_cluster`), else by ``finish`` (what
    :func:`start_window_events` started) with a large window's ids kept on disk."""
    on_cluster = read_on_cluster(connection, settings, measure, start_us, end_us)
    if on_cluster is not None:
        return on_cluster
    return read_with_ids_on_disk(finish, settings.close_scratch_dir)


def read_on_cluster(
    connection: Connection,
    settings: Settings,
    measure: object,
    start_us: int,
    end_us: int,
    *,
    whole_snapshot: bool = True,
) -> EventsElsewhere | None:
    """The window's events read by the Dask workers (the archive's files there, the store's
    few events sent along: :mod:`rolewatch.scale.archive_events`) when they come from the
    archive and ``measure`` is a Dask cluster; None otherwise (the caller reads them).
    Without ``whole_snapshot`` the window's arcs stay on the workers until asked for
    (:meth:`~rolewatch.scale.archive_events.WorkerEvents.snapshot_around`)."""
    archive = _archive(settings)
    if archive is None or settings.compute != "dask" or settings.archive_reader != "workers":
        return None
    from rolewatch.scale.archive import window_paths
    from rolewatch.scale.archive_events import read_on_workers
    from rolewatch.scale.dispatch import DaskMeasure

    if not isinstance(measure, DaskMeasure):
        return None
    stored = stored_events(connection, start_us, end_us)
    # a path the workers open as this process does, wherever they were started
    archive = archive if "://" in archive else os.path.abspath(archive)
    paths = window_paths(archive, start_us, end_us)
    found = measure.retried(
        lambda: read_on_workers(
            measure.client,
            archive,
            paths,
            stored,
            start_us,
            end_us,
            measure.partitions_for,
            whole_snapshot=whole_snapshot,
        )
    )
    pa.default_memory_pool().release_unused()  # the accounts' Arrow buffers, gathered and let go
    return found


def stored_events_reader(
    engine: Engine, settings: Settings, measure: object = None
) -> Callable[[WindowRef], ClosingEvents | None]:
    """Reads an earlier window's events back (for the features an alert shows as "before"):
    on the Dask workers as the closing window's when they can be (:func:`read_on_cluster`,
    ``measure`` the close's; the window's arcs left there, the evidence gathers its alerted
    accounts' only), else here, a large window's ids kept on disk; None once retention
    purged them."""

    def read(ref: WindowRef) -> ClosingEvents | None:
        start_us, end_us = _micros(ref.start), _micros(ref.end)
        with engine.connect() as connection:
            elsewhere = read_on_cluster(
                connection, settings, measure, start_us, end_us, whole_snapshot=False
            )
            if elsewhere is not None:
                return elsewhere if len(elsewhere) else None
            events = read_window_events(connection, settings, start_us, end_us)
        return events if len(events) else None

    return read


def _micros(text: str) -> int:
    """Microseconds since the epoch of an RFC 3339 time written by ``to_rfc3339``."""
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return (moment - EPOCH) // timedelta(microseconds=1)
