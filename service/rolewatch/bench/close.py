"""Closing a window of 1,000,000 events end to end: store → engine → alerts stored.

``close-1m``: a SQLite store gets one training window of power-law traffic (200,000 events)
and one window of 1,000,000 events (about 180,000 accounts), bulk-loaded with plain
``sqlite3`` ``executemany`` (not timed). Closing the training window fits the recipe and
basis (timed separately, as ``training_seconds``); then closing the big window — loading its
events, ReFeX transform, memberships, baselines, scoring, evidence and writing memberships,
alerts and the window record in one transaction — is the figure to watch (target ≤ 10 s),
with the seconds of each stage (``stage_seconds``, as ``GET /v1/windows`` shows them),
the closing process's peak memory and that of each helper process it started (the
communities, the SQLite window reader).
``close-1m-postgres``: the same on PostgreSQL, in a schema of its own that is dropped
afterwards (bulk-loaded with ``COPY``); it needs ``ROLEWATCH_BENCH_POSTGRES_URL`` (for
example ``postgresql+psycopg://postgres@127.0.0.1:5432/test``) and says so when it is not
set. ``--quick`` uses 100,000 events.
``close-long-id``: the close-1m store, trained once, closed twice side by side, each close
in a fresh process (its own peak memory): as it is, and with three more events of one
account whose id has the store's longest allowed length (200 characters). One long id
must not change what a close costs (code that holds account ids as fixed-width text makes
every account's row as wide as the longest id).
``close-lookback``: a full look-back. A close compares each account with the earlier
measured windows it reads back (eight by default); close-1m has only the training window
behind it. Here the training window and eight windows of 1,000,000 events of the same
accounts are closed one after the other (not timed), then the tenth window is closed in a
fresh process: its seconds, stages and peak memory show what reading the look-back costs.
"""

from __future__ import annotations

import os
import resource
import secrets
import sqlite3
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

CASES = ("close-1m", "close-1m-postgres", "close-long-id", "close-lookback")
POSTGRES_URL_VARIABLE = "ROLEWATCH_BENCH_POSTGRES_URL"
WEEK_US = 7 * 86_400 * 1_000_000
FIRST_END = 1_767_830_400_000_000  # 2026-01-08T00:00:00Z, a UTC-aligned 7-day window end
_COLUMNS = "event_id, time_us, actor, target, kind, weight, received_us, late"


def _power_law_events(
    rng: np.random.Generator, n_events: int, n_accounts: int, start_us: int, prefix: str
):
    """Events whose endpoints follow a Zipf-like popularity (a few hubs, many quiet accounts)."""
    popularity = 1.0 / np.arange(1, n_accounts + 1) ** 0.9
    popularity /= popularity.sum()
    actor = rng.choice(n_accounts, size=n_events, p=popularity)
    target = rng.choice(n_accounts, size=n_events, p=popularity)
    clash = actor == target
    target[clash] = (target[clash] + 1) % n_accounts
    times = start_us + rng.integers(0, WEEK_US, size=n_events)
    weights = np.round(rng.lognormal(2.5, 1.0, size=n_events), 2)
    return [
        (f"{prefix}{i}", int(t), f"a-{a:07d}", f"a-{b:07d}", "payment", float(w), int(t), False)
        for i, (t, a, b, w) in enumerate(zip(times, actor, target, weights, strict=True))
    ]


def _load(path: Path, rows: list[tuple]) -> None:
    connection = sqlite3.connect(path, isolation_level=None)
    connection.execute("PRAGMA synchronous=OFF")  # a benchmark fixture, not service data
    connection.execute("BEGIN")
    connection.executemany(
        f"INSERT INTO events ({_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
        rows,
    )
    connection.execute("COMMIT")
    connection.close()


def _load_postgres(engine: Any, rows: list[tuple]) -> None:
    raw = engine.raw_connection()
    try:
        with raw.cursor() as cursor, cursor.copy(f"COPY events ({_COLUMNS}) FROM STDIN") as copy:
            for row in rows:
                copy.write_row(row)
        raw.commit()
        with raw.cursor() as cursor:
            cursor.execute("ANALYZE events")
        raw.commit()
    finally:
        raw.close()


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _helper_peaks_mb() -> dict[str, float | None]:
    """Peak resident memory of each helper process the closes used (Linux's ``VmHWM``;
    None where the helper is not running or the system does not say)."""
    from rolewatch.pipeline import communities
    from rolewatch.store import sqlite_window_reader

    peaks: dict[str, float | None] = {}
    for name, helper in (
        ("communities", communities.HELPER),
        ("window_reader", sqlite_window_reader.HELPER),
    ):
        process = helper.process
        peaks[name] = None
        if process is None or process.poll() is not None:
            continue
        try:
            status = Path(f"/proc/{process.pid}/status").read_text()
        except OSError:
            continue
        for line in status.splitlines():
            if line.startswith("VmHWM:"):
                peaks[name] = round(int(line.split()[1]) / 1024, 1)
    return peaks


