"""Review inside the real window close: the committed fixture sample is ingested and its
windows are closed by ``pipeline.closer.close_due_windows``; the close files every alert into
its account's case and holds back a suppressed account, whose history is still stored.

A first store without suppressions says which accounts alert; a second store, on SQLite and
PostgreSQL, suppresses the first of them and is closed the same way.
"""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path

import pytest

from rolewatch.clock import now_micros
from rolewatch.config import load_settings
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.review import cases, stats, suppression_list
from rolewatch.store import queries
from rolewatch.store.db import open_store, write_transaction
from rolewatch.store.events import ingest
from rolewatch.store.keys import create_key

SAMPLE = Path(__file__).resolve().parents[2] / "fixtures" / "sample" / "events.ndjson"
pytestmark = pytest.mark.slow


def _closed_store(url: str, *, suppress: str | None = None, subscribe: bool = False):
    settings = load_settings(
        database_url=url,
        log_level="WARNING",
        log_json=False,
        webhook_allow_http=True,
        webhook_allow_hosts=["127.0.0.1"],
    )
    engine = open_store(settings)
    if suppress is not None:
        key, _ = create_key(engine, ["review"], label="closer test", now_us=now_micros())
        suppression_list.add_entry(
            engine,
            settings,
            key,
            kind="account",
            value=suppress,
            reason="known account",
            expires_us=None,
            now_us=now_micros(),
        )
    if subscribe:
        from rolewatch.delivery.subscriptions import create_subscription

        with write_transaction(engine) as connection:
            create_subscription(
                connection,
                settings,
                url="http://127.0.0.1:9/hook",
                fmt="text",
                now_us=now_micros(),
                events=["alert.raised"],
            )
    with open(SAMPLE, encoding="utf-8") as handle:
        events = [json.loads(line) for line in handle if line.strip()]
    assert not ingest(engine, settings, events, now_micros()).rejected
    close_due_windows(engine, settings, now_us=now_micros(), drain=True)
    return engine, settings


def _history(engine, account: str) -> list[tuple]:
    return [
        (entry["window_end_us"], entry["dominant_role"], entry["score"], entry["status"])
        for entry in queries.account_history(engine, account)
    ]


@pytest.fixture(scope="module")
def unsuppressed(tmp_path_factory):
    """The sample closed without suppressions: its alerts (API form, oldest first) and the
    role history of the first alerted account."""
    url = f"sqlite:///{tmp_path_factory.mktemp('plain') / 'rolewatch.db'}"
    engine, _settings = _closed_store(url)
    found, _ = queries.list_alerts(engine, limit=500)
    assert found, "the sample raises alerts"
    found.reverse()
    history = _history(engine, found[0]["account"])
    engine.dispose()
    return found, history


def test_the_close_files_cases_and_holds_back_a_suppressed_account(store_url, unsuppressed):
    unsuppressed, silenced_history = unsuppressed
    silenced = unsuppressed[0]["account"]
    engine, settings = _closed_store(store_url, suppress=silenced, subscribe=True)
    try:
        raised, _ = queries.list_alerts(engine, limit=500)
        expected = [a for a in unsuppressed if a["account"] != silenced]
        assert sorted((a["account"], a["window_end"]) for a in raised) == sorted(
            (a["account"], a["window_end"]) for a in expected
        )
        # One case per account here (the sample's alerts are few and far apart or grouped),
        # each holding exactly that account's alerts, opened by the window close.
        queue, total = cases.list_queue(engine, settings, cases.CaseFilters(), limit=500, offset=0)
        per_account = Counter(a["account"] for a in raised)
        assert sum(case["alert_count"] for case in queue) == len(raised)
        for case in queue:
            detail = cases.case_detail(engine, settings, case["id"])
            assert {a["alert_id"] for a in detail["alerts"]} <= {
                a["id"] for a in raised if a["account"] == case["account"]
            }
            assert detail["history"][0]["action"] == "opened"
            assert detail["history"][0]["by"] is None
        assert {case["account"] for case in queue} == set(per_account)
        assert total == len(queue)

        # The suppressed account: no alert, no case, but its history is complete and every
        # alert it would have raised is counted on its window.
        assert silenced not in {case["account"] for case in queue}
        assert _history(engine, silenced) == silenced_history and silenced_history
        figures = stats.review_figures(engine)
        held = Counter(a["window_id"] for a in unsuppressed if a["account"] == silenced)
        assert figures["totals"]["suppressed"] == sum(held.values())
        assert figures["totals"]["raised"] == len(raised)
        windows = {w["id"]: w for w in queries.list_windows(engine)}
        by_window = Counter(a["window_id"] for a in raised)
        for window_id, window in windows.items():
            assert window["alert_count"] == by_window.get(window_id, 0)

        # The chat text of every alert links its case.
        from sqlalchemy import select

        from rolewatch.store.schema import deliveries

        with engine.connect() as connection:
            bodies = [row.body for row in connection.execute(select(deliveries.c.body))]
        assert len(bodies) == len(raised)
        assert all(f"Case: {settings.public_url}/cases/" in json.loads(b)["text"] for b in bodies)
    finally:
        engine.dispose()
