"""Read routes (accounts, roles, windows, alerts) over HTTP, on rows written as the window
closer writes them."""

from __future__ import annotations

import json
from datetime import datetime

import pytest
import sqlalchemy as sa

from rolewatch.store.db import write_transaction
from rolewatch.store.schema import alerts, bases, memberships, recipes, roles, windows

DAY_US = 86_400 * 1_000_000


def us(text: str) -> int:
    moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    return int(moment.timestamp()) * 1_000_000


@pytest.fixture
def seeded(app_client):
    """Three closed weekly windows, a basis with two roles, memberships for two accounts and
    three alerts."""
    ends = [us("2026-01-08T00:00:00Z"), us("2026-01-15T00:00:00Z"), us("2026-01-22T00:00:00Z")]
    with write_transaction(app_client.engine) as connection:
        connection.execute(sa.insert(recipes).values(version="r-1", created_us=0, body="{}"))
        connection.execute(
            sa.insert(bases).values(
                version="b-1",
                recipe_version="r-1",
                created_us=1,
                active=True,
                trained_from_us=ends[0] - 7 * DAY_US,
                trained_to_us=ends[0],
                body="{}",
            )
        )
        connection.execute(
            sa.insert(roles),
            [
                {
                    "basis_version": "b-1",
                    "role_id": 1,
                    "name": "quiet buyer",
                    "description": "few payments",
                    "profile": json.dumps({"out_degree": 0.2}),
                },
                {
                    "basis_version": "b-1",
                    "role_id": 2,
                    "name": "collector",
                    "description": "many payers",
                    "profile": json.dumps({"in_degree": 0.9}),
                },
            ],
        )
        ids = []
        for end in ends:
            ids.append(
                connection.execute(
                    sa.insert(windows).values(
                        start_us=end - 7 * DAY_US,
                        end_us=end,
                        status="closed",
                        closed_us=end + 3600_000_000,
                        event_count=10,
                        account_count=2,
                        late_count=1,
                        alert_count=1,
                        training=False,
                        recipe_version="r-1",
                        basis_version="b-1",
                        reconstruction_error=0.1,
                        close_seconds=0.5,
                    )
                ).inserted_primary_key[0]
            )
        for index, window_id in enumerate(ids):
            connection.execute(
                sa.insert(memberships).values(
                    account="m-00042",
                    window_id=window_id,
                    basis_version="b-1",
                    mixture=json.dumps({"1": 1.0 - 0.4 * index, "2": 0.4 * index}),
                    dominant_role=1 if index < 2 else 2,
                    score=None if index == 0 else 0.3 * index,
                    status="new" if index == 0 else "scored",
                    events_out=3 + index,
                    events_in=1,
                    counterparts=2,
                    new_counterparts=index,
                    error=0.05,
                )
            )
        connection.execute(
            sa.insert(memberships).values(
                account="m-00007",
                window_id=ids[2],
                basis_version="b-1",
                mixture=json.dumps({"1": 1.0}),
                dominant_role=1,
                score=None,
                status="new",
                events_out=1,
                events_in=0,
                counterparts=1,
                new_counterparts=1,
                error=0.0,
            )
        )
        for index, (account, score) in enumerate(
            [("m-00042", 0.6), ("m-00042", 0.9), ("m-00007", 0.55)]
        ):
            evidence = {
                "threshold": 0.5,
                "measure": "role_aware",
                "mixture_before": [{"role_id": 1, "name": "quiet buyer", "weight": 1.0}],
                "mixture_after": [{"role_id": 2, "name": "collector", "weight": 0.8}],
                "notice": "A lead for human review, not a verdict.",
            }
            connection.execute(
                sa.insert(alerts).values(
                    window_id=ids[min(index + 1, 2)],
                    account=account,
                    created_us=ends[min(index + 1, 2)],
                    window_end_us=ends[min(index + 1, 2)],
                    score=score,
                    basis_version="b-1",
                    role_before=1,
                    role_after=2,
                    evidence=json.dumps(evidence),
                )
            )
    return app_client


def get(app, path, **params):
    return app.client.get(path, params=params, headers=app.headers("read"))