@contextmanager
def _postgres_schema(url: str) -> Iterator[str]:
    """A fresh schema on the server at ``url``; yields the URL that works inside it."""
    import sqlalchemy as sa

    schema = f"rolewatch_bench_{secrets.token_hex(4)}"
    admin = sa.create_engine(url)
    with admin.begin() as connection:
        connection.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    separator = "&" if "?" in url else "?"
    try:
        yield f"{url}{separator}options=-csearch_path%3D{schema}"
    finally:
        with admin.begin() as connection:
            connection.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
        admin.dispose()


def run(case: str, *, quick: bool = False) -> Iterator[dict]:
    if case not in CASES:
        raise ValueError(f"unknown case {case!r}")
    if case == "close-1m":
        with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
            yield _close_1m(case, f"sqlite:///{Path(tmp) / 'close.db'}", quick)
        return
    if case == "close-long-id":
        with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
            yield _close_long_id(case, Path(tmp), quick)
        return
    if case == "close-lookback":
        with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
            yield _close_lookback(case, Path(tmp), quick)
        return
    url = os.environ.get(POSTGRES_URL_VARIABLE)
    if not url:
        yield {
            "case": case,
            "cores": os.cpu_count(),
            "skipped": f"set {POSTGRES_URL_VARIABLE} to a PostgreSQL URL to run this case",
        }
        return
    with _postgres_schema(url) as schema_url:
        yield _close_1m(case, schema_url, quick)


def _bench_settings(url: str):
    """One weekly window of training on the store at ``url``."""
    from rolewatch.config import load_settings

    return load_settings(database_url=url, training_windows=1, window_period="7d", window_span="7d")


