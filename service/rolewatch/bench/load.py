"""Sustained load: ingest and history reads at the same time, through HTTP.

``load``: a real ``rolewatch serve`` (role all: the closer and delivery jobs run too) in a
subprocess on a loopback port, on a SQLite file that already holds the fixture marketplace
sample with its ten closed weekly windows. For a fixed time (30 s; 8 s with ``--quick``)
this process keeps posting batches of new events that continue the marketplace (so windows
keep closing during the run) from ``ROLEWATCH_BENCH_CLIENTS`` ingest threads (default 2)
while two more threads read random members' role histories. Prints events/s and the p50/p95
latencies of both kinds of request, with the machine's core count.
"""

from __future__ import annotations

import json
import os
import random
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from pathlib import Path

from rolewatch.bench import stop_server
from rolewatch.clock import now_micros

CASES = ("load",)
BATCH = 500
SAMPLE = Path(__file__).resolve().parents[3] / "fixtures" / "sample" / "events.ndjson"


def _percentile(values: list[float], share: float) -> float | None:
    if not values:
        return None
    ordered = sorted(values)
    return round(ordered[min(len(ordered) - 1, int(share * len(ordered)))], 2)


def _prepare(database_url: str) -> tuple[str, str, int, list[str]]:
    """Store the sample and close its windows; (ingest key, read key, last event time, members)."""
    from rolewatch.config import load_settings
    from rolewatch.pipeline.closer import close_due_windows
    from rolewatch.store.db import open_store
    from rolewatch.store.events import ingest, parse_time_us
    from rolewatch.store.keys import create_key

    # The fixture sample is dated January to March 2026: history, whatever today is.
    settings = load_settings(database_url=database_url, max_event_age="0")
    engine = open_store(settings)
    try:
        with open(SAMPLE, encoding="utf-8") as handle:
            events = [json.loads(line) for line in handle if line.strip()]
        now = now_micros()
        ingest(engine, settings, events, now)
        close_due_windows(engine, settings, now_us=now)
        ingest_key = create_key(engine, ["ingest"], label="bench load", now_us=now)[1]
        read_key = create_key(engine, ["read"], label="bench load", now_us=now)[1]
    finally:
        engine.dispose()
    members = sorted({e["actor"] for e in events} | {e["target"] for e in events})
    return ingest_key, read_key, max(parse_time_us(e["time"]) for e in events), members


