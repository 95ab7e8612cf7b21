"""POST /v1/events over HTTP against the real app on a real database (SQLite, PostgreSQL)."""

from __future__ import annotations

import hashlib
import json
import time
from datetime import UTC, datetime

import pytest
import sqlalchemy as sa

from rolewatch.clock import now_micros
from rolewatch.store.events import FIELDS, derived_event_id, parse_time_us
from rolewatch.store.schema import events as events_table
from rolewatch.store.schema import service_state, windows


def post(app, events, scope="ingest"):
    return app.client.post("/v1/events", json={"events": events}, headers=app.headers(scope))


def stored(app) -> list:
    with app.engine.connect() as connection:
        return connection.execute(
            sa.select(
                events_table.c.event_id,
                events_table.c.time_us,
                events_table.c.actor,
                events_table.c.target,
                events_table.c.kind,
                events_table.c.weight,
                events_table.c.late,
            ).order_by(events_table.c.seq)
        ).all()


def us(text: str) -> int:
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return int(moment.timestamp()) * 1_000_000 + moment.microsecond


def test_batch_is_stored_and_counted(app_client, make_event):
    batch = [make_event(id=f"e{i}", kind="payment", weight=2.5) for i in range(5)]
    response = post(app_client, batch)
    assert response.status_code == 202
    assert response.json() == {
        "accepted": 5,
        "duplicates": 0,
        "late": 0,
        "rejected": [],
        "conflicts": [],
    }
    rows = stored(app_client)
    assert [r.event_id for r in rows] == [f"e{i}" for i in range(5)]
    assert all(r.weight == 2.5 and r.kind == "payment" and not r.late for r in rows)
    with app_client.engine.connect() as connection:
        last = connection.execute(
            sa.select(service_state.c.value).where(service_state.c.key == "last_ingest_us")
        ).scalar()
    assert abs(int(last) - now_micros()) < 60_000_000


def test_duplicate_batch_is_idempotent(app_client, make_event):
    batch = [make_event(id=f"d{i}") for i in range(10)]
    assert post(app_client, batch).json()["accepted"] == 10
    again = post(app_client, batch).json()
    assert again == {"accepted": 0, "duplicates": 10, "late": 0, "rejected": [], "conflicts": []}
    # A repeat inside one batch is a duplicate too; the first copy wins. With other content
    # it is reported as a conflict.
    same = make_event(id="same", weight=1)
    twice = post(app_client, [same, same, {**same, "weight": 9}]).json()
    assert (twice["accepted"], twice["duplicates"]) == (1, 1)
    assert [item["index"] for item in twice["conflicts"]] == [2]
    assert len(stored(app_client)) == 11
    assert [r.weight for r in stored(app_client) if r.event_id == "same"] == [1.0]


def test_events_without_id_get_a_stable_hash(app_client):
    # The same instant written with two offsets, key orders and an explicit default weight.
    first = {"time": "2026-02-02T10:00:00Z", "actor": "m-1", "target": "m-2"}
    second = {"target": "m-2", "weight": 1, "actor": "m-1", "time": "2026-02-02T11:00:00+01:00"}
    result = post(app_client, [first, second]).json()
    assert (result["accepted"], result["duplicates"]) == (1, 1)
    (row,) = stored(app_client)
    # Recomputed here independently with hashlib over the documented canonical JSON.
    canonical = json.dumps(
        {
            "actor": "m-1",
            "kind": None,
            "target": "m-2",
            "time": "2026-02-02T10:00:00.000000Z",
            "weight": 1.0,
        },
        sort_keys=True,
        separators=(",", ":"),
    )
    assert row.event_id == "ev_" + hashlib.sha256(canonical.encode()).hexdigest()[:32]
    assert row.event_id == derived_event_id(row.time_us, "m-1", "m-2", None, 1.0)
    other = post(app_client, [dict(first, kind="payment")]).json()
    assert other["accepted"] == 1  # a different kind is a different event


