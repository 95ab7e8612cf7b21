"""What a window close reads from the store, as the arrays the engine takes: a window's
events, and the stored memberships of the windows before it."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from rolewatch.clock import to_rfc3339
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.model import FrozenModel
from rolewatch.store import memberships as stored_memberships
from rolewatch.store.alerts import WindowRef
from rolewatch.store.db import Connection
from rolewatch.store.windows import events_between


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


@dataclass(frozen=True)
class PastWindow:
    """What one earlier window left for the windows after it, mapped onto the model's role
    ids: mixtures (NaN rows where the account had too little activity to fit a role),
    activity and tie counts, and the window's communities."""

    accounts: np.ndarray  # str
    mixture: np.ndarray  # m x k, columns in model.basis.role_ids order
    events: np.ndarray  # m, events out + in
    events_out: np.ndarray | None = None  # m
    counterparts: np.ndarray | None = None  # m
    new_counterparts: np.ndarray | None = None  # m
    ties: np.ndarray | None = None  # m x 4 (engine.ties.TIE_CELLS), NaN where unknown
    community: np.ndarray | None = None  # m, -1 where none
    ref: WindowRef | None = None  # the window's id, start and end

    @property
    def events_in(self) -> np.ndarray | None:
        return None if self.events_out is None else self.events - self.events_out


def load_window_events(connection: Connection, start_us: int, end_us: int) -> WindowEvents:
    """All stored events with ``start_us <= time < end_us``.

    Late events are included: a window that is still open takes every event in its range,
    whenever it arrived (a closed window is never reloaded).
    """
    rows = events_between(connection, start_us, end_us)
    if not rows:
        empty = np.array([], dtype=object)
        return WindowEvents(empty, empty, empty, np.array([], dtype=np.float64))
    event_id, actor, target, weight = zip(*rows, strict=True)
    return WindowEvents(
        event_id=np.array(event_id, dtype=object),
        actor=np.array(actor, dtype=object),
        target=np.array(target, dtype=object),
        weight=np.array(weight, dtype=np.float64),
    )


def load_past_windows(
    connection: Connection, model: FrozenModel, *, before_end_us: int, limit: int
) -> list[PastWindow]:
    """Stored memberships of the last ``limit`` measured windows before ``before_end_us``,
    oldest first, with mixtures laid out in the model's role order (missing roles are 0;
    accounts with too little activity get NaN rows)."""
    column_of = {str(role_id): column for column, role_id in enumerate(model.basis.role_ids)}
    k = len(column_of)
    past = []
    for window_id, start_us, end_us in stored_memberships.measured_windows(
        connection, before_end_us=before_end_us, limit=limit
    ):
        stored = stored_memberships.window_columns(connection, window_id)
        mixture = np.zeros((len(stored.accounts), k))
        for index, shares in enumerate(stored.mixtures):
            for role_id, weight in shares.items():
                column = column_of.get(role_id)
                if column is not None:
                    mixture[index, column] = weight
        totals = mixture.sum(axis=1, keepdims=True)
        np.divide(mixture, totals, out=mixture, where=totals > 0)
        mixture[stored.status == "too_little"] = np.nan
        past.append(
            PastWindow(
                accounts=stored.accounts,
                mixture=mixture,
                events=stored.events_out + stored.events_in,
                events_out=stored.events_out,
                counterparts=stored.counterparts,
                new_counterparts=stored.new_counterparts,
                ties=stored.ties,
                community=stored.community,
                ref=WindowRef(id=window_id, start=to_rfc3339(start_us), end=to_rfc3339(end_us)),
            )
        )
    return past
