"""Ingest throughput through HTTP, next to a raw sqlite3 executemany of the same rows.

``ingest-http``: a real ``rolewatch serve --role api`` in a subprocess on a loopback port
(SQLite file, default durability: synchronous FULL), fed by four concurrent httpx clients
(ROLEWATCH_BENCH_CLIENTS) posting JSON batches of 1,000 events; then the same rows written
by plain ``sqlite3`` ``executemany`` (one transaction per 1,000 rows, same schema and
pragmas) in the same run. Prints events/s
of both and their ratio. Target: ≥ 20,000 events/s through HTTP (one server process).
"""

from __future__ import annotations

import os
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from pathlib import Path

from rolewatch.bench import stop_server
from rolewatch.clock import now_micros

CASES = ("ingest-http",)
TARGET_EVENTS_PER_S = 20_000
BATCH = 1_000


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def _events(n: int, seed: int = 0) -> list[dict]:
    """``n`` events among 50,000 accounts over four weeks of January 2026."""
    import random

    rng = random.Random(seed)
    start = 1_767_225_600  # 2026-01-01T00:00:00Z
    events = []
    for i in range(n):
        actor = rng.randrange(50_000)
        target = (actor + 1 + rng.randrange(49_999)) % 50_000
        moment = start + rng.randrange(28 * 86_400)
        events.append(
            {
                "id": f"bench-{seed}-{i:09d}",
                "time": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(moment)),
                "actor": f"m-{actor:05d}",
                "target": f"m-{target:05d}",
                "kind": "payment",
                "weight": round(rng.lognormvariate(3, 1), 2),
            }
        )
    return events


def _wait_healthy(url: str, process: subprocess.Popen, timeout: float = 60.0) -> None:
    import httpx

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"the server exited with code {process.returncode}")
        try:
            if httpx.get(url + "/healthz", timeout=1.0).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    raise RuntimeError("the server did not become healthy in time")


def _post_all(url: str, key: str, bodies: list[bytes], clients: int) -> float:
    """Post every body with ``clients`` concurrent connections; seconds taken."""
    import httpx

    headers = {"Authorization": f"Bearer {key}", "Content-Type": "application/json"}
    position = iter(range(len(bodies)))
    lock = threading.Lock()
    failures: list[str] = []

    def worker() -> None:
        with httpx.Client(base_url=url, headers=headers, timeout=60.0) as client:
            while True:
                with lock:
                    index = next(position, None)
                if index is None:
                    return
                response = client.post("/v1/events", content=bodies[index])
                if response.status_code != 202 or response.json()["rejected"]:
                    failures.append(response.text[:200])

    started = time.perf_counter()
    threads = [threading.Thread(target=worker) for _ in range(clients)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    elapsed = time.perf_counter() - started
    if failures:
        raise RuntimeError(f"{len(failures)} batches failed, first: {failures[0]}")
    return elapsed


def _raw_sqlite(path: Path, rows: list[tuple], now_us: int) -> float:
    """Same rows into the same schema with plain sqlite3: seconds taken."""
    connection = sqlite3.connect(path, isolation_level=None)
    connection.execute("PRAGMA journal_mode=WAL")
    connection.execute("PRAGMA synchronous=FULL")
    connection.execute("PRAGMA cache_size=-65536")  # as make_engine sets it
    sql = (
        "INSERT INTO events (event_id, time_us, actor, target, kind, weight, received_us, late) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (event_id) DO NOTHING"
    )
    started = time.perf_counter()
    for start in range(0, len(rows), BATCH):
        connection.execute("BEGIN IMMEDIATE")
        connection.executemany(sql, [row + (now_us, False) for row in rows[start : start + BATCH]])
        connection.execute("COMMIT")
    elapsed = time.perf_counter() - started
    connection.close()
    return elapsed


def _serve_api(path: Path, port: int) -> subprocess.Popen:
    """A ``rolewatch serve --role api`` on ``port`` over the SQLite file ``path``."""
    env = dict(
        os.environ,
        ROLEWATCH_DATABASE_URL=f"sqlite:///{path}",
        ROLEWATCH_LOG_LEVEL="WARNING",
        ROLEWATCH_MAX_BATCH_EVENTS="10000",
        ROLEWATCH_MAX_EVENT_AGE="0",  # the generated events are dated January 2026
    )
    env.pop("ROLEWATCH_CONFIG", None)
    command = ["serve", "--host", "127.0.0.1", "--port", str(port), "--role", "api"]
    return subprocess.Popen(
        [sys.executable, "-m", "rolewatch.cli", *command],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )


def run(case: str, *, quick: bool = False) -> Iterator[dict]:
    import orjson

    from rolewatch.config import load_settings
    from rolewatch.store.db import open_store
    from rolewatch.store.events import parse_time_us
    from rolewatch.store.keys import create_key

    if case not in CASES:
        raise ValueError(f"unknown case {case!r}")
    total = 50_000 if quick else 300_000
    clients = int(os.environ.get("ROLEWATCH_BENCH_CLIENTS", "4"))
    events = _events(total)
    bodies = [orjson.dumps({"events": events[i : i + BATCH]}) for i in range(0, total, BATCH)]
    with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
        http_db, raw_db = Path(tmp) / "http.db", Path(tmp) / "raw.db"
        settings = load_settings(database_url=f"sqlite:///{http_db}")
        engine = open_store(settings)
        key = create_key(engine, ["ingest"], label="bench", now_us=now_micros())[1]
        engine.dispose()
        open_store(load_settings(database_url=f"sqlite:///{raw_db}")).dispose()

        port = _free_port()
        url = f"http://127.0.0.1:{port}"
        process = _serve_api(http_db, port)
        try:
            _wait_healthy(url, process)
            warm = max(1, len(bodies) // 20)  # first 5% warm the server up, not timed
            _post_all(url, key, bodies[:warm], clients)
            http_seconds = _post_all(url, key, bodies[warm:], clients)
        finally:
            stop_server(process, timeout=30)
        timed = total - warm * BATCH

        rows = [
            (e["id"], parse_time_us(e["time"]), e["actor"], e["target"], e["kind"], e["weight"])
            for e in events[warm * BATCH :]
        ]
        raw_seconds = _raw_sqlite(raw_db, rows, now_micros())
        stored = sqlite3.connect(http_db).execute("SELECT count(*) FROM events").fetchone()[0]

    http_rate = timed / http_seconds
    raw_rate = timed / raw_seconds
    yield {
        "case": case,
        "cores": os.cpu_count(),
        "quick": quick,
        "events": timed,
        "batch": BATCH,
        "clients": clients,
        "stored": stored,
        "http_seconds": round(http_seconds, 3),
        "http_events_per_s": round(http_rate),
        "raw_sqlite_seconds": round(raw_seconds, 3),
        "raw_sqlite_events_per_s": round(raw_rate),
        "http_to_raw_ratio": round(http_rate / raw_rate, 3),
        "target_events_per_s": TARGET_EVENTS_PER_S,
        "meets_target": http_rate >= TARGET_EVENTS_PER_S,
        "sqlite_synchronous": "FULL",
    }