def test_out_of_order_events_are_all_stored(app_client, make_event):
    times = ["2026-02-05T00:00:00Z", "2026-02-01T00:00:00Z", "2026-02-03T12:00:00Z"]
    batch = [make_event(time=t) for t in times]
    assert post(app_client, batch).json()["accepted"] == 3
    assert post(app_client, [make_event(time="2026-01-20T00:00:00Z")]).json()["late"] == 0
    assert sorted(r.time_us for r in stored(app_client)) == sorted(
        us(t) for t in times + ["2026-01-20T00:00:00Z"]
    )


def test_late_events_are_flagged_and_counted_on_closed_windows(app_client, make_event):
    # A closed window [Jan 29, Feb 5) as the window closer would have recorded it.
    start, end = us("2026-01-29T00:00:00Z"), us("2026-02-05T00:00:00Z")
    with app_client.engine.begin() as connection:
        connection.execute(
            sa.insert(windows).values(
                start_us=start,
                end_us=end,
                status="closed",
                closed_us=end,
                event_count=0,
                account_count=0,
                late_count=0,
                alert_count=0,
                training=True,
            )
        )
    batch = [
        make_event(time="2026-02-01T00:00:00Z", id="late-1"),
        make_event(time="2026-02-04T23:59:59.999999Z", id="late-2"),
        make_event(time="2026-02-05T00:00:00Z", id="on-time"),  # the end is exclusive
        make_event(time="2026-01-01T00:00:00Z", id="late-uncovered"),
    ]
    result = post(app_client, batch).json()
    assert result == {"accepted": 4, "duplicates": 0, "late": 3, "rejected": [], "conflicts": []}
    flags = {r.event_id: r.late for r in stored(app_client)}
    assert flags == {"late-1": True, "late-2": True, "on-time": False, "late-uncovered": True}
    # Retrying the late events counts nothing twice.
    assert post(app_client, batch[:2]).json()["duplicates"] == 2
    with app_client.engine.connect() as connection:
        assert connection.execute(sa.select(windows.c.late_count)).scalar() == 2


def test_empty_batch(app_client):
    response = post(app_client, [])
    assert response.status_code == 202
    assert response.json() == {
        "accepted": 0,
        "duplicates": 0,
        "late": 0,
        "rejected": [],
        "conflicts": [],
    }


@pytest.mark.parametrize(
    "body", [b"{", b"[]", b'{"events": {}}', b'{"events": [], "x": 1}', b"", b"null"]
)
def test_unparseable_or_wrong_shape_is_400(app_client, body):
    response = app_client.client.post(
        "/v1/events",
        content=body,
        headers=app_client.headers("ingest", **{"Content-Type": "application/json"}),
    )
    assert response.status_code == 400
    assert "nothing was stored" in response.json()["detail"]
    assert stored(app_client) == []


def test_invalid_utf8_is_400(app_client):
    bad = (
        '{"events": [{"time": "2026-02-02T10:00:00Z", "actor": "a\u00e9", "target": "b"}]}'.encode()
    )
    bad = bad.replace("\u00e9".encode(), b"\xff\xfe")
    for media in ("application/json", "application/x-ndjson"):
        body = bad if media == "application/json" else bad[len(b'{"events": [') : -2]
        response = app_client.client.post(
            "/v1/events",
            content=body,
            headers=app_client.headers("ingest", **{"Content-Type": media}),
        )
        assert response.status_code == 400, media
        assert "UTF-8" in response.json()["detail"]
    assert stored(app_client) == []


@pytest.mark.parametrize(
    "media",
    ["text/plain", "application/xml", "multipart/form-data", "application/json; charset=latin-1"],
)
def test_other_content_types_are_415(app_client, media):
    response = app_client.client.post(
        "/v1/events",
        content=b'{"events": []}',
        headers=app_client.headers("ingest", **{"Content-Type": media}),
    )
    assert response.status_code == 415
    assert stored(app_client) == []


def test_missing_content_type_is_415(app_client):
    response = app_client.client.post(
        "/v1/events", content=b'{"events": []}', headers=app_client.headers("ingest")
    )
    assert response.status_code == 415


