"""Event ids reused with other content: found after a batch's insert, reported per event.

Ingest stores an event once per id (``ON CONFLICT (event_id) DO NOTHING``). A repeated id
with the same content is a harmless retry (a duplicate); a repeated id with other content is
a sender's mistake the sender must hear about (a conflict): the stored event is kept.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.engine import Connection

from rolewatch.store.schema import events

_CONTENT = ("time", "actor", "target", "kind", "weight")
_CHUNK = 500  # ids per IN (...) list


def _stored_content(connection: Connection, ids: list[str]) -> dict[str, tuple]:
    columns = (events.c.time_us, events.c.actor, events.c.target, events.c.kind, events.c.weight)
    found: dict[str, tuple] = {}
    for start in range(0, len(ids), _CHUNK):
        statement = select(events.c.event_id, *columns).where(
            events.c.event_id.in_(ids[start : start + _CHUNK])
        )
        for row in connection.execute(statement):
            found[row[0]] = tuple(row[1:])
    return found


def find_conflicts(
    connection: Connection, rows: list[tuple], indexes: list[int]
) -> list[dict[str, Any]]:
    """``{"index", "error"}`` for each row whose id is stored with other content.

    ``rows`` are ingest's validated tuples ``(event_id, time_us, actor, target, kind,
    weight)`` after their insert, ``indexes`` their positions in the batch. A row inserted
    by this batch matches what is stored, so only repeats with other content are reported.
    """
    stored = _stored_content(connection, sorted({row[0] for row in rows}))
    conflicts = []
    for row, index in zip(rows, indexes, strict=True):
        kept = stored.get(row[0])
        if kept is None or kept == tuple(row[1:6]):
            continue
        differing = [
            name for name, old, new in zip(_CONTENT, kept, row[1:6], strict=True) if old != new
        ]
        conflicts.append(
            {
                "index": index,
                "error": f"id: {row[0]!r} is already stored with another "
                f"{', '.join(differing)}; the stored event is kept (give a new event a new id)",
            }
        )
    return conflicts
