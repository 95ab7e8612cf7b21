"""What a window close reads from the store, as the arrays the engine takes: a window's
events, and the stored memberships of the windows before it."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Protocol, TypeAlias, overload, runtime_checkable

import numpy as np
from sqlalchemy.engine import Engine

from rolewatch.clock import to_rfc3339
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.model import FrozenModel
from rolewatch.store import memberships as stored_memberships
from rolewatch.store.alerts import WindowRef
from rolewatch.store.db import Connection
from rolewatch.store.event_columns import start_event_columns
from rolewatch.store.event_ids import EventIds, as_event_ids, kept_on_disk, reordered

# A window of at least this many events keeps its ids on local disk during its close (about
# 20 MB of ids at this size; smaller windows' are not worth a file; common practice, no source).
IDS_ON_DISK_MIN_EVENTS = 1_000_000


@dataclass(frozen=True)
class WindowEvents:
    """The events of one window, sorted by (time, event id) so sums are reproducible.

    The account ids are interned once for the window (:func:`interned`,
    :func:`from_codes`): ``accounts`` holds each distinct id once, sorted, and every event
    only its actor's and target's positions among them (``actor_index``,
    ``target_index``; int32 below 2**31 accounts). The snapshot is built from the positions
    without looking an id up again, and a large window holds no id per event (two object
    references an event would be 480 MB at 30,000,000 events).
    """

    event_id: EventIds  # object array of str, or an Arrow string array (store.event_ids)
    accounts: np.ndarray  # object array of str, sorted, distinct
    actor_index: np.ndarray
    target_index: np.ndarray
    weight: np.ndarray

    def __len__(self) -> int:
        return len(self.event_id)

    @property
    def actor(self) -> np.ndarray:
        """Each event's actor id (built on each call; the close reads the positions)."""
        return self.accounts[self.actor_index]

    @property
    def target(self) -> np.ndarray:
        """Each event's target id (built on each call; the close reads the positions)."""
        return self.accounts[self.target_index]

    def account_count(self) -> int:
        """How many distinct accounts the events involve."""
        return len(self.accounts)

    def snapshot(self) -> Snapshot:
        return Snapshot.from_interned(
            self.accounts, self.actor_index, self.target_index, self.weight
        )

    def rows_in(self, snapshot: Snapshot) -> tuple[np.ndarray, np.ndarray]:
        """Each event's actor and target as rows of ``snapshot``: the interned positions
        when the snapshot's nodes are these accounts (as :meth:`snapshot` builds it), else
        the accounts looked up once each."""
        nodes = snapshot.nodes
        if self.accounts is nodes or np.array_equal(self.accounts, nodes):
            return self.actor_index, self.target_index
        row_of = snapshot.index_of(self.accounts)
        return row_of[self.actor_index], row_of[self.target_index]


@runtime_checkable
class EventsElsewhere(Protocol):
    """A window's events this process does not hold (read and kept by a Dask cluster's
    workers, :class:`rolewatch.scale.archive_events.WorkerEvents`): what a close asks of
    them instead of the events themselves."""

    from_store: int  # how many came from the store (what the close's re-check counts)

    def __len__(self) -> int: ...

    def snapshot(self) -> Snapshot: ...

    def snapshot_around(self, accounts: np.ndarray) -> Snapshot:
        """The snapshot holding only the arcs into and out of ``accounts`` (ids)."""
        ...

    def account_count(self) -> int: ...

    def sample_event_ids(self, rows: np.ndarray, per_account: int = 5) -> dict[int, list[str]]:
        """The first ``per_account`` event ids (in (time, id) order) of each of ``rows``."""
        ...


# The events a close measures: held here, or held by the workers.
ClosingEvents: TypeAlias = WindowEvents | EventsElsewhere


