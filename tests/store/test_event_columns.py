"""A window's events as the close reads them from each database (SQLite through Python's
sqlite3 or, for a large window, through the ADBC SQLite driver in a helper process;
PostgreSQL through the ADBC driver's Arrow columns): the same events in the same
(time, event id) order, with the exact stored weights, as Python's own ``sorted`` over the
events that were ingested. Ties at one microsecond and ids outside ASCII are where a
database's ordering (its collation) could differ from Python's; the reference is Python's
code-point comparison of strings."""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch import helper_process
from rolewatch.clock import to_rfc3339
from rolewatch.config import load_settings
from rolewatch.pipeline.loading import interned, load_window_events, start_window_events
from rolewatch.store import sqlite_window_reader
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


def _read_only_in_helper(monkeypatch) -> None:
    """Every SQLite window, however small, read by the helper process (and never here)."""

    def not_here(*_args):
        raise AssertionError("the window was read in this process")

    monkeypatch.setattr("rolewatch.store.event_columns.HELPER_MIN_ROWS", 0)
    monkeypatch.setattr("rolewatch.store.event_columns._read_here", not_here)


@pytest.mark.parametrize("read", ["whole", "chunks", "helper"])
def test_a_windows_events_come_back_as_python_sorts_them(store_url, read, monkeypatch):
    if read == "chunks":  # SQLite's rows read in many chunks (PostgreSQL: no chunks)
        monkeypatch.setattr("rolewatch.store.event_columns.SQLITE_CHUNK_ROWS", 7)
    if read == "helper":  # SQLite only (PostgreSQL: read the same way as "whole")
        _read_only_in_helper(monkeypatch)
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
    assert [str(event_id) for event_id in loaded.event_id] == [e["id"] for e in expected]
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
        assert columns.names[actor] == by_id[str(event_id)]["actor"]
        assert columns.names[target] == by_id[str(event_id)]["target"]

    # the same events interned from plain object arrays give the same window
    again = interned(
        np.array([e["id"] for e in expected], dtype=object),
        np.array([e["actor"] for e in expected], dtype=object),
        np.array([e["target"] for e in expected], dtype=object),
        np.array([e["weight"] for e in expected]),
    )
    for name in ("event_id", "actor", "target", "weight", "accounts", "actor_index"):
        np.testing.assert_array_equal(getattr(loaded, name), getattr(again, name))


def _stored_window(tmp_path) -> tuple[object, list[dict]]:
    settings = load_settings(database_url=f"sqlite:///{tmp_path / 'events.db'}")
    engine = open_store(settings)
    events = _events()
    ingest(engine, settings, events, END + 3_600_000_000)
    return engine, events


def test_a_helper_that_cannot_start_leaves_the_read_to_this_process(tmp_path, monkeypatch):
    engine, _ = _stored_window(tmp_path)
    with engine.connect() as connection:
        expected = event_columns(connection, START, END)  # small: read here
        sqlite_window_reader.HELPER.stop()
        monkeypatch.setattr(helper_process.sys, "executable", "/nonexistent/python")
        monkeypatch.setattr("rolewatch.store.event_columns.HELPER_MIN_ROWS", 0)
        fallen_back = event_columns(connection, START, END)
    engine.dispose()
    for name in ("event_id", "actor_code", "target_code", "weight", "order"):
        np.testing.assert_array_equal(getattr(fallen_back, name), getattr(expected, name))
    np.testing.assert_array_equal(fallen_back.names, expected.names)


def test_the_helper_reports_a_request_it_cannot_serve_and_keeps_serving(tmp_path, monkeypatch):
    engine, events = _stored_window(tmp_path)
    engine.dispose()
    window = sqlite_window_reader.RowRange(1, 10**6, START, END)
    with pytest.raises(helper_process.HelperError, match="no such table"):
        sqlite_window_reader.read_in_helper(
            str(tmp_path / "no-events-here.db"), window, busy_timeout_ms=100
        )
    process = sqlite_window_reader.HELPER.process
    read = sqlite_window_reader.read_in_helper(
        str(tmp_path / "events.db"), window, busy_timeout_ms=100
    )
    assert sqlite_window_reader.HELPER.process is process  # the same child answered again
    assert read.events.num_rows == len(events) - 2  # all but the two outside the window


def test_a_finished_read_is_not_held_by_the_function_that_finished_it(store_url, monkeypatch):
    """The closer keeps the function that finishes its window read for the whole close; the
    helper's answer (SQLite) or the driver's columns (PostgreSQL) it read must not stay
    alive with it (about 40 bytes an event: 120 MB of a 3,000,000-event window, measured
    with tracemalloc through a whole close)."""
    import gc
    import weakref

    from rolewatch.store import event_columns as module

    read: list[weakref.ref] = []
    reader = "_postgres_columns" if store_url.startswith("postgresql") else "read_in_helper"
    real = getattr(module, reader)

    def watched(*args, **kwargs):
        answer = real(*args, **kwargs)
        read.append(weakref.ref(answer))
        return answer

    monkeypatch.setattr(module, reader, watched)
    monkeypatch.setattr(module, "HELPER_MIN_ROWS", 0)
    settings = load_settings(database_url=store_url)
    engine = open_store(settings)
    ingest(engine, settings, _events(), END + 3_600_000_000)
    with engine.connect() as connection:
        finish = start_window_events(connection, START, END)  # as the closer reads
        loaded = finish()
        gc.collect()
        assert len(read) == 1 and read[0]() is None, "the finished read is still referenced"
        assert len(loaded) == len(_events()) - 2
        with pytest.raises(RuntimeError, match="handed over already"):
            finish()
    engine.dispose()