def test_too_many_events_is_413_and_nothing_stored(app_client, make_event):
    limit = app_client.settings.max_batch_events
    response = post(app_client, [make_event() for _ in range(limit + 1)])
    assert response.status_code == 413
    assert f"at most {limit}" in response.json()["detail"]
    ndjson = "\n".join(json.dumps(make_event()) for _ in range(limit + 1)).encode()
    response = app_client.client.post(
        "/v1/events",
        content=ndjson,
        headers=app_client.headers("ingest", **{"Content-Type": "application/x-ndjson"}),
    )
    assert response.status_code == 413
    assert stored(app_client) == []
    assert post(app_client, [make_event() for _ in range(limit)]).status_code == 202


def test_too_many_bytes_is_413_by_length_and_by_stream(app_client, make_event):
    limit = app_client.settings.max_batch_bytes
    padding = "x" * 150
    events = [make_event(kind=None, id=f"{padding[:190]}{i:05d}") for i in range(limit // 200 + 10)]
    body = json.dumps({"events": events[:100]}).encode()
    body = body + b" " * (limit + 1 - len(body))  # valid JSON, one byte over the limit
    response = app_client.client.post(
        "/v1/events",
        content=body,
        headers=app_client.headers("ingest", **{"Content-Type": "application/json"}),
    )
    assert response.status_code == 413 and "bytes" in response.json()["detail"]

    def chunks():  # no Content-Length: the server must count while reading
        for start in range(0, len(body), 4096):
            yield body[start : start + 4096]

    response = app_client.client.post(
        "/v1/events",
        content=chunks(),
        headers=app_client.headers("ingest", **{"Content-Type": "application/json"}),
    )
    assert response.status_code == 413
    assert stored(app_client) == []


def rejected(app, events) -> dict[int, str]:
    response = post(app, events)
    assert response.status_code == 202
    return {r["index"]: r["error"] for r in response.json()["rejected"]}


def test_per_event_errors_keep_the_good_events(app_client, make_event):
    future = datetime.fromtimestamp(time.time() + 3600, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    near = datetime.fromtimestamp(time.time() + 60, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    batch = [
        make_event(id="good-0"),
        make_event(time="2026-13-01"),
        make_event(time="2026-02-02T10:00:00"),  # naive
        make_event(time=future),
        make_event(weight=-1),
        make_event(actor="m-same", target="m-same"),
        make_event(weight="3"),
        {"time": "2026-02-02T10:00:00Z", "actor": "a"},
        "not an object",
        make_event(actor="x" * 201),
        make_event(kind="k" * 65),
        make_event(weigth=2),
        make_event(time=1767225600),
        make_event(id="good-1", time=near),  # within max_future_skew (5m)
        make_event(actor=""),
    ]
    errors = rejected(app_client, batch)
    assert sorted(errors) == [1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 14]
    assert errors[1] == "time: '2026-13-01' is not an RFC 3339 timestamp with offset"
    assert "no UTC offset" in errors[2]
    assert "future" in errors[3]
    assert errors[4].startswith("weight:") and "0 or more" in errors[4]
    assert "self-interaction" in errors[5]
    assert errors[6] == "weight: must be a number, got a string"
    assert errors[7] == "target: required"
    assert "JSON object" in errors[8]
    assert "at most 200" in errors[9] and errors[9].startswith("actor:")
    assert "at most 64" in errors[10]
    assert "unknown field 'weigth'" in errors[11]
    assert errors[12].startswith("time: must be an RFC 3339 string")
    assert errors[14] == "actor: must not be empty"
    assert sorted(r.event_id for r in stored(app_client)) == ["good-0", "good-1"]


def test_the_published_event_schema_holds_the_limits_ingest_enforces(app_client, make_event):
    document = app_client.client.get("/openapi.json", headers=app_client.headers("read")).json()
    content = document["paths"]["/v1/events"]["post"]["requestBody"]["content"]
    batch = content["application/json"]["schema"]
    schema = batch["properties"]["events"]["items"]
    assert batch["required"] == ["events"]
    assert set(schema["properties"]) == set(FIELDS) and schema["additionalProperties"] is False
    assert sorted(schema["required"]) == ["actor", "target", "time"]

    def max_length(name: str) -> int:
        field = schema["properties"][name]
        (limit,) = [
            part["maxLength"] for part in field.get("anyOf", [field]) if "maxLength" in part
        ]
        return limit

    # each published limit is the exact boundary ingest enforces, event by event
    at_limit, over_limit = [], []
    for name in ("id", "actor", "target", "kind"):
        limit = max_length(name)
        for size, found in ((limit, at_limit), (limit + 1, over_limit)):
            found.append(make_event(**{name: ("z" if name == "target" else "y") * size}))
    outcome = post(app_client, at_limit + over_limit).json()
    assert outcome["accepted"] == len(at_limit)
    assert [r["index"] for r in outcome["rejected"]] == list(
        range(len(at_limit), len(at_limit) + len(over_limit))
    )
    assert all("at most" in r["error"] for r in outcome["rejected"])


def test_nan_and_infinite_weights_are_rejected_alone(app_client):
    # NaN/Infinity are not JSON (RFC 8259 section 6) but some encoders write them; the batch
    # is still read and only those events are refused.
    body = (
        '{"events": [{"time": "2026-02-02T10:00:00Z", "actor": "a", "target": "b", "weight": NaN},'
        ' {"time": "2026-02-02T10:00:00Z", "actor": "a", "target": "c", "weight": Infinity},'
        ' {"time": "2026-02-02T10:00:00Z", "actor": "a", "target": "d", "weight": 1e999},'
        ' {"time": "2026-02-02T10:00:00Z", "actor": "a", "target": "e", "weight": 0}]}'
    )
    response = app_client.client.post(
        "/v1/events",
        content=body,
        headers=app_client.headers("ingest", **{"Content-Type": "application/json"}),
    )
    assert response.status_code == 202
    result = response.json()
    assert [r["index"] for r in result["rejected"]] == [0, 1, 2]
    assert all("finite" in r["error"] for r in result["rejected"])
    assert [(r.target, r.weight) for r in stored(app_client)] == [("e", 0.0)]


def test_control_characters_are_rejected(app_client, make_event):
    errors = rejected(
        app_client,
        [
            make_event(actor="m\x00x"),
            make_event(target="tab\there"),
            make_event(id="id\u0085"),
            make_event(kind="k\x7f"),
        ],
    )
    assert sorted(errors) == [0, 1, 2, 3]
    assert "U+0000" in errors[0] and errors[0].startswith("actor:")
    assert "U+0009" in errors[1]
    assert "U+0085" in errors[2] and errors[2].startswith("id:")
    assert stored(app_client) == []


def test_sql_metacharacters_are_stored_verbatim(app_client, make_event):
    nasty = [
        "x'; DROP TABLE events; --",
        'quote"s\\back',
        "%_wild*cards?",
        "m/with/slashes",
        "Ünïcødé ☃ 𝄞",
        "' OR '1'='1",
    ]
    batch = [
        make_event(id=f"{n}#{i}", actor=n, target=f"{n}!", kind="k'\"") for i, n in enumerate(nasty)
    ]
    assert post(app_client, batch).json()["accepted"] == len(nasty)
    rows = stored(app_client)
    assert [r.actor for r in rows] == nasty
    assert [r.event_id for r in rows] == [f"{n}#{i}" for i, n in enumerate(nasty)]
    for n in nasty:  # readable back through the API by the same verbatim id
        response = app_client.client.get(
            f"/v1/accounts/{n}/roles".replace("%", "%25").replace("?", "%3F").replace("#", "%23"),
            headers=app_client.headers("read"),
        )
        assert response.status_code == 200, (n, response.text)
        assert response.json()["account"] == n


def test_ndjson_batch_with_a_broken_line(app_client, make_event):
    lines = [
        json.dumps(make_event(id="n0")),
        "",
        "{not json",
        json.dumps(make_event(id="n1")),
        "  ",
    ]
    response = app_client.client.post(
        "/v1/events",
        content="\n".join(lines).encode(),
        headers=app_client.headers("ingest", **{"Content-Type": "application/x-ndjson"}),
    )
    assert response.status_code == 202
    result = response.json()
    assert result["accepted"] == 2
    assert [r["index"] for r in result["rejected"]] == [1]
    assert "not valid JSON" in result["rejected"][0]["error"]


# RFC 3339 section 5.8 examples, with the UTC instants the RFC states for them.
RFC3339_EXAMPLES = [
    ("1985-04-12T23:20:50.52Z", "1985-04-12T23:20:50.520000+00:00"),
    ("1996-12-19T16:39:57-08:00", "1996-12-20T00:39:57+00:00"),  # "same as 1996-12-20T00:39:57Z"
    ("1937-01-01T12:00:27.87+00:20", "1937-01-01T11:40:27.870000+00:00"),
]


@pytest.mark.parametrize("text, utc", RFC3339_EXAMPLES)
def test_rfc3339_examples(text, utc):
    expected = datetime.fromisoformat(utc)
    assert parse_time_us(text) == int(
        (expected - datetime(1970, 1, 1, tzinfo=UTC)).total_seconds() * 1e6
    )


def test_rfc3339_leap_second_example_is_refused_with_a_reason():
    # RFC 3339 section 5.8 "1990-12-31T23:59:60Z": a leap second, which the store cannot order.
    with pytest.raises(ValueError, match="not an RFC 3339 timestamp"):
        parse_time_us("1990-12-31T23:59:60Z")


def test_wrong_scope_cannot_ingest(app_client, make_event):
    assert post(app_client, [make_event()], scope="read").status_code == 403
    assert post(app_client, [make_event()], scope="admin").status_code == 202


def test_ndjson_lines_split_only_on_newline(app_client, make_event):
    # U+2028 and U+0085 may appear unescaped inside JSON strings (RFC 8259 section 7); a line
    # separator there must not cut the line. (Ids may hold neither - U+2028 is a line
    # separator, U+0085 a C1 control - so both events are refused, each as one event.)
    lines = [
        json.dumps(make_event(id="a\u2028b"), ensure_ascii=False),
        json.dumps(make_event(id="c\u0085d"), ensure_ascii=False) + "\r",
        json.dumps(make_event(id="e-f"), ensure_ascii=False),
    ]
    response = app_client.client.post(
        "/v1/events",
        content="\n".join(lines).encode(),
        headers=app_client.headers("ingest", **{"Content-Type": "application/x-ndjson"}),
    )
    result = response.json()
    assert result["accepted"] == 1
    reasons = [(r["index"], r["error"]) for r in result["rejected"]]
    assert [index for index, _ in reasons] == [0, 1]
    assert "U+2028" in reasons[0][1] and "U+0085" in reasons[1][1]
    assert [r.event_id for r in stored(app_client)] == ["e-f"]


def test_concurrent_batches_share_commits_and_count_exactly(app_settings, make_event):
    # Six threads post overlapping batches at once through ingest (the API's path): every
    # event is stored once, and accepted + duplicates add up across all callers.
    import threading

    from rolewatch.store.db import open_store
    from rolewatch.store.events import ingest

    engine = open_store(app_settings)
    events = [make_event(id=f"c-{i}") for i in range(600)]
    batches = [
        events[start : start + 200] for start in range(0, 600, 100)
    ]  # each id in two batches
    results, errors = [], []

    def post(batch):
        try:
            results.append(ingest(engine, app_settings, batch, now_micros()))
        except Exception as error:  # pragma: no cover - reported below
            errors.append(error)

    threads = [threading.Thread(target=post, args=(batch,)) for batch in batches]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert errors == []
    assert sum(r.accepted for r in results) == 600
    assert sum(r.accepted + r.duplicates for r in results) == sum(len(b) for b in batches)
    with engine.connect() as connection:
        assert (
            connection.execute(sa.select(sa.func.count()).select_from(events_table)).scalar() == 600
        )
    engine.dispose()
