"""The Parquet event archive: `rolewatch replay --to-archive` writes every event into the
slot of its window, and a window close reading the archive (alone, or beside events
ingested into the store) writes exactly what a close reading the store writes.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

from collections import Counter
from datetime import UTC, datetime

import pandas as pd

from rolewatch.cli import main
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest

from .conftest import NOW, SAMPLE, sample_events, sample_settings, write_archive, written

WEEK_US = 7 * 24 * 3600 * 1_000_000


def _time_us(text: str) -> int:
    # the standard library's ISO 8601 parser, independent of the service's own
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return (moment - datetime(1970, 1, 1, tzinfo=UTC)) // pd.Timedelta(microseconds=1)


def test_replay_to_archive_puts_every_event_in_its_window_slot(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("ROLEWATCH_WINDOW_PERIOD", "7d")
    archive = tmp_path / "archive"
    code = main(["replay", str(SAMPLE / "events.ndjson"), "--to-archive", str(archive)])
    assert code == 0
    assert '"written": 10839' in capsys.readouterr().out
    # read back with pandas' own Parquet reader (hive partitions become a column)
    frame = pd.read_parquet(archive)
    expected = Counter((_time_us(e["time"]) // WEEK_US + 1) * WEEK_US for e in sample_events())
    slots = Counter(int(value) for value in frame["window_end_us"])
    assert slots == expected
    times = (frame["time"] - pd.Timestamp(0, tz="UTC")) // pd.Timedelta(microseconds=1)
    ends = frame["window_end_us"].astype("int64")
    assert ((times < ends) & (times >= ends - WEEK_US)).all()
    assert sorted(frame["id"]) == sorted(e["id"] for e in sample_events())


def test_replay_to_archive_reports_bad_lines_and_keeps_the_good_ones(tmp_path, capsys):
    source = tmp_path / "events.ndjson"
    source.write_text(
        '{"time": "2026-01-05T10:00:00Z", "actor": "acct-a", "target": "acct-b"}\n'
        '{"time": "2026-01-05T11:00:00Z", "actor": "acct-a", "target": "acct-a"}\n'
        "not json\n",
        encoding="utf-8",
    )
    code = main(["replay", str(source), "--to-archive", str(tmp_path / "archive")])
    captured = capsys.readouterr()
    assert code == 0
    assert '"written": 1' in captured.out and '"rejected": 2' in captured.out
    assert "line 2: target: same account as actor" in captured.err
    assert len(pd.read_parquet(tmp_path / "archive")) == 1


def _closed_from_store(tmp_path) -> dict:
    """What closing the sample from the store alone writes (the reference)."""
    settings = sample_settings(tmp_path / "store.db")
    engine = open_store(settings)
    ingest(engine, settings, sample_events(), NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    expected = written(engine)
    engine.dispose()
    return expected


def test_closing_from_the_archive_writes_what_closing_from_the_store_writes(tmp_path):
    expected = _closed_from_store(tmp_path)

    archive = tmp_path / "archive"
    assert main(["replay", str(SAMPLE / "events.ndjson"), "--to-archive", str(archive)]) == 0
    from_archive = sample_settings(
        tmp_path / "archive.db", event_source="archive", event_archive=str(archive)
    )
    engine = open_store(from_archive)
    closed = close_due_windows(engine, from_archive, now_us=NOW, drain=True)
    assert len(closed) == len(expected["windows"])
    assert written(engine) == expected
    engine.dispose()


def test_archive_and_store_events_together_close_like_the_store_alone(tmp_path):
    expected = _closed_from_store(tmp_path)
    every = sample_events()

    # half of the events in the archive, the rest (and a few of the archived ones again)
    # ingested through the store, as a small deployment keeps using the REST ingest
    archived, ingested = every[::2], every[1::2] + every[:200:2]
    archive = str(tmp_path / "archive")
    write_archive(archive, archived, WEEK_US)
    both = sample_settings(tmp_path / "both.db", event_source="archive", event_archive=archive)
    engine = open_store(both)
    ingest(engine, both, ingested, NOW)
    close_due_windows(engine, both, now_us=NOW, drain=True)
    assert written(engine) == expected
    engine.dispose()
