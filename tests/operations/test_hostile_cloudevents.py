"""CloudEvents ingest over real HTTP, with events made by the CloudEvents Python SDK (the
``cloudevents`` package, CNCF): structured and batched content modes of the HTTP binding
(CloudEvents spec v1.0.2, HTTP Protocol Binding section 3.2) in the JSON event format
(v1.0.2), the documented mapping, and the same per-event rules as any other event."""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta

import sqlalchemy as sa
from cloudevents.core.bindings.http import from_structured, to_structured
from cloudevents.core.formats.json import JSONFormat
from cloudevents.core.v1.event import CloudEvent

from rolewatch.api.cloudevents import event_id

SOURCE = "/fictional/harbour-market/orders"


def _event(ce_id: str, data: dict | bytes | None, **attributes) -> CloudEvent:
    base = {
        "id": ce_id,
        "source": SOURCE,
        "type": "order.paid",
        "time": datetime.now(UTC) - timedelta(hours=1),
        "datacontenttype": "application/json",
    }
    return CloudEvent({**base, **attributes}, data)


def _post(live, body: bytes, content_type: str):
    return live.request(
        "POST", "/v1/events", "ingest", content=body, headers={"Content-Type": content_type}
    )


def _batch(*events: CloudEvent) -> bytes:
    """A JSON batch (JSON event format v1.0.2, section 4): an array of events, each written
    by the SDK's JSON format."""
    return b"[" + b",".join(JSONFormat().write(event) for event in events) + b"]"


def _stored(live, event_ids: list[str]) -> dict[str, tuple]:
    engine = sa.create_engine(live.database_url)
    try:
        with engine.connect() as connection:
            rows = connection.execute(
                sa.text(
                    "SELECT event_id, actor, target, kind, weight FROM events "
                    "WHERE event_id IN :ids"
                ).bindparams(sa.bindparam("ids", expanding=True)),
                {"ids": event_ids},
            ).all()
    finally:
        engine.dispose()
    return {row[0]: tuple(row[1:]) for row in rows}


def test_a_structured_event_is_stored_by_the_mapping(live):
    event = _event("order-1", {"target": "m-ce-shop", "weight": 12.5}, subject="m-ce-buyer")
    message = to_structured(event, JSONFormat())  # the SDK's structured mode
    assert message.headers["content-type"] == "application/cloudevents+json"
    response = _post(live, message.body, message.headers["content-type"])
    assert response.status_code == 202, response.text
    assert response.json()["accepted"] == 1
    stored_id = event_id(SOURCE, "order-1")
    assert _stored(live, [stored_id]) == {
        stored_id: ("m-ce-buyer", "m-ce-shop", "order.paid", 12.5)
    }
    # The same event again is a duplicate (id + source identify it, spec section 3.1.1).
    again = _post(live, message.body, message.headers["content-type"]).json()
    assert (again["accepted"], again["duplicates"]) == (0, 1)


def test_a_batch_is_checked_event_by_event(live):
    old = datetime.now(UTC) - timedelta(days=800)
    events = [
        _event("b-good", {"actor": "m-ce-a", "target": "m-ce-b"}),  # data.actor, weight 1
        _event("b-no-target", {"actor": "m-ce-a"}),
        _event("b-binary", b"\x00\x01"),  # data_base64: not read
        _event("b-old", {"actor": "m-ce-a", "target": "m-ce-b"}, time=old),
        _event("b-lookalike", {"target": "m-ce-b"}, subject="m-ce-\u200ba"),
        _event("b-no-actor", {"target": "m-ce-b"}),
        _event("b-good-2", {"target": "m-ce-b", "weight": 3}, subject="m-ce-c"),
    ]
    body = _batch(*events)
    response = _post(live, body, "application/cloudevents-batch+json")
    assert response.status_code == 202, response.text
    result = response.json()
    reasons = {item["index"]: item["error"] for item in result["rejected"]}
    assert result["accepted"] == 2 and sorted(reasons) == [1, 2, 3, 4, 5]
    assert reasons[1] == "target: required"
    assert "data_base64" in reasons[2]
    assert "max_event_age" in reasons[3]
    assert "U+200B" in reasons[4]
    assert "subject" in reasons[5]
    # A raw batch item that is no CloudEvent at all, and one of another spec version.
    raw = json.loads(body)
    raw[0] = {**raw[0], "specversion": "0.3"}
    raw[1] = "not an object"
    second = _post(live, json.dumps(raw).encode(), "application/cloudevents-batch+json").json()
    reasons = {item["index"]: item["error"] for item in second["rejected"]}
    assert "specversion" in reasons[0] and "JSON object" in reasons[1]
    # Same source and id, other content: a conflict, the stored event kept.
    changed = _event("b-good-2", {"target": "m-ce-b", "weight": 4}, subject="m-ce-c")
    third = _post(live, _batch(changed), "application/cloudevents-batch+json").json()
    assert [item["index"] for item in third["conflicts"]] == [0]
    stored = _stored(live, [event_id(SOURCE, "b-good"), event_id(SOURCE, "b-good-2")])
    assert sorted(stored.values()) == [
        ("m-ce-a", "m-ce-b", "order.paid", 1.0),
        ("m-ce-c", "m-ce-b", "order.paid", 3.0),
    ]


def test_binary_mode_and_wrong_shapes_are_refused_whole(live):
    structured = to_structured(_event("shape-1", {"target": "m-b"}, subject="m-a"), JSONFormat())
    binary = live.request(
        "POST",
        "/v1/events",
        "ingest",
        content=b'{"target": "m-b"}',
        headers={
            "Content-Type": "application/json",
            "ce-specversion": "1.0",
            "ce-id": "x",
            "ce-source": SOURCE,
            "ce-type": "order.paid",
        },
    )
    assert binary.status_code == 415 and "structured" in binary.json()["detail"]
    as_batch = _post(live, structured.body, "application/cloudevents-batch+json")
    assert as_batch.status_code == 400 and "array" in as_batch.json()["detail"]
    as_one = _post(live, _batch(_event("shape-2", {})), "application/cloudevents+json")
    assert as_one.status_code == 400 and "one JSON object" in as_one.json()["detail"]


def test_the_readme_example_is_a_valid_cloudevent():
    """The README's example, read back by the SDK (which validates the v1.0 attributes)."""
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    example = readme.split("```json cloudevent\n", 1)[1].split("```", 1)[0]
    from cloudevents.core.bindings.http import HTTPMessage

    message = HTTPMessage({"content-type": "application/cloudevents+json"}, example.encode())
    event = from_structured(message, JSONFormat(), CloudEvent)
    assert event.get_specversion() == "1.0" and event.get_data()["target"]
