"""The delivery worker against real HTTP receivers on loopback and a real SQLite file."""

from __future__ import annotations

import json

from sqlalchemy import select
from standardwebhooks.webhooks import Webhook

from rolewatch.delivery.outbox import enqueue_alerts
from rolewatch.delivery.subscriptions import create_subscription
from rolewatch.delivery.worker import backoff_seconds, deliver_due
from rolewatch.store.db import make_engine, write_transaction
from rolewatch.store.schema import deliveries, delivery_attempts, subscriptions

from .conftest import now_us

HOUR_US = 3_600_000_000


def subscribe(engine, settings, url, **kwargs):
    with write_transaction(engine) as connection:
        return create_subscription(connection, settings, url=url, now_us=now_us(), **kwargs)


def enqueue(engine, settings, alerts):
    with write_transaction(engine) as connection:
        return enqueue_alerts(connection, settings, alerts)


def delivery(engine, delivery_id):
    with engine.connect() as connection:
        row = connection.execute(select(deliveries).where(deliveries.c.id == delivery_id)).one()
        tries = connection.execute(
            select(delivery_attempts)
            .where(delivery_attempts.c.delivery_id == delivery_id)
            .order_by(delivery_attempts.c.id)
        ).all()
    return row, tries


def subscription_row(engine, sub_id):
    with engine.connect() as connection:
        return connection.execute(select(subscriptions).where(subscriptions.c.id == sub_id)).one()


def verify(secret, request):
    """Verify one received request with the Standard Webhooks reference package
    (`standardwebhooks` on PyPI, from github.com/standard-webhooks/standard-webhooks)."""
    return Webhook(secret).verify(request.body, request.headers)


def test_receiver_down_then_up_delivers_once_acknowledged(engine, settings, receiver, make_alert):
    hook = receiver()  # not started: the port refuses connections
    made = subscribe(engine, settings, hook.url)
    [delivery_id] = enqueue(engine, settings, [make_alert()])
    t = now_us()

    report = deliver_due(engine, settings, now_us=t)
    assert (report.attempted, report.delivered, report.retrying) == (1, 0, 1)
    row, tries = delivery(engine, delivery_id)
    assert row.status == "pending" and row.next_attempt_us > t
    assert "could not connect" in tries[0].error

    # Not due yet: nothing is sent before the backoff has passed.
    assert deliver_due(engine, settings, now_us=t + 1).attempted == 0

    hook.start()
    report = deliver_due(engine, settings, now_us=row.next_attempt_us)
    assert report.delivered == 1
    row, tries = delivery(engine, delivery_id)
    assert row.status == "delivered" and row.attempts == 2
    assert [a.status_code for a in tries] == [None, 200]
    assert len(hook.received) == 1
    assert verify(made.secret, hook.received[0])["type"] == "alert.raised"

    # Acknowledged: later runs send nothing more.
    assert deliver_due(engine, settings, now_us=t + 10 * HOUR_US).attempted == 0
    assert len(hook.received) == 1


def test_500_then_timeout_then_200_keeps_the_webhook_id_and_bytes(
    engine, settings, receiver, make_alert
):
    hook = receiver(script=[500, ("sleep", 2.5), 200]).start()
    made = subscribe(engine, settings, hook.url)
    [delivery_id] = enqueue(engine, settings, [make_alert()])
    t = now_us()
    for step in range(3):
        deliver_due(engine, settings, now_us=t + step * HOUR_US)
    row, tries = delivery(engine, delivery_id)
    assert row.status == "delivered" and row.attempts == 3
    assert [a.status_code for a in tries] == [500, None, 200]
    assert tries[0].error.startswith("HTTP 500")
    assert len(tries[0].error) < 300  # only a short snippet of the 1,700-byte answer is kept
    assert "timed out" in tries[1].error
    ids = {r.headers["webhook-id"] for r in hook.received}
    assert ids == {delivery_id} and delivery_id.startswith("msg_")
    assert len({r.body for r in hook.received}) == 1  # identical bytes on every retry
    assert verify(made.secret, hook.received[-1])["data"]["account"] == "m-00042"


