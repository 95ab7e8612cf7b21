"""A window's events read as columns, the way each database hands them over fastest.

A window close reads every event of its window (a million or more) into arrays. Going row
by row through SQLAlchemy's result objects cost about 10 s for 1,000,000 events on SQLite
(a 2-core machine, ``rolewatch bench close``); the reads here hand the rows to numpy and
pandas in bulk instead, and give each account id once (``names``) with the events' codes
into it, so the caller interns a window's ids without hashing them again:

* SQLite: the window's first and last rowid are found on the time index (which holds the
  rowid), and the rows are read in rowid order between them: a stream is stored roughly in
  time order, so this reads the table's pages in sequence instead of jumping from the index
  to each row (3.7 s instead of 10.9 s for the rows of ``close-1m``, whose events were
  stored in random time order). A window of at least
  :data:`~rolewatch.store.sqlite_window_reader.HELPER_MIN_ROWS` rows in a database file is
  read by a helper process through the ADBC SQLite driver, as Arrow columns with the ids
  coded by Arrow (:mod:`rolewatch.store.sqlite_window_reader`; 1.2 s for ``close-1m``'s
  rows, and the closing process meanwhile reads the earlier windows' memberships). Smaller
  windows, in-memory databases, and any window the helper fails on are read here with
  Python's own ``sqlite3`` in chunks, each chunk's account ids coded by pandas'
  hash-based ``factorize`` and only its distinct ids kept, so a chunk's tuples and
  per-row objects are freed before the next is read (1,000,000 events: about 260 MB at
  the peak instead of 474 MB); the chunks' distinct ids are coded together at the end.
* PostgreSQL: the ADBC driver (Apache Arrow's database connectivity: the server's binary
  ``COPY`` format straight into Arrow columns, no Python object per row) and Arrow's
  ``dictionary_encode`` for the ids: 1.3 s for ``close-1m``'s rows where ``COPY`` as CSV
  parsed by pandas took 4.5 s.

Both leave the rows in the order the database returned them and sort by (time, event id)
in numpy (comparing ids by code point, as SQLite compares UTF-8 text and Python compares
strings; a database collation could differ). The columns stay in that storage order with
the sorting permutation beside them, so the caller reorders integer codes rather than a
million string objects per column. The event ids the helper and PostgreSQL read stay an
Arrow string array: no Python string per event (about 70 bytes each, 690 MB for a
10,000,000-event window, against about 20 bytes in Arrow).
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import Future
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy.engine import Connection

from rolewatch.store.account_codes import coded_accounts
from rolewatch.store.event_ids import EventIds, ids_at
from rolewatch.store.sqlite_window_reader import (
    HELPER_MIN_ROWS,
    ArrowWindow,
    RowRange,
    read_in_helper,
)

log = logging.getLogger(__name__)

# the first and last rowid of the window, found on the time index (which holds the rowid)
_SQLITE_SPAN = "SELECT min(seq), max(seq) FROM events WHERE time_us >= ? AND time_us < ?"
_SQLITE_ROWS = (
    "SELECT event_id, time_us, actor, target, weight FROM events WHERE seq BETWEEN ? AND ?"
    # unary + keeps SQLite from answering the range from the time index row by row
    " AND +time_us >= ? AND +time_us < ?"
)
# The bounds are integers formatted into the text (``:d``), so the statement needs no bound
# parameters; the driver reads results through binary COPY (its documentation).
_POSTGRES_SELECT = (
    "SELECT event_id, time_us, actor, target, weight FROM events"
    " WHERE time_us >= {start:d} AND time_us < {end:d}"
)


@dataclass(frozen=True)
class EventColumns:
    """A window's events in storage order. ``names`` holds each account id once (an object
    array of str, in no particular order); ``actor_code`` and ``target_code`` index it.
    ``event_id[order]`` (and so on) is the (time, event id) order."""

    event_id: EventIds
    names: np.ndarray  # object (str), distinct
    actor_code: np.ndarray  # int64
    target_code: np.ndarray  # int64
    weight: np.ndarray  # float64
    order: np.ndarray  # int64 permutation

    def __len__(self) -> int:
        return len(self.event_id)


def _empty() -> EventColumns:
    nothing = np.array([], dtype=object)
    no_codes = np.array([], dtype=np.int64)
    return EventColumns(nothing, nothing, no_codes, no_codes, np.array([]), no_codes)


def event_columns(connection: Connection, start_us: int, end_us: int) -> EventColumns:
    """The stored events with ``start_us <= time < end_us`` (late ones included), with the
    (time, event id) order that makes sums over them reproducible.

    On PostgreSQL the rows are read on a connection of their own (the ADBC driver's), and a
    large SQLite window by a helper process; both see whatever has been committed when they
    read. The closer re-checks the window's event count in its write transaction, so a batch
    that lands in between is never lost."""
    return start_event_columns(connection, start_us, end_us)()


def start_event_columns(
    connection: Connection, start_us: int, end_us: int
) -> Callable[[], EventColumns]:
    """:func:`event_columns`, started now and finished by calling the returned function
    while ``connection`` is still open. The reads that do not use ``connection`` (a large
    SQLite window's, by the helper process; PostgreSQL's, by the ADBC driver) run on a
    thread in the meantime, so the caller can read other things on ``connection``; a small
    SQLite window is read when the function is called."""
    start_us, end_us = int(start_us), int(end_us)
    if connection.dialect.name == "postgresql":
        return _handed_over(_on_thread(_postgres_columns, libpq_uri(connection), start_us, end_us))
    dbapi_connection: Any = connection.connection.dbapi_connection
    low, high = dbapi_connection.execute(_SQLITE_SPAN, (start_us, end_us)).fetchone()
    if low is None:
        return _empty
    rows = RowRange(int(low), int(high), start_us, end_us)
    path = _database_file(dbapi_connection)
    if not path or rows.high - rows.low + 1 < HELPER_MIN_ROWS:
        return lambda: _read_here(dbapi_connection, rows)
    reading = _handed_over(
        _on_thread(read_in_helper, path, rows, busy_timeout_ms=_busy_ms(dbapi_connection))
    )

    def finish() -> EventColumns:
        try:
            return _from_arrow(reading())
        except OSError as error:
            log.warning("the window reader failed (%s); reading the window here", error)
            return _read_here(dbapi_connection, rows)

    return finish


def _on_thread(function: Callable[..., Any], *args: Any, **kwargs: Any) -> Future:
    """``function(*args, **kwargs)`` run on a thread of its own; its result or exception
    in the future."""
    future: Future = Future()

    def run() -> None:
        try:
            future.set_result(function(*args, **kwargs))
        except BaseException as error:  # handed to whoever waits for the result
            future.set_exception(error)

    threading.Thread(target=run, name="rolewatch-window-read", daemon=True).start()
    return future


def _handed_over(future: Future) -> Callable[[], Any]:
    """``future.result``, letting go of the future as it returns: the caller keeps the
    function for the whole close, and a future kept with it would hold the window's read
    (the helper's answer, about 40 bytes an event, or PostgreSQL's columns) until the end.
    A second call raises RuntimeError."""
    held = [future]

    def result() -> Any:
        if not held:
            raise RuntimeError("the window's events were handed over already; read them again")
        return held.pop().result()

    return result


# Rows fetched and coded at once on SQLite: each chunk's tuples, numbers and per-event id
# strings are freed before the next is read; only each distinct account id is kept.
SQLITE_CHUNK_ROWS = 262_144


def _read_here(dbapi_connection: Any, rows: RowRange) -> EventColumns:
    """The rows read with Python's ``sqlite3`` in chunks."""
    import pandas as pd

    cursor = dbapi_connection.cursor()
    chunks = []
    try:
        cursor.execute(_SQLITE_ROWS, (rows.low, rows.high, rows.start_us, rows.end_us))
        while fetched := cursor.fetchmany(SQLITE_CHUNK_ROWS):
            chunks.append(_Chunk.of(fetched))
            del fetched
    finally:
        cursor.close()
    if not chunks:
        return _empty()
    # every chunk's distinct ids coded once more, together; a chunk's own codes then map
    # through its slice of those codes
    code_of_distinct, names = pd.factorize(np.concatenate([chunk.distinct for chunk in chunks]))
    actor_code, target_code = [], []
    start = 0
    for chunk in chunks:
        mapping = code_of_distinct[start : start + len(chunk.distinct)].astype(np.int64)
        actor_code.append(mapping[chunk.actor])
        target_code.append(mapping[chunk.target])
        start += len(chunk.distinct)
    event_id = np.concatenate([chunk.event_id for chunk in chunks])
    return EventColumns(
        event_id=event_id,
        names=np.asarray(names, dtype=object),
        actor_code=np.concatenate(actor_code),
        target_code=np.concatenate(target_code),
        weight=np.concatenate([chunk.weight for chunk in chunks]),
        order=_time_then_id(np.concatenate([chunk.time_us for chunk in chunks]), event_id),
    )


def _database_file(dbapi_connection: Any) -> str:
    """The file of the connection's main database ('' for an in-memory database)."""
    for _, name, file in dbapi_connection.execute("PRAGMA database_list").fetchall():
        if name == "main":
            return str(file or "")
    return ""


def _busy_ms(dbapi_connection: Any) -> int:
    """The store's busy timeout, so the helper waits for a lock as long as this process."""
    (busy_ms,) = dbapi_connection.execute("PRAGMA busy_timeout").fetchone()
    return int(busy_ms)


def _from_arrow(window: ArrowWindow) -> EventColumns:
    events = window.events
    event_id = events.column("event_id").combine_chunks()
    return EventColumns(
        event_id=event_id,
        names=np.asarray(window.names.to_numpy(zero_copy_only=False), dtype=object),
        actor_code=events.column("actor_code").to_numpy().astype(np.int64),
        target_code=events.column("target_code").to_numpy().astype(np.int64),
        # a copy: a view would keep the helper's whole answer alive with the weights
        weight=np.array(events.column("weight").to_numpy(), dtype=np.float64),
        order=_time_then_id(events.column("time_us").to_numpy(), event_id),
    )


@dataclass(frozen=True)
class _Chunk:
    """Fetched rows as columns; ``actor`` and ``target`` are codes into the chunk's own
    ``distinct`` account ids."""

    event_id: np.ndarray
    time_us: np.ndarray
    weight: np.ndarray
    actor: np.ndarray
    target: np.ndarray
    distinct: np.ndarray

    @classmethod
    def of(cls, rows: Sequence[Any]) -> _Chunk:
        """(event_id, time_us, actor, target, weight) rows; the account ids coded by
        pandas' hash-based ``factorize``. Only copies are kept (a column view would keep
        every object of the chunk alive)."""
        import pandas as pd

        table = np.array(rows, dtype=object)
        codes, distinct = pd.factorize(np.concatenate([table[:, 2], table[:, 3]]))
        m = len(table)
        return cls(
            event_id=table[:, 0].copy(),
            time_us=table[:, 1].astype(np.int64),
            weight=table[:, 4].astype(np.float64),
            actor=codes[:m],
            target=codes[m:],
            distinct=np.asarray(distinct, dtype=object),
        )


def _time_then_id(time_us: np.ndarray, event_id: EventIds) -> np.ndarray:
    """The order by time, events at the same microsecond by id (rare: each run sorted on
    its own)."""
    order = np.argsort(time_us, kind="stable")
    tied = np.r_[False, time_us[order][1:] == time_us[order][:-1], False]
    edges = np.flatnonzero(tied[1:] != tied[:-1])  # runs of equal times: [first, last)
    for first, last in zip(edges[0::2], edges[1::2] + 1, strict=True):
        block = order[first:last]
        order[first:last] = block[np.argsort(ids_at(event_id, block), kind="stable")]
    return order


def libpq_uri(connection: Connection) -> str:
    """The connection's PostgreSQL URL as libpq reads it (SQLAlchemy's driver name and
    nothing else removed: host, port, user, password, database and options such as
    ``options=-csearch_path=...`` carry over)."""
    url = connection.engine.url.set(drivername="postgresql")
    return url.render_as_string(hide_password=False)


def _postgres_columns(uri: str, start_us: int, end_us: int) -> EventColumns:
    import adbc_driver_postgresql.dbapi as adbc

    with adbc.connect(uri) as reader, reader.cursor() as cursor:
        cursor.execute(_POSTGRES_SELECT.format(start=start_us, end=end_us))
        table = cursor.fetch_arrow_table()
    if not table.num_rows:
        return _empty()
    names, actor_code, target_code = coded_accounts(table.column("actor"), table.column("target"))
    event_id = table.column("event_id").combine_chunks()
    return EventColumns(
        event_id=event_id,
        names=names,
        actor_code=actor_code,
        target_code=target_code,
        weight=table.column("weight").to_numpy().astype(np.float64, copy=False),
        order=_time_then_id(table.column("time_us").to_numpy(), event_id),
    )
