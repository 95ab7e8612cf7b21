"""A large window's event ids are kept in a memory-mapped file during its close: the alerts
quote the same sample events, and no file is left behind. Events: the fictional marketplace
sample (invented data); the reference is the same close with the ids in memory."""

from __future__ import annotations

import json
from datetime import datetime
from pathlib import Path

import pytest
from sqlalchemy import select

from rolewatch.config import ConfigError, load_settings
from rolewatch.pipeline import closer, compute, loading
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest
from rolewatch.store.schema import alerts

from .conftest import sample_events

NOW = int(datetime(2026, 12, 1).timestamp() * 1_000_000)  # long after the sample's weeks


def _mapped_id_files() -> list[str]:
    return [
        line
        for line in Path("/proc/self/maps").read_text().splitlines()
        if "rolewatch-event-ids-" in line
    ]


def _close(settings) -> dict[str, list[str]]:
    engine = open_store(settings)
    try:
        ingest(engine, settings, sample_events(), NOW)
        closer.close_due_windows(engine, settings, now_us=NOW, drain=True)
        with engine.connect() as connection:
            rows = connection.execute(select(alerts.c.account, alerts.c.evidence)).all()
    finally:
        engine.dispose()
    return {account: json.loads(evidence)["sample_event_ids"] for account, evidence in rows}


def _settings(database: Path, **extra):
    # the pipeline tests' settings (conftest.make_settings) on a store of this test's own:
    # the ids are read before anything is written, so one store kind is enough
    return load_settings(
        database_url=f"sqlite:///{database}",
        window_period="7d",
        window_span="7d",
        window_lateness="1h",
        training_windows=4,
        public_url="http://127.0.0.1:9",
        **extra,
    )


@pytest.mark.skipif(not Path("/proc/self/maps").exists(), reason="reads Linux's /proc/self/maps")
def test_ids_on_disk_quote_the_same_events_and_leave_no_file(tmp_path, monkeypatch):
    in_memory = _close(_settings(tmp_path / "memory.db"))

    scratch = tmp_path / "scratch"
    scratch.mkdir()
    mapped_during_evidence: list[int] = []

    def watching(*args, **kwargs):
        mapped_during_evidence.append(len(_mapped_id_files()))
        return evidence(*args, **kwargs)

    evidence = compute.alerts_with_evidence
    monkeypatch.setattr(compute, "alerts_with_evidence", watching)
    monkeypatch.setattr(loading, "IDS_ON_DISK_MIN_EVENTS", 1)
    on_disk = _close(_settings(tmp_path / "disk.db", close_scratch_dir=str(scratch)))
    assert in_memory and on_disk == in_memory
    assert all(ids for ids in on_disk.values())
    # every scored window's ids were a mapped (and already unlinked) file, and none is left
    assert mapped_during_evidence and min(mapped_during_evidence) >= 1
    assert all("(deleted)" in line for line in _mapped_id_files())
    assert list(scratch.iterdir()) == []


def test_a_scratch_dir_that_is_not_there_is_refused_with_what_to_do(tmp_path):
    with pytest.raises(ConfigError, match="is not a directory: create it"):
        load_settings(close_scratch_dir=str(tmp_path / "missing"))
    assert load_settings(close_scratch_dir=str(tmp_path)).close_scratch_dir == str(tmp_path)


def test_an_earlier_window_read_back_keeps_its_ids_on_disk_too(tmp_path, monkeypatch):
    # the reference: the same window read with its ids in memory
    import gc

    from rolewatch.clock import to_rfc3339
    from rolewatch.scale.source import stored_events_reader
    from rolewatch.store.alerts import WindowRef

    settings = _settings(tmp_path / "read.db", close_scratch_dir=str(tmp_path))
    engine = open_store(settings)
    try:
        ingest(engine, settings, sample_events(), NOW)
        first = min(event["time"] for event in sample_events())
        start = int(datetime.fromisoformat(first.replace("Z", "+00:00")).timestamp() * 1e6)
        ref = WindowRef(id=None, start=to_rfc3339(start), end=to_rfc3339(start + 7 * 86400 * 10**6))
        read = stored_events_reader(engine, settings)
        in_memory = read(ref)
        gc.collect()  # an earlier test's windows, if a cycle still holds them
        assert in_memory is not None and not _mapped_id_files()
        monkeypatch.setattr(loading, "IDS_ON_DISK_MIN_EVENTS", 1)
        on_disk = read(ref)
        assert on_disk is not None and len(_mapped_id_files()) == 1
        assert [str(i) for i in on_disk.event_id] == [str(i) for i in in_memory.event_id]
        assert list(tmp_path.glob("rolewatch-event-ids-*")) == []
    finally:
        engine.dispose()


def test_the_read_is_let_go_before_arrow_hands_its_memory_back(tmp_path, monkeypatch):
    # Arrow's allocator keeps what it frees until asked to hand it back; asked while the
    # read's ids were still referenced it would keep them. The reference: Arrow's own count
    # of the bytes its pool holds allocated.
    import pyarrow as pa

    from rolewatch.pipeline.loading import interned, read_with_ids_on_disk

    monkeypatch.setattr(loading, "IDS_ON_DISK_MIN_EVENTS", 1)
    before = pa.total_allocated_bytes()
    held_when_trimmed: list[int] = []
    pool = pa.default_memory_pool()

    class Watching:
        def release_unused(self) -> None:
            held_when_trimmed.append(pa.total_allocated_bytes())
            pool.release_unused()

    monkeypatch.setattr(pa, "default_memory_pool", lambda: Watching())
    expected = [f"evt-{i}" for i in range(100_000)]
    names = [f"a-{i % 50}" for i in range(100_000)]

    def read():  # ids as an Arrow array, as the store's and the archive's readers give them
        ids = pa.array(expected, pa.large_string())
        return interned(ids, names, names[1:] + names[:1], [1.0] * 100_000)

    events = read_with_ids_on_disk(read, str(tmp_path))
    assert [str(i) for i in events.event_id] == expected
    assert held_when_trimmed == [before]  # the read's buffers were all free by then
    assert pa.total_allocated_bytes() == before  # and the ids kept are mapped, not allocated
