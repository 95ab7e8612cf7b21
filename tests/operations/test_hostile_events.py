"""Hostile events over real HTTP: each bad event is rejected on its own with a reason and the
good one beside it is stored; nothing makes the batch fail with a 5xx.

Rules checked (README "Posting events"): times are RFC 3339 in ASCII digits, no older than
``max_event_age`` and never before 1970-01-01T00:00:00Z; ids hold no control, format or
line/paragraph separator characters (Unicode general categories Cc, Cf, Zl, Zp) and do not
start or end with whitespace; an id reused with other content is a ``conflict``; a JSON body
names ``events`` once.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta

import pytest
import sqlalchemy as sa

from .hostile import recent

FULL_WIDTH = str.maketrans("0123456789", "０１２３４５６７８９")


def _post(live, events, **kwargs):
    return live.request("POST", "/v1/events", "ingest", json={"events": events}, **kwargs)


def _event(actor: str, target: str = "m-target", **fields) -> dict:
    return {"time": recent(), "actor": actor, "target": target, **fields}


def _stored(live, sql: str, **params):
    engine = sa.create_engine(live.database_url)
    try:
        with engine.connect() as connection:
            return connection.execute(sa.text(sql), params).all()
    finally:
        engine.dispose()


def _reasons(body: dict) -> dict[int, str]:
    return {item["index"]: item["error"] for item in body["rejected"]}


def test_old_and_unrepresentable_times_are_rejected_one_by_one(live):
    two_years_ago = (datetime.now(UTC) - timedelta(days=730)).strftime("%Y-%m-%dT%H:%M:%SZ")
    batch = [
        _event("m-time-good", id="time-good"),
        _event("m-time-1970", time="1970-01-01T00:00:00Z"),
        _event("m-time-year1", time="0001-01-01T00:00:00Z"),
        # No id: the derived id needs the UTC time, which is before year 1 (the review's 500).
        _event("m-time-year0", time="0001-01-01T00:00:00+00:01"),
        _event("m-time-old", time=two_years_ago),
        _event("m-time-wide", time=recent().translate(FULL_WIDTH)),
    ]
    response = _post(live, batch)
    assert response.status_code == 202, response.text
    body = response.json()
    assert body["accepted"] == 1
    reasons = _reasons(body)
    assert sorted(reasons) == [1, 2, 3, 4, 5]
    for index in (1, 2, 3, 4):
        assert "max_event_age" in reasons[index], reasons[index]
    assert "RFC 3339" in reasons[5]
    assert _stored(live, "SELECT event_id FROM events WHERE actor LIKE 'm-time-%'") == [
        ("time-good",)
    ]


LOOK_ALIKES = [
    "\u202e04220-m",  # RIGHT-TO-LEFT OVERRIDE (Cf): shows as "m-02240"
    "m-0\u200b2240",  # ZERO WIDTH SPACE (Cf)
    "m-02240\u00a0",  # trailing NO-BREAK SPACE (Zs, whitespace)
    "\ufeffm-02240",  # BYTE ORDER MARK (Cf)
    " m-02240",  # leading space
    "   ",  # whitespace only
    "m-02\u2028240",  # LINE SEPARATOR (Zl)
    "m-02\u2029240",  # PARAGRAPH SEPARATOR (Zp)
    "m-0\u00ad2240",  # SOFT HYPHEN (Cf)
    "m-02240\u2066",  # LEFT-TO-RIGHT ISOLATE (Cf)
]


def test_look_alike_account_ids_are_rejected(live):
    batch = [_event("m-02240", id="look-real")]
    batch += [_event(actor, id=f"look-{n}") for n, actor in enumerate(LOOK_ALIKES)]
    batch += [
        _event("m-look-ok", target="café 12", id="look-inner-space"),  # inner space, accent
        _event("m-look-ok", target="m-look-t", id="look\u200bid"),  # event id: same rule
        _event("m-look-ok", target="m-look-t", kind="pay\u202ement"),  # kind: same rule
    ]
    response = _post(live, batch)
    assert response.status_code == 202, response.text
    body = response.json()
    reasons = _reasons(body)
    assert sorted(reasons) == [*range(1, len(LOOK_ALIKES) + 1), len(batch) - 2, len(batch) - 1]
    assert "U+202E" in reasons[1] and "U+200B" in reasons[2]
    assert "whitespace" in reasons[3] and "whitespace" in reasons[6]
    assert body["accepted"] == 2
    stored = _stored(live, "SELECT actor, target FROM events WHERE event_id LIKE 'look-%'")
    assert sorted(stored) == [("m-02240", "m-target"), ("m-look-ok", "café 12")]


def test_an_id_reused_with_other_content_is_a_conflict(live):
    first = _event("m-conflict-a", id="conflict-1", weight=2)
    assert _post(live, [first]).json()["accepted"] == 1
    again = _post(live, [first]).json()
    assert again["duplicates"] == 1 and again["conflicts"] == []
    changed = {**first, "actor": "m-conflict-b"}
    same_batch = [
        _event("m-conflict-c", id="conflict-2"),
        _event("m-conflict-d", id="conflict-2"),
    ]
    response = _post(live, [changed, *same_batch])
    assert response.status_code == 202
    body = response.json()
    assert body["accepted"] == 1 and body["duplicates"] == 0
    conflicts = {item["index"]: item["error"] for item in body["conflicts"]}
    assert sorted(conflicts) == [0, 2]
    assert "conflict-1" in conflicts[0] and "actor" in conflicts[0]
    stored = _stored(
        live, "SELECT event_id, actor FROM events WHERE event_id LIKE 'conflict-%' ORDER BY 1"
    )
    assert stored == [("conflict-1", "m-conflict-a"), ("conflict-2", "m-conflict-c")]


@pytest.mark.parametrize("second_key", ['"events"', '"\\u0065vents"', '"event\\u0073"'])
def test_a_repeated_events_key_is_refused(live, second_key):
    one = json.dumps([_event("m-repeat-a", id="repeat-a")])
    two = json.dumps([_event("m-repeat-b", id="repeat-b")])
    body = f'{{"events": {one}, {second_key}: {two}}}'
    response = live.request(
        "POST",
        "/v1/events",
        "ingest",
        content=body.encode(),
        headers={"Content-Type": "application/json"},
    )
    assert response.status_code == 400, response.text
    assert "events" in response.json()["detail"] and "once" in response.json()["detail"]
    assert _stored(live, "SELECT count(*) FROM events WHERE actor LIKE 'm-repeat-%'") == [(0,)]


def test_kind_named_events_is_not_a_repeated_key(live):
    response = _post(live, [_event("m-kind-events", kind="events", id="kind-events")])
    assert response.status_code == 202 and response.json()["accepted"] == 1
