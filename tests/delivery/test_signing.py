"""Standard Webhooks signatures: the published test vector, the reference verifier, rotation."""

from __future__ import annotations

import base64
from datetime import UTC, datetime

import pytest
from sqlalchemy import select
from standardwebhooks.webhooks import Webhook, WebhookVerificationError

from rolewatch.delivery.outbox import enqueue_alerts
from rolewatch.delivery.signing import BadSecret, new_secret, sign, signature_header
from rolewatch.delivery.subscriptions import create_subscription, rotate_secret
from rolewatch.delivery.worker import deliver_due
from rolewatch.store.db import write_transaction
from rolewatch.store.schema import subscriptions

from .conftest import now_us


def test_sign_matches_the_standard_webhooks_test_vector():
    # Source: the Standard Webhooks specification's reference test vector, in
    # github.com/standard-webhooks/standard-webhooks, libraries/python/tests/test_webhooks.py,
    # test_sign_function (secret, msg id, timestamp 1614265330, payload, expected signature).
    secret = "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw"
    body = b'{"test": 2432232314}'
    expected = "v1,g0hM9SsE+OTPJTGt/tmIKtSyZlE3uFJELVlNIOLJ1OE="
    assert sign(secret, "msg_p5jXN8AQM9LWM0D4loKWxJek", 1614265330, body) == expected
    # A one-byte change of body, id or time changes the signature.
    assert sign(secret, "msg_p5jXN8AQM9LWM0D4loKWxJek", 1614265330, body + b" ") != expected
    assert sign(secret, "msg_p5jXN8AQM9LWM0D4loKWxJeK", 1614265330, body) != expected
    assert sign(secret, "msg_p5jXN8AQM9LWM0D4loKWxJek", 1614265331, body) != expected


def test_signatures_verify_with_the_reference_package():
    # Reference: the `standardwebhooks` PyPI package (Standard Webhooks' own Python library).
    secret = new_secret()
    body = '{"type":"alert.raised","data":{"account":"m-00042","note":"ünïcode ✓"}}'.encode()
    timestamp = int(datetime.now(UTC).timestamp())
    headers = {
        "webhook-id": "msg_01TESTTESTTESTTESTTESTTES",
        "webhook-timestamp": str(timestamp),
        "webhook-signature": sign(secret, "msg_01TESTTESTTESTTESTTESTTES", timestamp, body),
    }
    assert Webhook(secret).verify(body, headers)["data"]["account"] == "m-00042"
    with pytest.raises(WebhookVerificationError):
        Webhook(secret).verify(body.replace(b"42", b"43"), headers)
    with pytest.raises(WebhookVerificationError):
        Webhook(new_secret()).verify(body, headers)


def test_new_secrets_are_whsec_base64_of_32_random_bytes():
    made = {new_secret() for _ in range(20)}
    assert len(made) == 20
    for secret in made:
        assert secret.startswith("whsec_")
        assert len(base64.b64decode(secret[len("whsec_") :], validate=True)) == 32
    with pytest.raises(BadSecret):
        sign("whsec_not base64!", "msg_1", 1, b"x")


def test_rotation_sends_both_signatures_during_the_overlap(engine, settings, receiver, make_alert):
    hook = receiver().start()
    t = now_us()
    with write_transaction(engine) as connection:
        made = create_subscription(connection, settings, url=hook.url, now_us=t)
        sub_id = made.subscription["id"]
        rotated = rotate_secret(connection, sub_id, settings, now_us=t)
    assert rotated.secret != made.secret
    assert rotated.subscription["rotating_until"] is not None
    alert = make_alert()
    with write_transaction(engine) as connection:
        enqueue_alerts(connection, settings, [alert], now_us=t)
    deliver_due(engine, settings, now_us=t + 1_000_000)
    [request] = hook.received
    signatures = request.headers["webhook-signature"].split(" ")
    assert len(signatures) == 2 and all(s.startswith("v1,") for s in signatures)
    # Receivers holding either secret accept the message (reference: `standardwebhooks`).
    assert Webhook(made.secret).verify(request.body, request.headers)["type"] == "alert.raised"
    assert Webhook(rotated.secret).verify(request.body, request.headers)["type"] == "alert.raised"

    # After the overlap only the new secret signs.
    overlap_us = int(settings.secret_overlap.total_seconds() * 1_000_000)
    alert = make_alert(account="m-00043")
    with write_transaction(engine) as connection:
        enqueue_alerts(connection, settings, [alert], now_us=t)
    deliver_due(engine, settings, now_us=t + overlap_us + 1)
    later = hook.received[-1]
    assert len(later.headers["webhook-signature"].split(" ")) == 1
    assert Webhook(rotated.secret).verify(later.body, later.headers)
    with pytest.raises(WebhookVerificationError):
        Webhook(made.secret).verify(later.body, later.headers)
    with engine.connect() as connection:
        row = connection.execute(select(subscriptions).where(subscriptions.c.id == sub_id)).one()
    assert row.secret == rotated.secret


def test_signature_header_joins_one_signature_per_secret():
    first, second = new_secret(), new_secret()
    header = signature_header([first, second], "msg_x", 1700000000, b"{}")
    assert header.split(" ") == [
        sign(first, "msg_x", 1700000000, b"{}"),
        sign(second, "msg_x", 1700000000, b"{}"),
    ]
