"""kill -9 in the middle of ingest and in the middle of a window close, on SQLite and on
PostgreSQL: acknowledged events survive exactly once, no window is partial or doubled, and
deliveries that were pending still go out after the restart."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import pytest

from rolewatch.clock import now_micros
from rolewatch.config import load_settings
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest

from .load_client import batch_events
from .servers import Receiver, Server, make_keys, sample_events, scalar, subscribe, windows_table

CLIENT = Path(__file__).with_name("load_client.py")
BATCH = 200


def _acknowledged(log: Path) -> tuple[set[int], set[int]]:
    acked, failed = set(), set()
    for line in log.read_text().splitlines():
        kind, number, *_ = line.split()
        (acked if kind == "ack" else failed).add(int(number))
    return acked, failed


def _run_client(server: Server, key: str, log: Path, first: int, count: int) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, str(CLIENT), server.url, key, str(log), str(first), str(count), str(BATCH)]
    )


@pytest.mark.slow
def test_kill_during_ingest_keeps_every_acknowledged_event_once(store_url, tmp_path):
    keys = make_keys(store_url)
    log = tmp_path / "client.log"
    log.touch()
    server = Server(store_url, {"role": "api"})
    report = []
    client = None
    try:
        server.start()
        client = _run_client(server, keys["ingest"], log, 0, 400)
        for round_ in range(2):
            # Wait until the client is well into its load, then kill -9 mid-batch.
            deadline = time.monotonic() + 60
            while len(_acknowledged(log)[0]) < 15 * (round_ + 1) and time.monotonic() < deadline:
                time.sleep(0.05)
            time.sleep(0.13)  # land between a request's start and its answer, most likely
            server.kill()
            acked, failed = _acknowledged(log)
            stored = scalar(store_url, "SELECT count(*) FROM events")
            distinct = scalar(store_url, "SELECT count(DISTINCT event_id) FROM events")
            report.append(
                {
                    "kill": round_ + 1,
                    "acknowledged_events": len(acked) * BATCH,
                    "stored": stored,
                    "distinct": distinct,
                }
            )
            assert stored == distinct  # nothing doubled
            assert (
                stored >= len(acked) * BATCH
            )  # acknowledged events are all there (checked below by id)
            time.sleep(0.5)  # the client meets the dead server for a moment
            server.start()
        (tmp_path / "stop").touch()
        client.wait(120)
    finally:
        server.kill()
        if client is not None and client.poll() is None:
            client.kill()
            client.wait(30)
    acked, failed = _acknowledged(log)
    assert failed, "the kills should have made some batches fail"
    expected = {e["id"] for number in acked for e in batch_events(number, BATCH)}
    present = set()
    engine = open_store(load_settings(database_url=store_url))
    try:
        with engine.connect() as connection:
            import sqlalchemy as sa

            present = {row[0] for row in connection.execute(sa.text("SELECT event_id FROM events"))}
            total = connection.execute(sa.text("SELECT count(*) FROM events")).scalar()
    finally:
        engine.dispose()
    assert expected <= present, f"{len(expected - present)} acknowledged events lost"
    assert total == len(present)  # each stored once
    # Unacknowledged batches may be stored whole or not at all, never in part.
    for number in failed:
        ids = {e["id"] for e in batch_events(number, BATCH)}
        assert len(ids & present) in (0, BATCH), (number, len(ids & present))
    print(
        "ingest-crash",
        store_url.split(":")[0],
        report,
        {"acknowledged": len(expected), "stored": total, "failed_batches": len(failed)},
    )


@pytest.mark.slow
def test_kill_during_window_close_leaves_no_partial_window(store_url, tmp_path):
    # A delivery claimed when the process dies waits out its claim lease (connect + total
    # timeout per round of sends, plus 60 s): these settings make it 63 s instead of 320 s.
    settings = dict(
        tick_interval="1s",
        idle_close_after="2s",
        webhook_allow_http=True,
        webhook_allow_hosts=["127.0.0.1"],
        delivery_backoff="1s",
        training_windows=4,
        delivery_connect_timeout="1s",
        delivery_timeout="2s",
        delivery_batch_size=5,
        delivery_concurrency=5,
        alert_mode="budget",
        alert_budget=0.05,
        alert_floor=0.0,
    )
    keys = make_keys(store_url)
    engine = open_store(load_settings(database_url=store_url))
    try:  # the sample is stored before the server starts: it finds ten windows due at once
        assert (
            ingest(
                engine,
                load_settings(database_url=store_url),
                sample_events(),
                now_micros(),
            ).accepted
            == 10839
        )
    finally:
        engine.dispose()
    receiver = Receiver()  # its port is subscribed now, but it starts only after the kills
    server = Server(store_url, settings)
    report = {}
    try:
        server.start()
        subscribe(server, keys["admin"], receiver)
        # Kill 1: while the fourth window (training ends: fit and back-fill) is being closed.
        assert server.wait_for_message("closing window", 90)
        while sum("closing window" in m for m in server.messages()) < 4:
            assert server.process.poll() is None
            time.sleep(0.01)
        time.sleep(0.3)
        server.kill()
        windows = windows_table(store_url)
        report["after_kill_1"] = len(windows)
        _assert_whole(windows)
        # Kill 2: mid-close of a later window, with alerts pending delivery (receiver down).
        server.start()
        seen = len(server.messages())
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            closing = [m for m in server.messages()[seen:] if "closing window" in m]
            if closing and scalar(
                store_url, "SELECT count(*) FROM deliveries WHERE status = 'pending'"
            ):
                break
            time.sleep(0.01)
        time.sleep(0.1)
        server.kill()
        windows = windows_table(store_url)
        report["after_kill_2"] = len(windows)
        report["pending_at_kill_2"] = scalar(
            store_url, "SELECT count(*) FROM deliveries WHERE status = 'pending'"
        )
        _assert_whole(windows)
        assert report["pending_at_kill_2"] > 0
        # Restart with the receiver up: every window closes once, every delivery goes out.
        with receiver:
            server.start()
            deadline = time.monotonic() + 120
            while time.monotonic() < deadline:
                if scalar(store_url, "SELECT count(*) FROM windows") == 10 and not scalar(
                    store_url, "SELECT count(*) FROM deliveries WHERE status <> 'delivered'"
                ):
                    break
                time.sleep(0.5)
            time.sleep(2)
        errors = [line for line in server.raw if '"ERROR"' in line or "Traceback" in line]
        server.kill()
    finally:
        server.kill()
    windows = windows_table(store_url)
    _assert_whole(windows)
    assert len(windows) == 10, (len(windows), errors[-5:])
    assert len(windows) == 10 and len({w["end_us"] for w in windows}) == 10
    alerts = scalar(store_url, "SELECT count(*) FROM alerts")
    assert alerts > 0
    assert scalar(store_url, "SELECT count(*) FROM deliveries WHERE status = 'delivered'") == alerts
    assert receiver.unique() == set(receiver.bodies) and len(receiver.unique()) == alerts
    report.update(
        windows=len(windows),
        alerts=alerts,
        delivered=len(receiver.unique()),
        receipts=len(receiver.ids),
    )
    print("close-crash", store_url.split(":")[0], report)


def _assert_whole(windows: list[dict]) -> None:
    """Each stored window is whole: all its memberships or, before the fit, none yet."""
    assert len({w["end_us"] for w in windows}) == len(windows)
    fitted = any(w["members"] for w in windows)
    for window in windows:
        if fitted:
            assert window["members"] == window["account_count"], window
        else:
            assert window["members"] == 0, window
        assert window["alerts"] == window["alert_count"], window
