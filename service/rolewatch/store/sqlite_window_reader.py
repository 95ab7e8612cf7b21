"""A large SQLite window's events read in a helper process as Arrow columns.

Python's ``sqlite3`` builds one tuple and five objects per row: for the 1,000,000 events of
``close-1m`` that is about 1.3 s in the driver and another second turning the rows into
columns and coding their account ids. The ADBC SQLite driver (Apache Arrow's database
connectivity) reads the same rows straight into Arrow columns, and Arrow's
``dictionary_encode`` codes the ids without a Python object per event: about 1 s for both.

That driver carries its own copy of the SQLite library, and two SQLite libraries must not
open the same file in one process: when one closes the file, POSIX drops every lock the
process holds on it, the other library's included. So the read runs in a
:class:`rolewatch.helper_process.HelperProcess` (``python -m
rolewatch.store.sqlite_window_reader``), where the ADBC driver is the only SQLite library,
reading the database file as any other process would (WAL: readers never block the
writer). The answer comes back as Arrow IPC streams: the events with their account codes,
and the distinct account ids once.

The caller (:mod:`rolewatch.store.event_columns`) gives the rowid range of the window, found
on its own connection, so both processes read exactly the rows of that range; it uses this
only for windows of at least :data:`HELPER_MIN_ROWS` rows in a database file, and reads in
process when the helper fails for any reason.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

import pyarrow as pa

from rolewatch.helper_process import HelperProcess, serve
from rolewatch.store.account_codes import arrow_account_codes

__all__ = ["HELPER", "HELPER_MIN_ROWS", "ArrowWindow", "RowRange", "read_in_helper"]

# Rows (by rowid range) from which a window is read in the helper: below this the
# in-process read takes a fraction of a second and the helper's first start would cost more.
HELPER_MIN_ROWS = 100_000

HELPER = HelperProcess(__name__)

# Formatted with integers only (``:d``); the driver reads the rowid range in table order.
_ROWS = (
    "SELECT event_id, time_us, actor, target, weight FROM events"
    " WHERE seq BETWEEN {low:d} AND {high:d}"
    " AND +time_us >= {start_us:d} AND +time_us < {end_us:d}"
)


@dataclass(frozen=True)
class RowRange:
    """The window's bounds and the rowids (``seq``) between which its events lie."""

    low: int
    high: int
    start_us: int
    end_us: int


@dataclass(frozen=True)
class ArrowWindow:
    """A window's rows in storage order: ``events`` has event_id, time_us, weight,
    actor_code and target_code; the codes index ``names``, each account id once."""

    events: pa.Table
    names: pa.Array


def read_in_helper(path: str, rows: RowRange, *, busy_timeout_ms: int) -> ArrowWindow:
    """The window's rows read by the helper process from the database file at ``path``.
    Raises OSError when the helper cannot answer (the caller then reads them itself)."""
    request = {"path": path, "busy_timeout_ms": int(busy_timeout_ms), **rows.__dict__}
    answer = pa.py_buffer(HELPER.exchange(json.dumps(request).encode("utf-8")))
    try:
        size = int.from_bytes(answer[:8].to_pybytes(), "little")
        events = pa.ipc.open_stream(answer.slice(8, size)).read_all()
        names = pa.ipc.open_stream(answer.slice(8 + size)).read_all().column("name")
    except (pa.ArrowException, KeyError) as error:
        raise OSError(f"the window reader answered what is not a window: {error}") from error
    return ArrowWindow(events=events, names=names.combine_chunks())


def _read_window(request: bytes) -> list[Any]:
    """The helper's answer to one request: the events and the distinct ids as two Arrow
    IPC streams, the first one's length in front."""
    import adbc_driver_sqlite.dbapi as adbc

    ask = json.loads(request)
    rows = RowRange(ask["low"], ask["high"], ask["start_us"], ask["end_us"])
    with adbc.connect(ask["path"]) as connection, connection.cursor() as cursor:
        cursor.execute(f"PRAGMA busy_timeout={int(ask['busy_timeout_ms']):d}")
        cursor.execute("PRAGMA query_only=1")
        cursor.execute(_ROWS.format(**rows.__dict__))
        table = cursor.fetch_arrow_table()
    names, actor_code, target_code = arrow_account_codes(
        table.column("actor"), table.column("target")
    )
    events = pa.table(
        {
            "event_id": table.column("event_id"),
            "time_us": table.column("time_us"),
            "weight": table.column("weight"),
            "actor_code": actor_code,
            "target_code": target_code,
        }
    )
    del table
    head = _ipc(events)
    del events
    return [head.size.to_bytes(8, "little"), head, _ipc(pa.table({"name": names}))]


def _ipc(table: pa.Table) -> pa.Buffer:
    """``table`` as an Arrow IPC stream in one Arrow buffer (no copy into Python bytes)."""
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue()


if __name__ == "__main__":
    import adbc_driver_sqlite.dbapi  # noqa: F401  (imported before the first request)

    # Arrow's allocator keeps freed memory for reuse; a kept helper that just read a large
    # window would otherwise hold its peak until the next one
    serve(_read_window, after_each=pa.default_memory_pool().release_unused)
