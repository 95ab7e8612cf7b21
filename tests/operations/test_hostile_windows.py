"""One stray old event must not poison or jam a young instance (over real HTTP, with the
background jobs running): runs of empty windows are skipped, training fits only on windows
that hold events, and times the service cannot represent never enter the store.

The age limit is off here (``max_event_age = 0``), the worst case: only the 1970 floor holds.
"""

from __future__ import annotations

import time

import httpx

from .hostile import Live
from .servers import Server, make_keys, post_events, sample_events, windows_table

SAMPLE_LAST_END_US = 1_773_273_600_000_000  # 2026-03-12T00:00:00Z, end of the sample's last week


def _wait_for_last_window(live: Live, timeout: float) -> list[dict]:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        found = windows_table(live.database_url)
        if found and found[-1]["end_us"] >= SAMPLE_LAST_END_US:
            return found
        assert live.server.process.poll() is None, "\n".join(live.server.raw[-20:])
        time.sleep(1)
    raise AssertionError(f"the sample's windows did not close in {timeout:.0f} s")


def test_a_1970_event_before_the_sample_is_skipped_over(store_url):
    keys = make_keys(store_url)
    settings = {
        "tick_interval": "1s",
        "idle_close_after": "2s",
        "training_windows": 4,
        "max_event_age": "0",
    }
    server = Server(store_url, settings).start()
    live = Live(server, store_url, keys)
    try:
        stray = [
            {"id": "stray-1970", "time": "1970-01-01T00:00:00Z", "actor": "m-a", "target": "m-b"},
            {"time": "0001-01-01T00:00:00+00:01", "actor": "m-c", "target": "m-d"},
            {"time": "0001-01-01T00:00:00Z", "actor": "m-c", "target": "m-d"},
            {"time": "1969-12-31T23:59:59Z", "actor": "m-c", "target": "m-d"},
        ]
        response = post_events(live.url, keys["ingest"], stray)
        assert response.status_code == 202, response.text
        assert response.json()["accepted"] == 1
        assert [item["index"] for item in response.json()["rejected"]] == [1, 2, 3]
        sample = sample_events()
        for start in range(0, len(sample), 2000):
            batch = sample[start : start + 2000]
            assert post_events(live.url, keys["ingest"], batch).status_code == 202
        closed = _wait_for_last_window(live, timeout=240)
        # The 1970 window and the sample's weeks; none of the ~2,900 empty weeks between.
        assert all(window["members"] > 0 for window in closed), closed[:3]
        assert len(closed) <= 12, len(closed)
        headers = {"Authorization": f"Bearer {keys['read']}"}
        listing = httpx.get(live.url + "/v1/windows", headers=headers, timeout=30)
        assert listing.status_code == 200
        roles = httpx.get(live.url + "/v1/roles", headers=headers, timeout=30).json()["roles"]
        assert len(roles) >= 2, roles
        assert sum(window["alerts"] for window in closed) > 0
    finally:
        server.kill()
