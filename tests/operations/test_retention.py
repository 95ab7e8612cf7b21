"""Retention: raw events of old closed windows are purged; memberships, alerts and the
events the next close still needs are kept; SQLite gives the space back."""

from __future__ import annotations

from datetime import datetime

import pytest
import sqlalchemy as sa

from rolewatch.clock import now_micros
from rolewatch.config import load_settings
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest
from rolewatch.store.retention import purge_cutoff, purge_expired

from .servers import sample_events


def _count(engine, sql: str) -> int:
    with engine.connect() as connection:
        return connection.execute(sa.text(sql)).scalar()


def _time_us(text: str) -> int:
    return int(datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp() * 1_000_000)


@pytest.mark.slow
def test_purge_keeps_recent_windows_memberships_and_alerts(store_url):
    settings = load_settings(
        database_url=store_url,
        training_windows=2,
        retention_windows=2,
        window_period="7d",
        window_span="7d",
        window_lateness="1h",
    )
    engine = open_store(settings)
    try:
        sample = sample_events()[:6500]  # about six weekly windows: keeps the test short
        now = now_micros()
        # Nothing is purged before the basis is fitted: the training windows are needed whole.
        ingest(engine, settings, sample[:1000], now)
        close_due_windows(engine, settings, now_us=now)
        assert purge_cutoff(engine, settings) is None
        assert purge_expired(engine, settings).deleted == 0

        ingest(engine, settings, sample[1000:], now)
        close_due_windows(engine, settings, now_us=now, drain=True)
        windows = _count(engine, "SELECT count(*) FROM windows")
        memberships = _count(engine, "SELECT count(*) FROM memberships")
        alerts = _count(engine, "SELECT count(*) FROM alerts")
        assert windows >= 5
        with engine.connect() as connection:
            starts = [
                r[0]
                for r in connection.execute(
                    sa.text("SELECT start_us FROM windows ORDER BY end_us DESC")
                )
            ]
        cutoff = starts[1]  # the start of the 2nd most recent closed window

        result = purge_expired(engine, settings)
        # Independent count from the fixture file itself, not from the store.
        expected_gone = sum(1 for e in sample if _time_us(e["time"]) < cutoff)
        assert result.cutoff_us == cutoff
        assert result.deleted == expected_gone > 0
        assert _count(engine, "SELECT count(*) FROM events") == len(sample) - expected_gone
        assert _count(engine, f"SELECT count(*) FROM events WHERE time_us < {cutoff}") == 0
        # Derived records are kept.
        assert _count(engine, "SELECT count(*) FROM windows") == windows
        assert _count(engine, "SELECT count(*) FROM memberships") == memberships
        assert _count(engine, "SELECT count(*) FROM alerts") == alerts
        # A second run finds nothing more to do.
        assert purge_expired(engine, settings).deleted == 0
        if engine.dialect.name == "sqlite":
            assert result.reclaimed == "vacuum"  # the first purge converts the file once
            assert _count(engine, "PRAGMA auto_vacuum") == 2  # later purges are incremental
            assert _count(engine, "PRAGMA freelist_count") == 0
    finally:
        engine.dispose()


def test_retention_zero_keeps_everything(store_url):
    settings = load_settings(database_url=store_url, retention_windows=0)
    engine = open_store(settings)
    try:
        ingest(engine, settings, sample_events()[:50], now_micros())
        assert purge_expired(engine, settings).deleted == 0
        assert _count(engine, "SELECT count(*) FROM events") == 50
    finally:
        engine.dispose()


def test_hopping_windows_keep_what_the_next_close_reads(tmp_path):
    """With span = 2 x period the next close reads two spans back; the cutoff honours that."""
    settings = load_settings(
        database_url=f"sqlite:///{tmp_path / 'h.db'}",
        retention_windows=1,
        window_period="7d",
        window_span="14d",
        training_windows=2,
    )
    engine = open_store(settings)
    try:
        now = now_micros()
        ingest(engine, settings, sample_events()[:4500], now)
        close_due_windows(engine, settings, now_us=now)
        with engine.connect() as connection:
            last = connection.execute(
                sa.text("SELECT start_us, end_us FROM windows ORDER BY end_us DESC LIMIT 1")
            ).one()
        period = 7 * 86_400 * 1_000_000
        next_start = last.end_us + period - 2 * period
        assert purge_cutoff(engine, settings) == next_start - 2 * period < last.start_us
    finally:
        engine.dispose()
