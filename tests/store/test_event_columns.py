"""A window's events as the close reads them from each database (SQLite through Python's
sqlite3, PostgreSQL through the ADBC driver's Arrow columns): the same events in the same
(time, event id) order, with the exact stored weights, as Python's own ``sorted`` over the
events that were ingested. Ties at one microsecond and ids outside ASCII are where a
database's ordering (its collation) could differ from Python's; the reference is Python's
code-point comparison of strings."""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.clock import to_rfc3339
from rolewatch.config import load_settings
from rolewatch.pipeline.loading import interned, load_window_events
from rolewatch.store.db import open_store
from rolewatch.store.event_columns import event_columns
from rolewatch.store.events import ingest, parse_time_us

START = 1_769_990_400_000_000  # 2026-02-02T00:00:00Z
END = START + 86_400_000_000


def _events() -> list[dict]:
    rng = np.random.default_rng(5)
    accounts = ["ä-1", "z-2", "A-3", "a-4", "é", "Ω-6", "b-7", "b-07"]
    ids = ["e-Ä", "e-a", "e-B", "e-b", "e-ß", "e-10", "e-9", "e-á"]
    events = []
    for number in range(400):
        actor, target = rng.choice(len(accounts), 2, replace=False)
        # a few distinct instants, so most events share their microsecond with others
        moment = START + int(rng.integers(0, 6)) * 1_000_000 + int(rng.integers(0, 2))
        events.append(
            {
                "id": f"{ids[number % len(ids)]}-{number}",
                "time": to_rfc3339(moment),
                "actor": accounts[actor],
                "target": accounts[target],
                "weight": float(rng.lognormal(0.0, 3.0)) / 3.0,
            }
        )
    # outside the window: the instant the window ends, and the one before it starts
    events.append({"id": "at-end", "time": to_rfc3339(END), "actor": "x", "target": "y"})
    events.append({"id": "before", "time": to_rfc3339(START - 1), "actor": "x", "target": "y"})
    return events


@pytest.mark.parametrize("chunk_rows", [None, 7])
def test_a_windows_events_come_back_as_python_sorts_them(store_url, chunk_rows, monkeypatch):
    if chunk_rows is not None:  # SQLite's rows read in many chunks (PostgreSQL: no chunks)
        monkeypatch.setattr("rolewatch.store.event_columns.SQLITE_CHUNK_ROWS", chunk_rows)
    settings = load_settings(database_url=store_url)
    engine = open_store(settings)
    events = _events()
    result = ingest(engine, settings, events, END + 3_600_000_000)
    assert result.accepted == len(events)
    with engine.connect() as connection:
        columns = event_columns(connection, START, END)
        loaded = load_window_events(connection, START, END)
        empty = event_columns(connection, END + 10, END + 20)
    engine.dispose()
    assert len(empty) == 0

    # reference: Python's sorted() by (time, id), ids compared by code point
    inside = [e for e in events if e["id"] not in ("at-end", "before")]
    expected = sorted(inside, key=lambda e: (parse_time_us(e["time"]), e["id"]))
    assert loaded.event_id.tolist() == [e["id"] for e in expected]
    assert loaded.actor.tolist() == [e["actor"] for e in expected]
    assert loaded.target.tolist() == [e["target"] for e in expected]
    assert loaded.weight.tolist() == [e["weight"] for e in expected]  # exact doubles
    assert loaded.accounts.tolist() == sorted(
        {e["actor"] for e in inside} | {e["target"] for e in inside}
    )

    # the codes name each event's accounts, each distinct id once
    assert len(set(columns.names.tolist())) == len(columns.names)
    by_id = {e["id"]: e for e in inside}
    for event_id, actor, target in zip(
        columns.event_id, columns.actor_code, columns.target_code, strict=True
    ):
        assert columns.names[actor] == by_id[event_id]["actor"]
        assert columns.names[target] == by_id[event_id]["target"]

    # the same events interned from plain object arrays give the same window
    again = interned(
        np.array([e["id"] for e in expected], dtype=object),
        np.array([e["actor"] for e in expected], dtype=object),
        np.array([e["target"] for e in expected], dtype=object),
        np.array([e["weight"] for e in expected]),
    )
    for name in ("event_id", "actor", "target", "weight", "accounts", "actor_index"):
        np.testing.assert_array_equal(getattr(loaded, name), getattr(again, name))
