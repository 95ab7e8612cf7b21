"""Two real ``rolewatch serve`` processes sharing one PostgreSQL database: every window is
closed exactly once and every alert is delivered once per subscription."""

from __future__ import annotations

import time

import pytest

from .servers import (
    Receiver,
    Server,
    make_keys,
    post_events,
    running,
    sample_events,
    scalar,
    subscribe,
    windows_table,
)

SETTINGS = {
    "tick_interval": "1s",
    # Long enough that no window closes by the idle rule while batches are still arriving
    # (the sample is historical, so the wall clock is past every window's end).
    "idle_close_after": "15s",
    "webhook_allow_http": True,
    "webhook_allow_hosts": ["127.0.0.1"],
    "delivery_backoff": "1s",
    "log_level": "INFO",
    # Alert on the top 5% of scored accounts each window, so there are many deliveries to check.
    "alert_mode": "budget",
    "alert_budget": 0.05,
    "alert_floor": 0.0,
}
DEADLINE_S = 240


@pytest.mark.slow
@pytest.mark.postgres
def test_two_servers_close_each_window_once_and_deliver_each_alert_once(postgres_url):
    started = time.monotonic()
    keys = make_keys(postgres_url)
    one, two = Server(postgres_url, SETTINGS), Server(postgres_url, SETTINGS)
    with Receiver() as receiver, running(one, two):
        subscribe(one, keys["admin"], receiver)
        events = sample_events()
        batches = [events[i : i + 500] for i in range(0, len(events), 500)]
        for number, batch in enumerate(batches):  # alternate between the two processes
            response = post_events((one, two)[number % 2].url, keys["ingest"], batch)
            assert response.status_code == 202 and response.json()["accepted"] == len(batch)

        # Both processes run the closer and the delivery worker every second.
        while time.monotonic() - started < DEADLINE_S:
            closed = scalar(postgres_url, "SELECT count(*) FROM windows")
            pending = scalar(
                postgres_url, "SELECT count(*) FROM deliveries WHERE status <> 'delivered'"
            )
            alerts = scalar(postgres_url, "SELECT count(*) FROM alerts")
            if closed == 10 and pending == 0 and len(receiver.unique()) >= alerts:
                break
            time.sleep(1)
        time.sleep(3)  # a few more ticks: a second close or send would show now
        for server in (one, two):
            assert server.process.poll() is None, "\n".join(server.raw[-20:])

    windows = windows_table(postgres_url)
    ends = [w["end_us"] for w in windows]
    assert len(windows) == 10 and len(set(ends)) == 10, windows
    for window in windows:  # no partial window: one membership per active account
        assert window["members"] == window["account_count"] > 0, window
        assert window["alerts"] == window["alert_count"]
    alerts = scalar(postgres_url, "SELECT count(*) FROM alerts")
    deliveries = scalar(
        postgres_url, "SELECT count(*) FROM deliveries WHERE event_type = 'alert.raised'"
    )
    assert alerts > 0 and deliveries == alerts  # one delivery per alert and subscription
    assert len(receiver.unique()) == alerts, (len(receiver.unique()), alerts)
    # A webhook-id seen twice is only acceptable as a retry the store recorded.
    for webhook_id, seen in receiver.repeated().items():
        attempts = scalar(
            postgres_url, "SELECT attempts FROM deliveries WHERE id = :i", i=webhook_id
        )
        assert attempts >= seen, (webhook_id, seen, attempts)
    # Both processes served ingest; the closer lock let exactly one close each window.
    late = scalar(postgres_url, "SELECT count(*) FROM events WHERE late")
    print(
        f"multiprocess: windows={len(windows)} alerts={alerts} late={late} "
        f"delivered_ids={len(receiver.unique())} "
        f"receipts={len(receiver.ids)} seconds={time.monotonic() - started:.0f}"
    )
