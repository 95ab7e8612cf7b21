"""Retention: purge raw events once the windows that used them are closed and old enough.

``retention_windows = N`` (N > 0) keeps the raw events of the N most recent closed windows;
older events are deleted. Window records, memberships, alerts and deliveries are kept: an
account's role history and its alerts (with their evidence and sample event ids) outlive the
raw events they came from. ``N = 0`` keeps every event.

What is safe to delete. The closer reads, for the next window ``[s, s + span)``, the events
of that window (new counterparts and activity baselines come from the stored memberships and
the known-pair history); an alert's evidence reads its baseline window's events when they are
still stored (and shows no feature moves once they are gone); the training back-fill reads
the training windows once, when the basis is fitted. The cutoff keeps one span more than the
next close needs (``[s - span, s)``, usually the baseline window of most alerts). So the
purge cutoff is the earlier of

- the start of the N-th most recent closed window, and
- the start of the range the next close will read (``last_end + period - 2 * span``),

and nothing is purged before a basis is fitted (so training windows are never cut short).
Events earlier than the cutoff belong only to closed windows, which are never reloaded.

Reclaiming space. PostgreSQL's autovacuum returns dead rows to the table for reuse; nothing
to do. SQLite keeps freed pages in the file's freelist and reuses them for new rows, so the
file stops growing but does not shrink. The first purge that frees pages switches the file to
``auto_vacuum = INCREMENTAL`` with one ``VACUUM`` (run outside any transaction; it rewrites
the file once and blocks writers while it runs, so it happens once in the file's life);
every later purge gives its pages back with a bounded ``PRAGMA incremental_vacuum``, which is
short, so ingest is never blocked for long. A full ``VACUUM`` after every purge would rewrite
the whole file (and need as much free disk again) each time.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import sqlalchemy as sa
from sqlalchemy.engine import Engine

from rolewatch.config import Settings
from rolewatch.store.db import write_transaction
from rolewatch.store.schema import bases, events, windows

log = logging.getLogger("rolewatch.retention")

DELETE_CHUNK = 20_000  # rows per delete transaction: keeps each write lock short
INCREMENTAL_PAGES = 20_000  # pages one incremental vacuum step frees (80 MB at 4 KiB pages)


@dataclass(frozen=True)
class PurgeResult:
    cutoff_us: int | None  # events with time_us < cutoff_us were purged (None: nothing due)
    deleted: int
    reclaimed: str | None  # "vacuum", "incremental" or None


def purge_cutoff(engine: Engine, settings: Settings) -> int | None:
    """The time before which raw events may be deleted, or None when nothing may go yet."""
    keep = settings.retention_windows
    if keep <= 0:
        return None
    with engine.connect() as connection:
        fitted = connection.execute(
            sa.select(sa.func.count()).select_from(bases).where(bases.c.active.is_(True))
        ).scalar()
        if not fitted:
            return None
        recent = connection.execute(
            sa.select(windows.c.start_us, windows.c.end_us)
            .order_by(windows.c.end_us.desc())
            .limit(keep)
        ).all()
    if len(recent) < keep:
        return None
    last_end = recent[0].end_us
    period_us = int(settings.window_period.total_seconds() * 1_000_000)
    span_us = int(settings.window_span.total_seconds() * 1_000_000)
    next_reads_from = last_end + period_us - 2 * span_us
    return min(recent[-1].start_us, next_reads_from)


def purge_expired(engine: Engine, settings: Settings, *, now_us: int | None = None) -> PurgeResult:
    """Delete raw events older than the retention cutoff, in short transactions, and give
    SQLite space back after a large purge. ``now_us`` is accepted for the scheduler's call
    signature; retention counts closed windows, not wall-clock time."""
    cutoff = purge_cutoff(engine, settings)
    if cutoff is None:
        return PurgeResult(None, 0, None)
    deleted = 0
    while True:
        with write_transaction(engine) as connection:
            chunk = (
                sa.select(events.c.seq)
                .where(events.c.time_us < cutoff)
                .order_by(events.c.seq)
                .limit(DELETE_CHUNK)
                .scalar_subquery()
            )
            removed = connection.execute(sa.delete(events).where(events.c.seq.in_(chunk))).rowcount
        deleted += removed
        if removed < DELETE_CHUNK:
            break
    reclaimed = _reclaim_sqlite(engine) if deleted and engine.dialect.name == "sqlite" else None
    if deleted:
        log.info(
            "purged raw events",
            extra={"fields": {"deleted": deleted, "cutoff_us": cutoff, "reclaimed": reclaimed}},
        )
    return PurgeResult(cutoff, deleted, reclaimed)


def _reclaim_sqlite(engine: Engine) -> str | None:
    """Give free pages back to the file system (see the module docstring for the choice)."""
    raw = engine.raw_connection()  # autocommit (db.make_engine): no transaction is open
    try:
        mode = raw.execute("PRAGMA auto_vacuum").fetchone()[0]
        free = raw.execute("PRAGMA freelist_count").fetchone()[0]
        if not free:
            return None
        if mode == 2:  # INCREMENTAL
            raw.execute(f"PRAGMA incremental_vacuum({INCREMENTAL_PAGES})").fetchall()
            return "incremental"
        raw.execute("PRAGMA auto_vacuum = INCREMENTAL")
        raw.execute("VACUUM")  # outside any transaction; also applies the new auto_vacuum mode
        return "vacuum"
    finally:
        raw.close()