def test_pending_deliveries_survive_a_restart(db_url, settings, receiver, make_alert, engine):
    hook = receiver().start()
    subscribe(engine, settings, hook.url)
    enqueue(engine, settings, [make_alert(account="m-00001"), make_alert(account="m-00002")])
    engine.dispose()  # the service stops before sending anything

    restarted = make_engine(db_url)
    try:
        report = deliver_due(restarted, settings)
        assert report.delivered == 2
        accounts = sorted(json.loads(r.body)["data"]["account"] for r in hook.received)
        assert accounts == ["m-00001", "m-00002"]
    finally:
        restarted.dispose()


def test_gone_pauses_the_subscription_at_once(engine, settings, receiver, make_alert):
    hook = receiver(default=410).start()
    made = subscribe(engine, settings, hook.url)
    [first, second] = enqueue(engine, settings, [make_alert(), make_alert(account="m-00007")])
    report = deliver_due(engine, settings)
    assert report.paused == [made.subscription["id"]]
    sub = subscription_row(engine, made.subscription["id"])
    assert sub.paused and "410" in sub.paused_reason
    assert len(hook.received) == 1  # the other delivery is held, not sent
    sent = hook.received[0].headers["webhook-id"]
    held = second if sent == first else first
    held_row, held_tries = delivery(engine, held)
    assert held_row.status == "pending" and held_row.attempts == 0 and held_tries == []
    _, tries = delivery(engine, sent)
    assert tries[0].status_code == 410
    # While paused nothing goes out, however late it is.
    assert deliver_due(engine, settings, now_us=now_us() + 100 * HOUR_US).attempted == 0


def test_pause_after_consecutive_failures(db_url, engine, receiver, make_alert):
    from .conftest import delivery_settings

    settings = delivery_settings(db_url, subscription_pause_after=2, delivery_max_attempts=10)
    hook = receiver(default=503).start()
    made = subscribe(engine, settings, hook.url)
    enqueue(engine, settings, [make_alert()])
    t = now_us()
    deliver_due(engine, settings, now_us=t)
    assert not subscription_row(engine, made.subscription["id"]).paused
    deliver_due(engine, settings, now_us=t + HOUR_US)
    sub = subscription_row(engine, made.subscription["id"])
    assert sub.paused and sub.consecutive_failures == 2
    assert "2 consecutive failed attempts" in sub.paused_reason


def test_marked_failed_after_max_attempts(db_url, engine, receiver, make_alert):
    from .conftest import delivery_settings

    settings = delivery_settings(db_url, delivery_max_attempts=3)
    hook = receiver(default=500).start()
    subscribe(engine, settings, hook.url)
    [delivery_id] = enqueue(engine, settings, [make_alert()])
    t = now_us()
    for step in range(5):
        deliver_due(engine, settings, now_us=t + step * 7 * HOUR_US)
    row, tries = delivery(engine, delivery_id)
    assert row.status == "failed" and row.attempts == 3 and len(tries) == 3
    assert len(hook.received) == 3


def test_redirects_are_not_followed(engine, settings, receiver, make_alert):
    target = receiver().start()
    hook = receiver(default=("redirect", target.url)).start()
    subscribe(engine, settings, hook.url)
    [delivery_id] = enqueue(engine, settings, [make_alert()])
    deliver_due(engine, settings)
    row, tries = delivery(engine, delivery_id)
    assert row.status == "pending" and tries[0].status_code == 302
    assert "redirect 302" in tries[0].error and "not followed" in tries[0].error
    assert target.received == []


