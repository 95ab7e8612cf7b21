"""Fixtures for the delivery tests: a real SQLite file, settings that allow loopback receivers."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import select

from rolewatch.clock import now_micros
from rolewatch.config import Settings
from rolewatch.store.db import make_engine, write_transaction
from rolewatch.store.schema import alerts, metadata, windows

from .receivers import Receiver


def delivery_settings(database_url: str, **overrides) -> Settings:
    values = dict(
        database_url=database_url,
        webhook_allow_http=True,
        webhook_allow_hosts=["127.0.0.1"],
        delivery_backoff="1s",
        delivery_connect_timeout="1s",
        delivery_timeout="1s",
        delivery_max_attempts=5,
        subscription_pause_after=20,
        delivery_concurrency=1,
        public_url="https://rolewatch.example",
    )
    values.update(overrides)
    return Settings(**values)


@pytest.fixture
def db_url(tmp_path):
    return f"sqlite:///{tmp_path / 'rolewatch.db'}"


@pytest.fixture
def settings(db_url):
    return delivery_settings(db_url)


@pytest.fixture
def engine(settings):
    engine = make_engine(settings.database_url)
    metadata.create_all(engine)
    yield engine
    engine.dispose()


@pytest.fixture
def receiver():
    started: list[Receiver] = []

    def make(**kwargs) -> Receiver:
        instance = Receiver(**kwargs)
        started.append(instance)
        return instance

    yield make
    for instance in started:
        instance.stop()


def now_us() -> int:
    return now_micros()


def store_alert(
    connection, *, account="m-00042", score=0.73, role_before=1, role_after=3, evidence_extra=None
) -> dict:
    """Insert a window and an alert row (the outbox references real alerts) and return the
    alert in the API form of docs/CONTRACTS.md."""
    end_us = (
        1_771_459_200_000_000
        + int(connection.execute(select(windows.c.id)).all().__len__()) * 604_800_000_000
    )
    window_id = connection.execute(
        windows.insert().values(
            start_us=end_us - 604_800_000_000, end_us=end_us, status="closed", closed_us=end_us
        )
    ).inserted_primary_key[0]
    evidence = {
        "threshold": 0.5,
        "measure": "role_aware",
        "mode": "threshold",
        "feature_moves": [{"feature": "out_degree", "before": 2.0, "after": 37.0}],
        "activity": {"events_out": 40, "events_in": 0, "counterparts": 38, "new_counterparts": 37},
        "history_url": f"https://rolewatch.example/v1/accounts/{account}/roles",
        "page_url": f"https://rolewatch.example/accounts/{account}",
        "notice": "A lead for human review, not a verdict.",
        "change": "sends to 2 → 37 accounts",
    }
    evidence.update(evidence_extra or {})
    alert_id = connection.execute(
        alerts.insert().values(
            window_id=window_id,
            account=account,
            created_us=end_us,
            window_end_us=end_us,
            score=score,
            basis_version="b-1a2b3c",
            role_before=role_before,
            role_after=role_after,
            evidence=json.dumps(evidence),
        )
    ).inserted_primary_key[0]
    return {
        "id": alert_id,
        "account": account,
        "window_id": window_id,
        "window_start": "2026-02-12T00:00:00Z",
        "window_end": "2026-02-19T00:00:00Z",
        "created": "2026-02-19T00:00:05Z",
        "score": score,
        "basis_version": "b-1a2b3c",
        "role_before": {"id": role_before, "name": "quiet buyer"},
        "role_after": {"id": role_after, "name": "busy payer"},
        "headline": f"quiet buyer → busy payer: {evidence['change']}",
        "evidence": evidence,
    }


@pytest.fixture
def make_alert(engine):
    def make(**kwargs) -> dict:
        with write_transaction(engine) as connection:
            return store_alert(connection, **kwargs)

    return make
