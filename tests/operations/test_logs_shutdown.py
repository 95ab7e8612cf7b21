"""Logs carry request ids and no secrets or payloads at INFO; SIGTERM lets the current window
close finish (or not start) and the process exits 0."""

from __future__ import annotations

import io
import json
import logging
import time

import pytest

from rolewatch.clock import now_micros
from rolewatch.config import load_settings
from rolewatch.logs import configure_logging
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest

from .servers import Server, sample_events, windows_table


def test_info_logs_have_request_ids_and_no_keys_or_account_ids(app_client, make_event):
    stream = io.StringIO()
    configure_logging("INFO", json_lines=True, stream=stream)
    try:
        actor, target = "acct-secretive-7781", "acct-hidden-4410"
        event = make_event(actor=actor, target=target, id="evt-private-99", kind="payment")
        key = app_client.keys["ingest"]
        response = app_client.client.post(
            "/v1/events",
            json={"events": [event]},
            headers={"Authorization": f"Bearer {key}", "X-Request-ID": "req-abc.123"},
        )
        assert response.status_code == 202 and response.headers["x-request-id"] == "req-abc.123"
        bad = app_client.client.post(
            "/v1/events",
            json={"events": [make_event(actor=actor, target=actor)]},
            headers={"Authorization": f"Bearer {key}"},
        )
        assert bad.status_code == 202 and bad.json()["rejected"]
        history = app_client.client.get(
            f"/v1/accounts/{actor}/roles", headers=app_client.headers("read")
        )
        assert history.status_code in (200, 404)
        app_client.client.get("/v1/roles", headers={"Authorization": "Bearer " + key + "x"})
    finally:
        logging.getLogger().handlers = [
            h for h in logging.getLogger().handlers if not getattr(h, "_rolewatch", False)
        ]
    text = stream.getvalue()
    records = [json.loads(line) for line in text.splitlines()]
    requests = [r for r in records if r.get("logger") == "rolewatch.http"]
    assert len(requests) >= 4
    assert all(r.get("request_id") for r in requests)
    assert any(r["request_id"] == "req-abc.123" for r in requests)
    secret_part = key.split("_", 2)[2]  # after rwk_<key_id>_; the secret may hold "_"
    for needle in (key, secret_part, actor, target, "evt-private-99"):
        assert needle not in text, needle
    # Route templates, not raw paths, name the request.
    assert any(r.get("route") == "/v1/accounts/{account:path}/roles" for r in requests)


@pytest.mark.slow
def test_sigterm_during_a_close_finishes_it_and_exits_0(tmp_path):
    url = f"sqlite:///{tmp_path / 'rolewatch.db'}"
    settings = load_settings(database_url=url, training_windows=4)
    engine = open_store(settings)
    try:
        ingest(engine, settings, sample_events(), now_micros())
    finally:
        engine.dispose()
    server = Server(url, {"tick_interval": "1s", "training_windows": 4})
    try:
        server.start()
        # The fourth close fits the basis and back-fills: the longest one. Stop during it.
        while sum("closing window" in m for m in server.messages()) < 4:
            assert server.process.poll() is None, "\n".join(server.raw[-20:])
            time.sleep(0.01)
        time.sleep(0.2)
        code = server.stop(timeout=120)
    finally:
        server.kill()
    assert code == 0, "\n".join(server.raw[-20:])
    messages = server.messages()
    assert "rolewatch stopped" in messages
    windows = windows_table(url)
    # The close under way finished (4 windows, the training ones back-filled) and no other
    # window began after the signal: 10 were due.
    assert len(windows) == 4, windows
    assert all(w["members"] == w["account_count"] > 0 for w in windows), windows
    closing = sum("closing window" in m for m in messages)
    assert closing == 4, closing
