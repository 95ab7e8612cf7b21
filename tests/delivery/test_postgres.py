"""Concurrent delivery workers on PostgreSQL: a row is never sent twice at once.

Needs ROLEWATCH_TEST_POSTGRES_URL (CI: postgresql+psycopg://postgres@127.0.0.1:5432/test).
Each test works in its own schema, dropped afterwards, so it never touches other tables.
"""

from __future__ import annotations

import os
import threading
import uuid
from collections import Counter
from urllib.parse import quote

import pytest
from sqlalchemy import create_engine, select, text

from rolewatch.delivery.outbox import enqueue_alerts
from rolewatch.delivery.subscriptions import create_subscription
from rolewatch.delivery.worker import claim_due, deliver_due
from rolewatch.store.db import make_engine, write_transaction
from rolewatch.store.schema import deliveries, metadata

from .conftest import delivery_settings, now_us, store_alert

POSTGRES_URL = os.environ.get("ROLEWATCH_TEST_POSTGRES_URL")
pytestmark = [
    pytest.mark.postgres,
    pytest.mark.skipif(
        not POSTGRES_URL,
        reason="set ROLEWATCH_TEST_POSTGRES_URL (e.g. "
        "postgresql+psycopg://postgres@127.0.0.1:5432/test) to run the PostgreSQL delivery tests",
    ),
]


@pytest.fixture
def pg_url():
    schema = f"delivery_{uuid.uuid4().hex[:10]}"
    admin = create_engine(POSTGRES_URL)
    with admin.begin() as connection:
        connection.execute(text(f'CREATE SCHEMA "{schema}"'))
    separator = "&" if "?" in POSTGRES_URL else "?"
    options = quote(f"-csearch_path={schema} -cstatement_timeout=20000")
    url = f"{POSTGRES_URL}{separator}options={options}"
    engine = make_engine(url)
    metadata.create_all(engine)
    engine.dispose()
    yield url
    with admin.begin() as connection:
        connection.execute(text(f'DROP SCHEMA "{schema}" CASCADE'))
    admin.dispose()


def _fill(engine, settings, url, count):
    with write_transaction(engine) as connection:
        create_subscription(connection, settings, url=url, now_us=now_us())
        alerts = [store_alert(connection, account=f"m-{i:05d}") for i in range(count)]
        return enqueue_alerts(connection, settings, alerts)


def test_two_concurrent_workers_never_send_a_row_twice(pg_url, receiver):
    hook = receiver(default=("sleep", 0.01)).start()
    settings = delivery_settings(pg_url, delivery_batch_size=4, delivery_concurrency=2)
    setup = make_engine(pg_url)
    ids = _fill(setup, settings, hook.url, 60)
    engines = [make_engine(pg_url), make_engine(pg_url)]  # two "processes"
    start = threading.Barrier(2)
    errors = []
    attempted = Counter()

    def work(engine):
        try:
            start.wait()
            for _ in range(100):
                with engine.connect() as connection:
                    left = connection.execute(
                        select(deliveries.c.id).where(deliveries.c.status == "pending")
                    ).first()
                if left is None:
                    return
                attempted[id(engine)] += deliver_due(engine, settings).attempted
        except Exception as error:  # surfaced below
            errors.append(error)

    threads = [threading.Thread(target=work, args=(e,)) for e in engines]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(120)
    assert errors == []
    assert len(attempted) == 2 and sum(attempted.values()) == 60  # both workers took rows
    sent = Counter(r.headers["webhook-id"] for r in hook.received)
    assert set(sent) == set(ids) and max(sent.values()) == 1
    with setup.connect() as connection:
        rows = connection.execute(select(deliveries.c.status, deliveries.c.attempts)).all()
    assert {(s, a) for s, a in rows} == {("delivered", 1)}
    for engine in (*engines, setup):
        engine.dispose()


def test_claim_skips_rows_another_worker_holds(pg_url):
    settings = delivery_settings(pg_url, delivery_batch_size=100)
    setup = make_engine(pg_url)
    ids = _fill(setup, settings, "http://127.0.0.1:9/hook", 10)
    other = make_engine(pg_url)
    with setup.connect() as holder:
        with holder.begin():
            held = (
                holder.execute(
                    select(deliveries.c.id)
                    .order_by(deliveries.c.id)
                    .limit(4)
                    .with_for_update(skip_locked=True)
                )
                .scalars()
                .all()
            )
            # Skips the locked rows at once instead of waiting (statement_timeout would fail it).
            claimed = [c.delivery_id for c in claim_due(other, settings, now_us())]
    assert len(held) == 4 and set(claimed) == set(ids) - set(held)
    setup.dispose()
    other.dispose()