def test_send_time_check_refuses_a_url_no_longer_allowed(
    db_url, engine, settings, receiver, make_alert
):
    from .conftest import delivery_settings

    hook = receiver().start()
    subscribe(engine, settings, hook.url)
    [delivery_id] = enqueue(engine, settings, [make_alert()])
    stricter = delivery_settings(db_url, webhook_allow_hosts=[])  # operator removed the allow-list
    deliver_due(engine, stricter)
    _, tries = delivery(engine, delivery_id)
    assert "loopback" in tries[0].error and tries[0].error.startswith("not sent")
    assert hook.received == []


def test_backoff_doubles_with_jitter_and_is_capped():
    import random

    rng = random.Random(7)
    delays = [backoff_seconds(n, 30, rng=rng) for n in range(1, 16)]
    for n, delay in enumerate(delays[:8], start=1):
        assert 0.8 * 30 * 2 ** (n - 1) <= delay <= 1.2 * 30 * 2 ** (n - 1)
    assert max(delays) == 6 * 3600 and delays[-1] == 6 * 3600
    assert len(set(round(d, 6) for d in delays[:8])) == 8


def test_total_timeout_cuts_off_a_receiver_that_trickles(engine, settings, receiver, make_alert):
    # Each header byte comes within the per-read timeout, but the whole answer would take 5 s;
    # the total delivery_timeout (1 s here) still ends the attempt.
    hook = receiver(script=[("trickle", 5)]).start()
    subscribe(engine, settings, hook.url)
    [delivery_id] = enqueue(engine, settings, [make_alert()])
    deliver_due(engine, settings)
    _, tries = delivery(engine, delivery_id)
    assert "total timeout of 1s" in tries[0].error
    assert tries[0].duration_ms < 3000


def test_claims_never_print_secrets_or_urls(engine, settings, make_alert):
    from rolewatch.delivery.worker import claim_due

    made = subscribe(engine, settings, "http://127.0.0.1:9/hook/token-in-path")
    enqueue(engine, settings, [make_alert()])
    [claim] = claim_due(engine, settings, now_us())
    assert claim.secrets == (made.secret,)
    shown = repr(claim)
    assert made.secret[6:] not in shown and "token-in-path" not in shown


def test_store_records_never_print_secrets_or_urls(engine, settings, make_alert):
    from rolewatch.store.outbox import claim_due as claim_rows
    from rolewatch.store.subscriptions import find_live_subscription

    made = subscribe(engine, settings, "http://127.0.0.1:9/hook/token-in-path")
    enqueue(engine, settings, [make_alert()])
    with write_transaction(engine) as connection:
        record = find_live_subscription(connection, made.subscription["id"])
        [row] = claim_rows(connection, now_us=now_us(), limit=10, lease_until_us=now_us())
    assert record is not None and record.secret == made.secret == row.secret
    for shown in (repr(record), repr(row)):
        assert made.secret[6:] not in shown and "token-in-path" not in shown


def test_two_workers_on_one_sqlite_file_never_send_a_row_twice(
    db_url, settings, receiver, make_alert, engine
):
    import threading
    from collections import Counter

    hook = receiver(default=("sleep", 0.01)).start()
    subscribe(engine, settings, hook.url)
    ids = enqueue(engine, settings, [make_alert(account=f"m-{i:05d}") for i in range(30)])
    from .conftest import delivery_settings

    small = delivery_settings(db_url, delivery_batch_size=3, delivery_concurrency=2)
    engines = [make_engine(db_url), make_engine(db_url)]
    errors = []

    def work(worker_engine):
        try:
            for _ in range(50):
                if deliver_due(worker_engine, small).attempted == 0:
                    return
        except Exception as error:  # surfaced below
            errors.append(error)

    threads = [threading.Thread(target=work, args=(e,)) for e in engines]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(120)
    assert errors == []
    sent = Counter(r.headers["webhook-id"] for r in hook.received)
    assert set(sent) == set(ids) and max(sent.values()) == 1
    for worker_engine in engines:
        worker_engine.dispose()