def _load_windows(engine: Any, url: str, quick: bool) -> None:
    """The training window (a fifth of the size) and the measured window of power-law
    traffic, bulk-loaded into the store at ``url``."""
    big = 100_000 if quick else 1_000_000
    accounts = 20_000 if quick else 180_000
    rng = np.random.default_rng(0)
    for size, start, prefix in ((big // 5, FIRST_END - WEEK_US, "t-"), (big, FIRST_END, "w-")):
        rows = _power_law_events(rng, size, accounts, start, prefix)
        if url.startswith("sqlite"):
            _load(Path(url.removeprefix("sqlite:///")), rows)
        else:
            _load_postgres(engine, rows)
        del rows


def _close_1m(case: str, url: str, quick: bool) -> dict:
    from rolewatch.pipeline.closer import close_window
    from rolewatch.store.db import open_store

    settings = _bench_settings(url)
    engine = open_store(settings)
    _load_windows(engine, url, quick)
    now_us = FIRST_END + 4 * WEEK_US
    started = time.perf_counter()
    close_window(engine, settings, FIRST_END, now_us=now_us)
    training_seconds = time.perf_counter() - started
    started = time.perf_counter()
    summaries = close_window(engine, settings, FIRST_END + WEEK_US, now_us=now_us)
    seconds = time.perf_counter() - started
    engine.dispose()
    summary = summaries[-1]
    return {
        "case": case,
        "database": "sqlite" if url.startswith("sqlite") else "postgresql",
        "cores": os.cpu_count(),
        "events": summary.events,
        "accounts": summary.accounts,
        "alerts": summary.alert_count,
        "seconds": round(seconds, 2),
        "stage_seconds": summary.stage_seconds,
        "training_seconds": round(training_seconds, 2),
        "peak_rss_mb": round(_peak_rss_mb(), 1),
        "helper_peak_rss_mb": _helper_peaks_mb(),
        "target_seconds": 10 if url.startswith("sqlite") else 12,
    }


LONG_ID = "x" * 200  # schema.MAX_ACCOUNT_CHARS


def _close_long_id(case: str, folder: Path, quick: bool) -> dict:
    """The close-1m window closed as it is and with one 200-character account id added."""
    import shutil
    from concurrent.futures import ProcessPoolExecutor
    from multiprocessing import get_context

    from rolewatch.pipeline.closer import close_window
    from rolewatch.store.db import open_store

    plain, widened = folder / "plain.db", folder / "long-id.db"
    settings = _bench_settings(f"sqlite:///{plain}")
    engine = open_store(settings)
    _load_windows(engine, f"sqlite:///{plain}", quick)
    close_window(engine, settings, FIRST_END, now_us=FIRST_END + 4 * WEEK_US)
    engine.dispose()
    shutil.copyfile(plain, widened)
    t = FIRST_END + 1_000
    _load(
        widened,
        [
            (f"long-{i}", t + i, LONG_ID, f"a-{i:07d}", "payment", 1.0, t + i, False)
            for i in range(3)
        ],
    )
    closes = {}
    for label, path in (("as_is", plain), ("long_id", widened)):
        with ProcessPoolExecutor(max_workers=1, mp_context=get_context("spawn")) as pool:
            closes[label] = pool.submit(_close_in_this_process, str(path)).result()
    return {
        "case": case,
        "cores": os.cpu_count(),
        "longest_id_chars": len(LONG_ID),
        **{
            f"{label}_{key}": value
            for label, close in closes.items()
            for key, value in close.items()
        },
        "peak_ratio": round(closes["long_id"]["peak_rss_mb"] / closes["as_is"]["peak_rss_mb"], 2),
        "seconds_ratio": round(closes["long_id"]["seconds"] / closes["as_is"]["seconds"], 2),
    }


LOOKBACK_WINDOWS = 8  # the look-back of the default settings (compute.lookback_windows)


def _close_lookback(case: str, folder: Path, quick: bool) -> dict:
    """The window after eight measured windows of the same accounts, closed in a fresh
    process."""
    from concurrent.futures import ProcessPoolExecutor
    from multiprocessing import get_context

    from rolewatch.pipeline.closer import close_window
    from rolewatch.store.db import open_store

    path = folder / "lookback.db"
    big = 100_000 if quick else 1_000_000
    accounts = 20_000 if quick else 180_000
    settings = _bench_settings(f"sqlite:///{path}")
    engine = open_store(settings)
    rng = np.random.default_rng(0)
    _load(path, _power_law_events(rng, big // 5, accounts, FIRST_END - WEEK_US, "t-"))
    for window in range(LOOKBACK_WINDOWS + 1):
        start = FIRST_END + window * WEEK_US
        _load(path, _power_law_events(rng, big, accounts, start, f"w{window}-"))
    now_us = FIRST_END + (LOOKBACK_WINDOWS + 4) * WEEK_US
    started = time.perf_counter()
    for window in range(LOOKBACK_WINDOWS + 1):  # the training window, then eight measured
        close_window(engine, settings, FIRST_END + window * WEEK_US, now_us=now_us)
    preparing_seconds = time.perf_counter() - started
    engine.dispose()
    end_us = FIRST_END + (LOOKBACK_WINDOWS + 1) * WEEK_US
    with ProcessPoolExecutor(max_workers=1, mp_context=get_context("spawn")) as pool:
        close = pool.submit(_close_in_this_process, str(path), end_us, now_us).result()
    return {
        "case": case,
        "cores": os.cpu_count(),
        "events_per_window": big,
        "measured_windows_before": LOOKBACK_WINDOWS,
        "preparing_seconds": round(preparing_seconds, 2),
        **close,
    }


def _close_in_this_process(
    path: str, end_us: int = FIRST_END + WEEK_US, now_us: int = FIRST_END + 4 * WEEK_US
) -> dict:
    """Close the window ending at ``end_us`` of the store at ``path`` (a fresh process's
    peak)."""
    from rolewatch.pipeline.closer import close_window
    from rolewatch.store.db import open_store

    settings = _bench_settings(f"sqlite:///{path}")
    engine = open_store(settings)
    started = time.perf_counter()
    summary = close_window(engine, settings, end_us, now_us=now_us)[-1]
    seconds = time.perf_counter() - started
    engine.dispose()
    return {
        "accounts": summary.accounts,
        "alerts": summary.alert_count,
        "seconds": round(seconds, 2),
        "stage_seconds": summary.stage_seconds,
        "peak_rss_mb": round(_peak_rss_mb(), 1),
    }