class _Traffic:
    """The load one run puts on the server: ingest threads posting batches that continue the
    marketplace in event time, and reader threads fetching random members' histories, until
    ``stop_at``; each request's latency is recorded."""

    def __init__(
        self, url: str, ingest_key: str, read_key: str, last_us: int, members: list[str]
    ) -> None:
        self.url, self.ingest_key, self.read_key, self.members = url, ingest_key, read_key, members
        self.lock = threading.Lock()
        self.clock = last_us // 1_000_000  # event time in seconds: continues the sample
        self.counter = 0
        self.stop_at = 0.0
        self.ingest_ms: list[float] = []
        self.history_ms: list[float] = []
        self.errors: list[str] = []
        self.accepted = 0
        self.rejected = 0

    def next_body(self) -> bytes:
        import orjson

        with self.lock:
            first, self.counter = self.counter, self.counter + BATCH
            start, self.clock = self.clock, self.clock + BATCH * 10  # one event per 10 s
        rng = random.Random(first)
        events = []
        for i in range(BATCH):
            actor, target = rng.sample(self.members, 2)
            events.append(
                {
                    "id": f"load-{first + i:09d}",
                    "actor": actor,
                    "target": target,
                    "time": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(start + i * 10)),
                    "kind": "payment",
                    "weight": round(rng.lognormvariate(3, 1), 2),
                }
            )
        return orjson.dumps({"events": events})

    def ingester(self) -> None:
        import httpx

        headers = {"Authorization": f"Bearer {self.ingest_key}", "Content-Type": "application/json"}
        with httpx.Client(base_url=self.url, headers=headers, timeout=60) as client:
            while time.perf_counter() < self.stop_at:
                body = self.next_body()
                began = time.perf_counter()
                response = client.post("/v1/events", content=body)
                elapsed = (time.perf_counter() - began) * 1000
                with self.lock:
                    if response.status_code == 202:
                        self.ingest_ms.append(elapsed)
                        self.accepted += response.json()["accepted"]
                        self.rejected += len(response.json()["rejected"])
                    else:
                        self.errors.append(f"ingest {response.status_code}")

    def reader(self, seed: int) -> None:
        import httpx

        rng = random.Random(seed)
        headers = {"Authorization": f"Bearer {self.read_key}"}
        with httpx.Client(base_url=self.url, headers=headers, timeout=60) as client:
            while time.perf_counter() < self.stop_at:
                began = time.perf_counter()
                response = client.get(f"/v1/accounts/{rng.choice(self.members)}/roles")
                elapsed = (time.perf_counter() - began) * 1000
                with self.lock:
                    if response.status_code == 200:
                        self.history_ms.append(elapsed)
                    else:
                        self.errors.append(f"history {response.status_code}")

    def drive(self, duration: float, ingest_clients: int) -> float:
        """Run every thread for ``duration`` seconds; the seconds it took."""
        self.stop_at = time.perf_counter() + duration
        started = time.perf_counter()
        threads = [threading.Thread(target=self.ingester) for _ in range(ingest_clients)]
        threads += [threading.Thread(target=self.reader, args=(seed,)) for seed in range(2)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
        return time.perf_counter() - started


def _serve(database_url: str, port: int) -> subprocess.Popen:
    """A ``rolewatch serve`` (API and jobs) on ``port`` over the store at ``database_url``."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("ROLEWATCH_")}
    env.update(
        ROLEWATCH_DATABASE_URL=database_url,
        ROLEWATCH_LOG_LEVEL="WARNING",
        ROLEWATCH_TICK_INTERVAL="2s",
    )
    command = ["serve", "--host", "127.0.0.1", "--port", str(port)]
    return subprocess.Popen(
        [sys.executable, "-m", "rolewatch.cli", *command],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )


def run(case: str, *, quick: bool = False) -> Iterator[dict]:
    import httpx

    from rolewatch.bench.ingest import _free_port, _wait_healthy

    if case not in CASES:
        raise ValueError(f"unknown case {case!r}")
    duration = 8.0 if quick else 30.0
    ingest_clients = int(os.environ.get("ROLEWATCH_BENCH_CLIENTS", "2"))
    with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
        database_url = f"sqlite:///{Path(tmp) / 'load.db'}"
        ingest_key, read_key, last_us, members = _prepare(database_url)
        port = _free_port()
        url = f"http://127.0.0.1:{port}"
        process = _serve(database_url, port)
        traffic = _Traffic(url, ingest_key, read_key, last_us, members)
        try:
            _wait_healthy(url, process)
            elapsed = traffic.drive(duration, ingest_clients)
            windows = httpx.get(
                url + "/v1/windows", headers={"Authorization": f"Bearer {read_key}"}, timeout=60
            ).json()
        finally:
            stop_server(process, timeout=60)
    closed = windows.get("closed", windows.get("windows", []))
    yield {
        "case": case,
        "cores": os.cpu_count(),
        "quick": quick,
        "seconds": round(elapsed, 2),
        "batch": BATCH,
        "ingest_clients": ingest_clients,
        "history_clients": 2,
        "events_accepted": traffic.accepted,
        "events_rejected": traffic.rejected,
        "ingest_events_per_s": round(traffic.accepted / elapsed),
        "ingest_requests": len(traffic.ingest_ms),
        "ingest_p50_ms": _percentile(traffic.ingest_ms, 0.50),
        "ingest_p95_ms": _percentile(traffic.ingest_ms, 0.95),
        "history_requests": len(traffic.history_ms),
        "history_per_s": round(len(traffic.history_ms) / elapsed, 1),
        "history_p50_ms": _percentile(traffic.history_ms, 0.50),
        "history_p95_ms": _percentile(traffic.history_ms, 0.95),
        "errors": len(traffic.errors),
        "windows_closed_total": len(closed) if isinstance(closed, list) else None,
        "sqlite_synchronous": "FULL",
    }