def test_account_history(seeded):
    body = get(seeded, "/v1/accounts/m-00042/roles").json()
    assert body["account"] == "m-00042"
    history = body["windows"]
    assert [h["window_end"] for h in history] == [
        "2026-01-08T00:00:00Z",
        "2026-01-15T00:00:00Z",
        "2026-01-22T00:00:00Z",
    ]
    assert history[0]["score"] is None and history[0]["status"] == "new"
    assert history[2]["dominant_role"] == {"id": 2, "name": "collector"}
    for entry in history:
        assert sum(entry["mixture"].values()) == pytest.approx(1.0)
    assert history[1]["activity"] == {
        "events_out": 4,
        "events_in": 1,
        "counterparts": 2,
        "new_counterparts": 1,
    }
    ranged = get(
        seeded,
        "/v1/accounts/m-00042/roles",
        **{"from": "2026-01-10T00:00:00Z", "to": "2026-01-16T00:00:00+00:00"},
    ).json()
    # Windows overlapping [from, to): [Jan 8, Jan 15) and [Jan 15, Jan 22).
    assert [h["window_end"] for h in ranged["windows"]] == [
        "2026-01-15T00:00:00Z",
        "2026-01-22T00:00:00Z",
    ]
    ranged = get(
        seeded,
        "/v1/accounts/m-00042/roles",
        **{"from": "2026-01-15T00:00:00Z", "to": "2026-01-22T00:00:00Z"},
    ).json()
    assert [h["window_end"] for h in ranged["windows"]] == ["2026-01-22T00:00:00Z"]


def test_too_little_activity_has_no_role_in_the_api(seeded):
    with write_transaction(seeded.engine) as connection:
        window_id = connection.execute(sa.select(sa.func.min(windows.c.id))).scalar_one()
        connection.execute(
            sa.insert(memberships).values(
                account="m-00099",
                window_id=window_id,
                basis_version="b-1",
                mixture="{}",
                dominant_role=None,
                score=None,
                status="too_little",
                events_out=1,
                events_in=0,
                counterparts=1,
                new_counterparts=1,
                error=0.0,
            )
        )
    entry = get(seeded, "/v1/accounts/m-00099/roles").json()["windows"][0]
    assert entry["dominant_role"] is None and entry["mixture"] == {}
    assert entry["status"] == "too_little" and entry["score"] is None


def test_unknown_account_is_404_with_a_message(seeded):
    response = get(seeded, "/v1/accounts/m-99999/roles")
    assert response.status_code == 404
    assert "unknown account 'm-99999'" in response.json()["detail"]


def test_account_with_events_but_no_window_is_known(seeded, make_event):
    seeded.client.post(
        "/v1/events",
        json={"events": [make_event(actor="fresh-1", target="fresh-2")]},
        headers=seeded.headers("ingest"),
    )
    assert get(seeded, "/v1/accounts/fresh-2/roles").json() == {"account": "fresh-2", "windows": []}


def test_bad_time_parameters_are_400(seeded):
    response = get(seeded, "/v1/accounts/m-00042/roles", **{"from": "yesterday"})
    assert response.status_code == 400
    assert response.json()["detail"].startswith("from: 'yesterday' is not an RFC 3339")
    assert (
        get(
            seeded, "/v1/alerts", **{"from": "2026-02-01T00:00:00Z", "to": "2026-01-01T00:00:00Z"}
        ).status_code
        == 400
    )


def test_refit_needs_both_ends_of_the_period(seeded):
    """An empty ``from`` or ``to`` is a 400 naming it (it used to reach the store as NULL)."""
    for body, named in (
        ({"from": "", "to": "2026-01-22T00:00:00Z"}, "from"),
        ({"from": "2026-01-01T00:00:00Z", "to": ""}, "to"),
    ):
        response = seeded.client.post("/v1/admin/basis", json=body, headers=seeded.headers("admin"))
        assert response.status_code == 400, response.text
        assert response.json()["detail"].startswith(f"{named}: required")


def test_roles_and_rename(seeded):
    body = get(seeded, "/v1/roles").json()
    assert body["basis_version"] == "b-1"
    assert [(r["id"], r["name"]) for r in body["roles"]] == [(1, "quiet buyer"), (2, "collector")]
    assert body["roles"][1]["profile"] == {"in_degree": 0.9}
    renamed = seeded.client.patch(
        "/v1/roles/2", json={"name": "funnel"}, headers=seeded.headers("admin")
    )
    assert renamed.status_code == 200 and renamed.json()["name"] == "funnel"
    assert get(seeded, "/v1/roles").json()["roles"][1]["name"] == "funnel"
    # Alerts and history show the new name.
    alert = get(seeded, "/v1/alerts", limit=1).json()["alerts"][0]
    assert alert["role_after"] == {"id": 2, "name": "funnel"}
    assert (
        seeded.client.patch(
            "/v1/roles/9", json={"name": "x"}, headers=seeded.headers("admin")
        ).status_code
        == 404
    )
    assert (
        seeded.client.patch(
            "/v1/roles/2", json={"name": ""}, headers=seeded.headers("admin")
        ).status_code
        == 422
    )
    assert (
        seeded.client.patch(
            "/v1/roles/2", json={"name": "a\nb"}, headers=seeded.headers("admin")
        ).status_code
        == 422
    )