def read_with_ids_on_disk(
    read: Callable[[], WindowEvents], directory: str | None = None
) -> WindowEvents:
    """The events ``read()`` gives, a large window's ids moved to a memory-mapped file in
    ``directory`` (:func:`rolewatch.store.event_ids.kept_on_disk`; the close reads only the
    few an alert quotes; a window under :data:`IDS_ON_DISK_MIN_EVENTS` events keeps them in
    memory), then the memory Arrow freed meanwhile handed back to the operating system.

    Arrow's allocator keeps what it frees for its own next allocations, and a close's later
    stages allocate mostly outside Arrow (numpy): without the hand-back the read's Arrow
    buffers (the ids among them) would stay in the process's memory until the close ends.
    """
    import pyarrow as pa

    events = read()
    if len(events) >= IDS_ON_DISK_MIN_EVENTS:
        events = replace(events, event_id=kept_on_disk(events.event_id, directory))
    pa.default_memory_pool().release_unused()
    return events


def interned(event_id, actor, target, weight, *, order=None) -> WindowEvents:
    """Window events whose account ids are interned once: each distinct id is one string
    object, and every event holds its accounts' positions among the sorted distinct ids
    (pandas' hash-based ``factorize`` on both columns at once, then :func:`from_codes`).

    ``order``, when given, is the permutation that puts the events in (time, event id)
    order: the ids are interned as they come and only integer positions, event ids and
    weights are permuted (no reordering of two million account strings).
    """
    import pandas as pd

    both = np.concatenate([np.asarray(actor, dtype=object), np.asarray(target, dtype=object)])
    codes, names = pd.factorize(both)
    n = len(codes) // 2
    return from_codes(event_id, names, codes[:n], codes[n:], weight, order=order)


def from_codes(event_id, names, actor_code, target_code, weight, *, order=None) -> WindowEvents:
    """Window events from account codes into ``names`` (distinct ids in any order): the few
    distinct ids are sorted and the codes become positions among them."""
    distinct, by_text = _sorted_ids(names)
    rank = np.empty(by_text.size, dtype=_index_type(by_text.size))
    rank[by_text] = np.arange(by_text.size)
    actor_index, target_index = rank[actor_code], rank[target_code]
    event_id = as_event_ids(event_id)
    weight = np.asarray(weight, dtype=np.float64)
    if order is not None:
        actor_index, target_index = actor_index[order], target_index[order]
        event_id, weight = reordered(event_id, order), weight[order]
    return WindowEvents(
        event_id=event_id,
        accounts=distinct[by_text],
        actor_index=actor_index,
        target_index=target_index,
        weight=weight,
    )


def _sorted_ids(names) -> tuple[np.ndarray, np.ndarray]:
    """The distinct ids as an object array of str, and the permutation that sorts them by
    code point (Arrow's sort of their UTF-8 bytes, the order Python and numpy compare str
    in), without numpy's fixed-width text: that takes 4 bytes a character of the longest id
    for every id. Ids that are not str (ints, say) are written as str first."""
    import pyarrow as pa
    import pyarrow.compute as pc

    distinct = np.asarray(names, dtype=object)
    try:
        text = pa.array(distinct, type=pa.large_string())
    except (pa.ArrowTypeError, pa.ArrowInvalid):
        distinct = distinct.astype(str).astype(object)
        text = pa.array(distinct, type=pa.large_string())
    return distinct, pc.sort_indices(text).to_numpy()


def _index_type(count: int) -> type[np.integer]:
    """The narrowest of int32 and int64 that holds positions among ``count`` accounts."""
    return np.int32 if count < 2**31 else np.int64


@dataclass(frozen=True)
class PastWindowFacts:
    """What the close keeps of an earlier window once its accounts are folded into their
    history (:func:`rolewatch.pipeline.history.account_history`): which window it was, and
    its account and event counts, by which the features kept from its close are matched to it
    (:class:`rolewatch.pipeline.recent.RecentFeatures`)."""

    ref: WindowRef | None
    accounts: int
    events: int  # each event counted once (the stored counts hold every event twice)


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

    def facts(self) -> PastWindowFacts:
        return PastWindowFacts(
            ref=self.ref,
            accounts=len(self.accounts),
            events=int(round(float(np.nansum(self.events)) / 2)),
        )


