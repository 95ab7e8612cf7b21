"""Fixtures for the review tests: the real app served by uvicorn on a loopback port over a
real store (a SQLite file, or a fresh PostgreSQL schema), keys of each scope with display
names, and :func:`file_window`, which stores a window and files its alerts with the same
store and review calls, in the same order and transaction, as a window close
(``pipeline.closer._close_once``), so cases are built the production way with alert scores
chosen by the test instead of by the detection engine.
"""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass

import httpx
import pytest

from rolewatch.clock import now_micros
from rolewatch.store.alerts import ActivityEvidence, Evidence, NewAlert, ShiftComponents, WindowRef

WEEK_US = 7 * 86_400 * 1_000_000
# Window ends are UTC epoch multiples of the period: 2026-02-05T00:00:00Z is one (a Thursday).
FIRST_END_US = 1_770_249_600_000_000
assert FIRST_END_US % WEEK_US == 0


@contextmanager
def serve(app, sock: socket.socket) -> Iterator[str]:
    """Serve ``app`` with uvicorn on ``sock`` in a thread; yields the base URL."""
    import uvicorn

    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", lifespan="on"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        if time.monotonic() > deadline or not thread.is_alive():
            raise RuntimeError("the app did not start within 30 s")
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{sock.getsockname()[1]}"
    finally:
        server.should_exit = True
        thread.join(timeout=15)
        sock.close()


def loopback_socket() -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind(("127.0.0.1", 0))
    return sock


@dataclass
class Live:
    """The running service: base URL, settings, engine, full keys and key ids per name."""

    url: str
    settings: object
    engine: object
    keys: dict[str, str]
    ids: dict[str, str]

    def headers(self, who: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.keys[who]}"}

    def client(self, who: str) -> httpx.Client:
        return httpx.Client(base_url=self.url, headers=self.headers(who), timeout=60)


# name -> (scopes, display name)
PEOPLE = {
    "reader": (["read"], None),
    "mira": (["review"], "Mira (T&S)"),
    "theo": (["review"], "Theo"),
    "admin": (["admin"], "Ana Admin"),
}


def review_settings(store_url: str, public_url: str, **overrides):
    from rolewatch.config import load_settings

    values = dict(
        database_url=store_url,
        public_url=public_url,
        webhook_allow_http=True,
        webhook_allow_hosts=["127.0.0.1"],
        delivery_backoff="1s",
        delivery_connect_timeout="2s",
        delivery_timeout="5s",
        log_level="WARNING",
        log_json=False,
        case_group_windows=2,
        case_reopen_ratio=1.5,
    )
    values.update(overrides)
    return load_settings(**values)


@pytest.fixture
def live(store_url) -> Iterator[Live]:
    """The real app over real HTTP, jobs off (the tests close windows themselves)."""
    from rolewatch.api.app import create_app
    from rolewatch.store.db import open_store
    from rolewatch.store.keys import create_key

    sock = loopback_socket()
    settings = review_settings(store_url, f"http://127.0.0.1:{sock.getsockname()[1]}")
    engine = open_store(settings)
    keys, ids = {}, {}
    for who, (scopes, name) in PEOPLE.items():
        record, key = create_key(engine, scopes, label=f"{who} key", now_us=now_micros(), name=name)
        keys[who], ids[who] = key, record.key_id
    with serve(create_app(settings, run_jobs=False), sock) as url:
        yield Live(url, settings, engine, keys, ids)
    engine.dispose()


def new_alert(account: str, score: float, role_before: int | None = 1, role_after: int = 2):
    """A raised alert with small but complete evidence (what compute_window hands over)."""
    evidence = Evidence(
        threshold=4.0,
        measure="role_aware",
        mode="threshold",
        components=ShiftComponents(composition=0.5, magnitude=0.5, error=0.1, bridging=None),
        mixture_before=(),
        mixture_after=(),
        feature_moves=({"feature": "out_degree", "before": 2.0, "after": 30.0},),
        activity=ActivityEvidence(events_out=30, events_in=1, counterparts=28, new_counterparts=27),
        top_counterparts=(),
        sample_event_ids=(),
        history_url=f"http://rolewatch.invalid/v1/accounts/{account}/roles",
        page_url=f"http://rolewatch.invalid/accounts/{account}",
        notice="A lead for human review, not a verdict.",
        window=WindowRef(id=None, start="", end=""),
        basis_version="b-test",
    )
    return NewAlert(
        account=account,
        score=score,
        role_before=role_before,
        role_after=role_after,
        evidence=evidence,
    )


def file_window(live_or_engine, settings, index: int, raised: list, *, now_us: int | None = None):
    """Close window number ``index`` (0 = the one ending FIRST_END_US) with the alerts
    ``raised``: the closer's review and store calls, in its order, in one write transaction.
    Returns the stored alerts (API form) and the intake's result."""
    from rolewatch.delivery.outbox import enqueue_alerts
    from rolewatch.review.intake import file_window_alerts, screen_alerts
    from rolewatch.store.alerts import insert_alerts
    from rolewatch.store.db import write_transaction
    from rolewatch.store.windows import insert_window

    engine = getattr(live_or_engine, "engine", live_or_engine)
    end_us = FIRST_END_US + index * WEEK_US
    now_us = now_micros() if now_us is None else now_us
    with write_transaction(engine) as connection:
        screened = screen_alerts(connection, raised, now_us=now_us)
        window_id = insert_window(
            connection,
            start_us=end_us - WEEK_US,
            end_us=end_us,
            closed_us=now_us,
            event_count=len(raised),
            training=False,
            measures=None,
        )
        stored = insert_alerts(
            connection,
            screened.kept,
            window_id=window_id,
            window_start_us=end_us - WEEK_US,
            window_end_us=end_us,
            created_us=now_us,
            basis_version="b-test",
            names={},
        )
        filed = file_window_alerts(
            connection,
            settings,
            window_id=window_id,
            window_end_us=end_us,
            basis_version="b-test",
            alerts=stored,
            screened=screened,
            now_us=now_us,
        )
        enqueue_alerts(
            connection, settings, [alert.to_dict() for alert in stored], case_urls=filed.case_urls
        )
    return [alert.to_dict() for alert in stored], filed