def test_roles_before_any_basis(app_client):
    body = get(app_client, "/v1/roles").json()
    assert (
        body["basis_version"] is None and body["roles"] == [] and "no role basis" in body["message"]
    )


def test_alerts_filters_and_pages(seeded):
    everything = get(seeded, "/v1/alerts").json()
    assert [a["score"] for a in everything["alerts"]] == [0.55, 0.9, 0.6]  # newest first
    assert everything["next_cursor"] is None
    first = get(seeded, "/v1/alerts", limit=2).json()
    assert len(first["alerts"]) == 2 and first["next_cursor"]
    second = get(seeded, "/v1/alerts", limit=2, cursor=first["next_cursor"]).json()
    assert [a["id"] for a in first["alerts"] + second["alerts"]] == [
        a["id"] for a in everything["alerts"]
    ]
    assert second["next_cursor"] is None
    assert {
        a["account"] for a in get(seeded, "/v1/alerts", account="m-00007").json()["alerts"]
    } == {"m-00007"}
    assert [a["score"] for a in get(seeded, "/v1/alerts", min_score=0.6).json()["alerts"]] == [
        0.9,
        0.6,
    ]
    windowed = get(
        seeded, "/v1/alerts", **{"from": "2026-01-15T00:00:00Z", "to": "2026-01-16T00:00:00Z"}
    ).json()
    assert [a["window_end"] for a in windowed["alerts"]] == ["2026-01-15T00:00:00Z"]
    assert get(seeded, "/v1/alerts", cursor="abc").status_code == 400
    # An id ingest never stores (a NUL; PostgreSQL refuses it as a parameter) matches nothing.
    assert get(seeded, "/v1/alerts", account="m\x00").json() == {"alerts": [], "next_cursor": None}


def test_alert_by_id_in_contract_form(seeded):
    listed = get(seeded, "/v1/alerts").json()["alerts"][-1]
    alert = get(seeded, f"/v1/alerts/{listed['id']}").json()
    assert alert == listed
    assert set(alert) == {
        "id",
        "account",
        "window_id",
        "window_start",
        "window_end",
        "created",
        "score",
        "basis_version",
        "role_before",
        "role_after",
        "headline",
        "evidence",
    }
    assert (
        alert["window_start"] == "2026-01-08T00:00:00Z"
        and alert["window_end"] == "2026-01-15T00:00:00Z"
    )
    assert alert["role_before"] == {"id": 1, "name": "quiet buyer"}
    assert alert["evidence"]["notice"].startswith("A lead for human review")
    assert get(seeded, "/v1/alerts/999999").status_code == 404


def test_windows_closed_and_open(seeded, make_event):
    seeded.client.post(
        "/v1/events",
        json={
            "events": [
                make_event(time="2026-01-23T10:00:00Z"),
                make_event(time="2026-01-30T12:00:00Z"),
                make_event(time="2026-01-10T00:00:00Z"),  # late: its window closed
            ]
        },
        headers=seeded.headers("ingest"),
    )
    body = get(seeded, "/v1/windows").json()
    assert [w["end"] for w in body["closed"]] == [
        "2026-01-22T00:00:00Z",
        "2026-01-15T00:00:00Z",
        "2026-01-08T00:00:00Z",
    ]
    assert body["closed"][1]["late_count"] == 2  # one seeded, one just posted
    assert body["latest_event"] == "2026-01-30T12:00:00Z"
    assert body["watermark"] == "2026-01-30T11:00:00Z"  # default lateness 1h
    # Windows end on UTC multiples of 7 days since the epoch (a Thursday): Jan 29, Feb 5.
    assert [(w["start"], w["end"], w["status"], w["event_count"]) for w in body["open"]] == [
        ("2026-01-22T00:00:00Z", "2026-01-29T00:00:00Z", "due", 1),
        ("2026-01-29T00:00:00Z", "2026-02-05T00:00:00Z", "open", 1),
    ]


def test_windows_before_any_event(app_client):
    body = get(app_client, "/v1/windows").json()
    assert body == {"watermark": None, "latest_event": None, "open": [], "closed": []}
