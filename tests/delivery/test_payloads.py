"""Payload formats and the outbox: json and text bodies, chat safety, subscription filters."""

from __future__ import annotations

import json
from datetime import datetime

import pytest
from sqlalchemy import select

from rolewatch.delivery.outbox import enqueue_alerts, enqueue_test
from rolewatch.delivery.payloads import REVIEW_LINE, TEXT_LIMIT, text_summary
from rolewatch.delivery.subscriptions import create_subscription, delete_subscription
from rolewatch.delivery.worker import deliver_due
from rolewatch.store.db import write_transaction
from rolewatch.store.schema import deliveries

from .conftest import now_us

HOSTILE = "@everyone <!channel> <@U024BE7LH> <!here|here> \x07bell\x1b[31m \u202eevil\u200b"


def subscribe(engine, settings, url, **kwargs):
    with write_transaction(engine) as connection:
        return create_subscription(connection, settings, url=url, now_us=now_us(), **kwargs)


def enqueue(engine, settings, alerts):
    with write_transaction(engine) as connection:
        return enqueue_alerts(connection, settings, alerts)


def test_json_body_is_the_alert_in_api_form(engine, settings, receiver, make_alert):
    hook = receiver().start()
    subscribe(engine, settings, hook.url)
    alert = make_alert()
    enqueue(engine, settings, [alert])
    deliver_due(engine, settings)
    [request] = hook.received
    assert request.headers["content-type"] == "application/json"
    document = json.loads(request.body)
    assert set(document) == {"type", "timestamp", "data"}
    assert document["type"] == "alert.raised"
    assert document["data"] == alert
    # RFC 3339 with a Z offset; Python's parser reads it (common practice, no source).
    assert document["timestamp"].endswith("Z")
    assert datetime.fromisoformat(document["timestamp"].replace("Z", "+00:00")).tzinfo


def test_text_delivery_is_accepted_by_a_chat_style_receiver(engine, settings, receiver, make_alert):
    chat = receiver(chat=True).start()
    subscribe(engine, settings, chat.url, fmt="text")
    subscribe(engine, settings, chat.url, fmt="json")
    enqueue(engine, settings, [make_alert()])
    deliver_due(engine, settings)
    [text_request] = [r for r in chat.received if set(json.loads(r.body)) == {"text"}]
    [json_request] = [r for r in chat.received if "data" in json.loads(r.body)]
    assert text_request.status == 200
    assert json_request.status == 400  # the receiver really rejects other shapes
    text = json.loads(text_request.body)["text"]
    # the headline of the API form: both roles and what moved
    assert "m-00042" in text and "quiet buyer → busy payer: sends to 2 → 37 accounts" in text
    assert "Score 0.73" in text
    assert "https://rolewatch.example/accounts/m-00042" in text
    assert REVIEW_LINE in text


def test_text_neutralises_mentions_markup_and_control_characters(make_alert):
    alert = make_alert(
        account=HOSTILE,
        evidence_extra={
            "page_url": f"https://rolewatch.example/accounts/{HOSTILE}",
            "feature_moves": [{"feature": "<@U1> total_weight", "before": 1.0, "after": 2.0}],
        },
    )
    alert["role_after"] = {"id": 3, "name": "@here " + "x" * 5000}
    text = text_summary(alert)
    assert "@" not in text and "<" not in text and ">" not in text
    assert not any(ord(ch) < 0x20 and ch != "\n" for ch in text)
    assert "\u202e" not in text and "\u200b" not in text and "\x1b" not in text
    assert "＠everyone" in text  # the id is still readable, as data
    assert len(text) <= TEXT_LIMIT and text.endswith(REVIEW_LINE)
    assert "https://rolewatch.example/accounts/%40everyone" in text


def test_test_alert_is_clearly_marked(engine, settings, receiver):
    hook = receiver().start()
    chat = receiver(chat=True).start()
    json_sub = subscribe(engine, settings, hook.url, min_score=0.99, roles=[42])
    text_sub = subscribe(engine, settings, chat.url, fmt="text")
    with write_transaction(engine) as connection:
        enqueue_test(connection, settings, json_sub.subscription["id"], now_us=now_us())
        enqueue_test(connection, settings, text_sub.subscription["id"], now_us=now_us())
    deliver_due(engine, settings)
    document = json.loads(hook.received[0].body)
    assert document["type"] == "alert.test" and document["data"]["evidence"]["test"] is True
    text = json.loads(chat.received[0].body)["text"]
    assert text.startswith("TEST") and chat.received[0].status == 200


def test_outbox_filters_by_score_roles_and_deletion(engine, settings, make_alert):
    everything = subscribe(engine, settings, "http://127.0.0.1:9/all")
    strong = subscribe(engine, settings, "http://127.0.0.1:9/strong", min_score=0.8)
    role_three = subscribe(engine, settings, "http://127.0.0.1:9/r3", roles=[3, 5])
    gone = subscribe(engine, settings, "http://127.0.0.1:9/gone")
    with write_transaction(engine) as connection:
        delete_subscription(connection, gone.subscription["id"], now_us=now_us())
    weak_to_3 = make_alert(score=0.6, role_after=3)
    strong_to_4 = make_alert(account="m-2", score=0.9, role_after=4)
    enqueue(engine, settings, [weak_to_3, strong_to_4])
    with engine.connect() as connection:
        rows = connection.execute(select(deliveries.c.subscription_id, deliveries.c.alert_id)).all()
    got = {(s, a) for s, a in rows}
    assert got == {
        (everything.subscription["id"], weak_to_3["id"]),
        (everything.subscription["id"], strong_to_4["id"]),
        (strong.subscription["id"], strong_to_4["id"]),
        (role_three.subscription["id"], weak_to_3["id"]),
    }


def test_enqueue_joins_the_callers_transaction(engine, settings, make_alert):
    subscribe(engine, settings, "http://127.0.0.1:9/all")
    alert = make_alert()
    try:
        with write_transaction(engine) as connection:
            assert len(enqueue_alerts(connection, settings, [alert])) == 1
            raise RuntimeError("the window's transaction fails")
    except RuntimeError:
        pass
    with engine.connect() as connection:
        assert connection.execute(select(deliveries)).all() == []


@pytest.mark.parametrize(
    "account, shown",
    [
        ("[Verify now](https://verify.example.test/login)", None),
        ("*m-1* _x_ # y", None),
        ("m`1", None),
        ("``m-2``", None),
        ("`", None),
        (" m-3", "‹U+0020›m-3"),  # stored before the ingest rule: the edge space made visible
        ("m-0\u200b2240", "m-0‹U+200B›2240"),
        ("m-02240\u00a0", "m-02240‹U+00A0›"),
        ("\u202e04220-m", "‹U+202E›04220-m"),
    ],
)
def test_account_ids_are_one_code_span_in_commonmark(make_alert, account, shown):
    """The account line parsed by markdown-it-py, a CommonMark 0.31 reference parser: the
    id is exactly one inline code span whose content is the (visible) id, and no link."""
    from markdown_it import MarkdownIt

    text = text_summary(make_alert(account=account))
    line = next(line for line in text.splitlines() if line.startswith("Role change"))
    tokens = MarkdownIt("commonmark").parseInline(line)[0].children
    codes = [token.content for token in tokens if token.type == "code_inline"]
    assert codes == [shown or account]
    assert not any(token.type in ("link_open", "em_open", "strong_open") for token in tokens)
