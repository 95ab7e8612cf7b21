"""Read a window's events from the store into the arrays the engine takes."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import sqlalchemy as sa
from sqlalchemy.engine import Connection

from rolewatch.engine.snapshot import Snapshot
from rolewatch.store.schema import events


@dataclass(frozen=True)
class WindowEvents:
    """The events of one window, sorted by (time, event id) so sums are reproducible."""

    event_id: np.ndarray
    actor: np.ndarray
    target: np.ndarray
    weight: np.ndarray

    def __len__(self) -> int:
        return len(self.event_id)

    def snapshot(self) -> Snapshot:
        return Snapshot.from_events(self.actor, self.target, self.weight)


def load_window_events(connection: Connection, start_us: int, end_us: int) -> WindowEvents:
    """All stored events with ``start_us <= time < end_us``.

    Late events are included: a window that is still open takes every event in its range,
    whenever it arrived (a closed window is never reloaded).
    """
    query = (
        sa.select(events.c.event_id, events.c.actor, events.c.target, events.c.weight)
        .where(events.c.time_us >= start_us, events.c.time_us < end_us)
        .order_by(events.c.time_us, events.c.event_id)
    )
    rows = connection.execute(query).all()
    if not rows:
        empty = np.array([], dtype=object)
        return WindowEvents(empty, empty, empty, np.array([], dtype=np.float64))
    event_id, actor, target, weight = zip(*rows)
    return WindowEvents(
        event_id=np.array(event_id, dtype=object),
        actor=np.array(actor, dtype=object),
        target=np.array(target, dtype=object),
        weight=np.array(weight, dtype=np.float64),
    )
