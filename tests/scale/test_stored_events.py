"""The store's events of a window as the archive's columns, read in batches
(``rolewatch.scale.source.stored_events``): with the archive as source the store may still
hold whole windows, and the read must not hold them as Python rows all at once. The
reference is the events the test ingested (what the store was given), on SQLite and on
PostgreSQL."""

from __future__ import annotations

import pytest

pytest.importorskip("pyarrow")

from rolewatch.clock import to_rfc3339  # noqa: E402
from rolewatch.config import load_settings  # noqa: E402
from rolewatch.scale.archive_events import stored_batches_table  # noqa: E402
from rolewatch.scale.source import stored_events  # noqa: E402
from rolewatch.store.db import open_store  # noqa: E402
from rolewatch.store.event_times import timed_event_batches  # noqa: E402
from rolewatch.store.events import ingest  # noqa: E402

START = 1_769_990_400_000_000  # 2026-02-02T00:00:00Z
END = START + 86_400_000_000


def _events() -> list[dict]:
    inside = [
        {
            "id": f"e-{number:03d}",
            "time": to_rfc3339(START + number * 1_000_000),
            "actor": f"a-{number % 7}",
            "target": f"b-{number % 5}",
            "weight": 0.5 + number,
        }
        for number in range(23)
    ]
    outside = [  # the instant the window ends, and the one before it starts
        {"id": "at-end", "time": to_rfc3339(END), "actor": "x", "target": "y"},
        {"id": "before", "time": to_rfc3339(START - 1), "actor": "x", "target": "y"},
    ]
    return inside + outside


def _as_rows(table) -> set[tuple]:
    return set(zip(*(table.column(name).to_pylist() for name in table.column_names), strict=True))


def test_the_stored_events_come_back_in_batches_as_they_were_ingested(store_url):
    settings = load_settings(database_url=store_url)
    engine = open_store(settings)
    events = _events()
    ingest(engine, settings, events, END + 3_600_000_000)
    expected = {
        (e["id"], START + int(e["id"][2:]) * 1_000_000, e["actor"], e["target"], e["weight"])
        for e in events
        if e["id"].startswith("e-")
    }
    try:
        with engine.connect() as connection:
            batches = [list(b) for b in timed_event_batches(connection, START, END, batch_rows=5)]
            whole = stored_events(connection, START, END)
            batched = stored_batches_table(
                timed_event_batches(connection, START, END, batch_rows=5)
            )
            nothing = stored_events(connection, END + 1, END + 2)
    finally:
        engine.dispose()
    assert [len(batch) for batch in batches] == [5, 5, 5, 5, 3]
    assert whole.column_names == ["id", "time", "actor", "target", "weight"]
    assert _as_rows(whole) == expected and whole.num_rows == len(expected)
    assert _as_rows(batched) == expected and batched.num_rows == len(expected)
    assert nothing.num_rows == 0 and nothing.schema == whole.schema
