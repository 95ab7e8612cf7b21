"""One account's role history read from a large store.

``history-52``: 52 closed weekly windows and 10,000,000 membership rows (about 192,000
active accounts per window) bulk-loaded with plain ``sqlite3`` ``executemany`` into the real
schema; then :func:`rolewatch.store.queries.account_history` is timed 200 times for accounts
drawn at random (each active in all 52 windows) and the p50/p95/max are printed.
``--quick`` loads 1,000,000 rows instead.
"""

from __future__ import annotations

import json
import os
import random
import sqlite3
import statistics
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

CASES = ("history-52",)
WINDOWS = 52
WEEK_US = 7 * 86_400 * 1_000_000
QUERIES = 200


def _load(path: Path, rows_total: int) -> tuple[int, float]:
    """Bulk-load windows and memberships; (accounts per window, seconds)."""
    per_window = rows_total // WINDOWS
    connection = sqlite3.connect(path, isolation_level=None)
    connection.execute("PRAGMA synchronous=OFF")  # a benchmark fixture, not service data
    connection.execute("PRAGMA cache_size=-262144")
    started = time.perf_counter()
    first_end = 1_767_830_400_000_000  # 2026-01-08T00:00:00Z
    connection.execute("BEGIN")
    connection.execute(
        "INSERT INTO recipes (version, created_us, body) VALUES ('r-bench', 0, '{}')"
    )
    connection.execute(
        "INSERT INTO bases (version, recipe_version, created_us, active, trained_from_us, "
        "trained_to_us, body) VALUES ('b-bench', 'r-bench', 0, 1, 0, 1, '{}')"
    )
    connection.executemany(
        "INSERT INTO roles (basis_version, role_id, name, description, profile) "
        "VALUES (?, ?, ?, ?, '{}')",
        [("b-bench", r, f"role {r}", "") for r in range(1, 7)],
    )
    connection.executemany(
        "INSERT INTO windows (id, start_us, end_us, status, closed_us, event_count, account_count, "
        "late_count, alert_count, new_count, inactive_count, scored_count, training) "
        "VALUES (?, ?, ?, 'closed', ?, 0, ?, 0, 0, 0, 0, 0, 0)",
        [
            (
                w + 1,
                first_end + (w - 1) * WEEK_US,
                first_end + w * WEEK_US,
                first_end + w * WEEK_US,
                per_window,
            )
            for w in range(WINDOWS)
        ],
    )
    connection.execute("COMMIT")
    rng = random.Random(0)
    mixtures = [json.dumps({str(r): round(1 / 6, 6) for r in range(1, 7)})] + [
        json.dumps({"1": 0.7, "3": 0.2, "5": 0.1}),
        json.dumps({"2": 1.0}),
    ]
    sql = (
        "INSERT INTO memberships (account, window_id, basis_version, mixture, dominant_role, "
        "score, status, events_out, events_in, counterparts, new_counterparts, error) "
        "VALUES (?, ?, 'b-bench', ?, ?, ?, 'scored', ?, ?, ?, ?, ?)"
    )
    for window in range(1, WINDOWS + 1):
        connection.execute("BEGIN")
        connection.executemany(
            sql,
            (
                (
                    f"m-{a:07d}",
                    window,
                    mixtures[a % 3],
                    1 + a % 6,
                    rng.random(),
                    a % 9,
                    a % 7,
                    a % 5,
                    a % 2,
                    0.1,
                )
                for a in range(per_window)
            ),
        )
        connection.execute("COMMIT")
    connection.execute("ANALYZE")
    connection.close()
    return per_window, time.perf_counter() - started


def run(case: str, *, quick: bool = False) -> Iterator[dict]:
    from rolewatch.config import load_settings
    from rolewatch.store.db import open_store
    from rolewatch.store.queries import account_history

    if case not in CASES:
        raise ValueError(f"unknown case {case!r}")
    rows_total = 1_000_000 if quick else 10_000_000
    with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
        path = Path(tmp) / "history.db"
        settings = load_settings(database_url=f"sqlite:///{path}")
        open_store(settings).dispose()
        per_window, load_seconds = _load(path, rows_total)
        engine = open_store(settings)
        rng = random.Random(1)
        accounts = [f"m-{rng.randrange(per_window):07d}" for _ in range(QUERIES)]
        account_history(engine, accounts[0])  # warm the connection pool and statement cache
        timings = []
        for account in accounts:
            started = time.perf_counter()
            history = account_history(engine, account)
            timings.append(time.perf_counter() - started)
            if len(history) != WINDOWS:
                raise RuntimeError(f"expected {WINDOWS} windows for {account}, got {len(history)}")
        engine.dispose()
        size_mb = path.stat().st_size / 1e6
    timings.sort()
    yield {
        "case": case,
        "cores": os.cpu_count(),
        "quick": quick,
        "membership_rows": per_window * WINDOWS,
        "windows": WINDOWS,
        "database_mb": round(size_mb, 1),
        "load_seconds": round(load_seconds, 2),
        "queries": QUERIES,
        "p50_ms": round(statistics.median(timings) * 1000, 3),
        "p95_ms": round(timings[int(0.95 * len(timings)) - 1] * 1000, 3),
        "max_ms": round(timings[-1] * 1000, 3),
    }