def load_window_events(connection: Connection, start_us: int, end_us: int) -> WindowEvents:
    """All stored events with ``start_us <= time < end_us``.

    Late events are included: a window that is still open takes every event in its range,
    whenever it arrived (a closed window is never reloaded).
    """
    return start_window_events(connection, start_us, end_us)()


def start_window_events(
    connection: Connection, start_us: int, end_us: int
) -> Callable[[], WindowEvents]:
    """:func:`load_window_events`, finished by calling the returned function while
    ``connection`` is open; a large window is read in the meantime
    (:func:`rolewatch.store.event_columns.start_event_columns`)."""
    finish_columns = start_event_columns(connection, start_us, end_us)

    def finish() -> WindowEvents:
        columns = finish_columns()
        return from_codes(
            columns.event_id,
            columns.names,
            columns.actor_code,
            columns.target_code,
            columns.weight,
            order=columns.order,
        )

    return finish


class StoredPastWindows(Sequence[PastWindow]):
    """The last measured windows before a close, oldest first, each read from the store
    when it is asked for (and not kept).

    The close folds them into its accounts' history one at a time, newest first, so a long
    look-back of large windows is never held at once: each holds a string and a dozen
    numbers per account (about 0.9 GB for 4.6 million accounts).
    """

    def __init__(
        self,
        engine: Engine,
        model: FrozenModel,
        windows: list[tuple[int, int, int]],
        outputs: str | None = None,
    ) -> None:
        self.engine = engine
        self.model = model
        self.windows = windows  # (id, start_us, end_us), oldest first
        self.outputs = outputs

    def __len__(self) -> int:
        return len(self.windows)

    @overload
    def __getitem__(self, step: int) -> PastWindow: ...

    @overload
    def __getitem__(self, step: slice) -> Sequence[PastWindow]: ...

    def __getitem__(self, step: int | slice) -> PastWindow | Sequence[PastWindow]:
        if isinstance(step, slice):
            return StoredPastWindows(self.engine, self.model, self.windows[step], self.outputs)
        window_id, start_us, end_us = self.windows[step]
        with self.engine.connect() as connection:
            return read_past_window(
                connection, self.model, window_id, start_us, end_us, outputs=self.outputs
            )


def stored_past_windows(
    connection: Connection,
    engine: Engine,
    model: FrozenModel,
    *,
    before_end_us: int,
    limit: int,
    outputs: str | None = None,
) -> StoredPastWindows:
    """The last ``limit`` measured windows before ``before_end_us`` (listed now through
    ``connection``, each read through ``engine`` when it is asked for)."""
    listed = stored_memberships.measured_windows(
        connection, before_end_us=before_end_us, limit=limit
    )
    return StoredPastWindows(engine, model, listed, outputs)


def read_past_window(
    connection: Connection,
    model: FrozenModel,
    window_id: int,
    start_us: int,
    end_us: int,
    *,
    outputs: str | None = None,
) -> PastWindow:
    """One measured window's stored memberships, with mixtures laid out in the model's role
    order (missing roles are 0; accounts with too little activity get NaN rows). A window
    whose memberships the store does not hold (``store_memberships_max_accounts``) is read
    from the Parquet ``outputs``."""
    role_ids = [str(role_id) for role_id in model.basis.role_ids]
    stored = stored_memberships.window_columns(connection, window_id, role_ids)
    if not len(stored.accounts) and outputs:
        from rolewatch.scale.output_reads import stored_window

        stored = stored_window(outputs, end_us, role_ids)
    mixture = stored.mixture
    totals = mixture.sum(axis=1, keepdims=True)
    np.divide(mixture, totals, out=mixture, where=totals > 0)
    mixture[stored.status == "too_little"] = np.nan
    return PastWindow(
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
