"""Window records and the events a window covers.

A window's row is written once, in the transaction that closes it (status ``closed``). A
training window closed before any model exists is recorded without measures; the close
that ends training fills them in (the back-fill). A window covers the events with
``start_us <= time_us < end_us``.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from rolewatch.store.db import inserted_id
from rolewatch.store.schema import events, service_state, windows


@dataclass(frozen=True)
class StreamState:
    """What the store knows about the stream when deciding what to close."""

    min_event_us: int | None
    max_event_us: int | None
    last_closed_end_us: int | None
    last_ingest_us: int | None


@dataclass(frozen=True)
class WindowMeasures:
    """What measuring a window against the frozen model adds to its record."""

    recipe_version: str
    basis_version: str
    reconstruction_error: float | None
    account_count: int
    alert_count: int
    new_count: int
    inactive_count: int
    scored_count: int
    close_seconds: float
    stage_seconds: dict[str, float] | None = None  # {stage: seconds} of the close

    def values(self) -> dict[str, Any]:
        """The window row's columns for these measures."""
        values = asdict(self)
        if self.stage_seconds is not None:
            values["stage_seconds"] = json.dumps(self.stage_seconds)
        return values


@dataclass(frozen=True)
class WindowSpan:
    """A closed window's id and range."""

    id: int
    start_us: int
    end_us: int


def read_stream_state(connection: Connection) -> StreamState:
    """Event time bounds, the end of the last closed window and the last ingest time."""
    bounds = connection.execute(
        sa.select(sa.func.min(events.c.time_us), sa.func.max(events.c.time_us))
    ).one()
    last_end = connection.execute(sa.select(sa.func.max(windows.c.end_us))).scalar()
    last_ingest = connection.execute(
        sa.select(service_state.c.value).where(service_state.c.key == "last_ingest_us")
    ).scalar()
    return StreamState(
        min_event_us=bounds[0],
        max_event_us=bounds[1],
        last_closed_end_us=last_end,
        last_ingest_us=int(last_ingest) if last_ingest is not None else None,
    )


def unmeasured_training_windows(connection: Connection) -> list[WindowSpan]:
    """Training windows recorded before a model existed, oldest first."""
    rows = connection.execute(
        sa.select(windows.c.id, windows.c.start_us, windows.c.end_us)
        .where(windows.c.training, windows.c.basis_version.is_(None))
        .order_by(windows.c.end_us)
    ).all()
    return [WindowSpan(row.id, row.start_us, row.end_us) for row in rows]


def closed_windows_within(connection: Connection, start_us: int, end_us: int) -> list[WindowSpan]:
    """Closed windows that lie inside ``[start_us, end_us]``, oldest first."""
    rows = connection.execute(
        sa.select(windows.c.id, windows.c.start_us, windows.c.end_us)
        .where(windows.c.start_us >= start_us, windows.c.end_us <= end_us)
        .order_by(windows.c.end_us)
    ).all()
    return [WindowSpan(row.id, row.start_us, row.end_us) for row in rows]


def is_closed(connection: Connection, end_us: int) -> bool:
    """True when the window ending at ``end_us`` has been recorded closed."""
    found = connection.execute(sa.select(windows.c.id).where(windows.c.end_us == end_us)).first()
    return found is not None


def count_events_between(connection: Connection, start_us: int, end_us: int) -> int:
    """Stored events with ``start_us <= time < end_us`` (late ones included)."""
    return connection.execute(
        sa.select(sa.func.count())
        .select_from(events)
        .where(events.c.time_us >= start_us, events.c.time_us < end_us)
    ).scalar_one()


def insert_window(
    connection: Connection,
    *,
    start_us: int,
    end_us: int,
    closed_us: int,
    event_count: int,
    training: bool,
    measures: WindowMeasures | None,
) -> int:
    """Record a window closed; return its id. ``measures`` is None for a training window
    closed before the model exists."""
    values = {
        "start_us": start_us,
        "end_us": end_us,
        "status": "closed",
        "closed_us": closed_us,
        "event_count": event_count,
        "training": training,
        "late_count": 0,
    }
    if measures is not None:
        values.update(measures.values())
    return inserted_id(connection.execute(windows.insert().values(**values)))


def set_measures(connection: Connection, window_id: int, measures: WindowMeasures) -> None:
    """Fill in the measures of a training window recorded before the model existed."""
    connection.execute(
        windows.update().where(windows.c.id == window_id).values(**measures.values())
    )


def set_stage_seconds(connection: Connection, window_id: int, seconds: dict[str, float]) -> None:
    """Record the stage times of a window's close (the write is timed last, so it is filled
    in once the rest of the window is written)."""
    connection.execute(
        windows.update().where(windows.c.id == window_id).values(stage_seconds=json.dumps(seconds))
    )


def first_event_time_from(connection: Connection, start_us: int) -> int | None:
    """The earliest stored event time at or after ``start_us`` (late ones included), or None."""
    return connection.execute(
        sa.select(sa.func.min(events.c.time_us)).where(events.c.time_us >= start_us)
    ).scalar()
