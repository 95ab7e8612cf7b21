"""The suppression list over real HTTP, on SQLite and PostgreSQL: who may manage it, what it
refuses, expiry, lifting, and what a window close does with suppressed accounts."""

from __future__ import annotations

from rolewatch.clock import now_micros, to_rfc3339

from .conftest import file_window, new_alert

DAY_US = 86_400_000_000


def test_suppression_holds_back_alerts_until_it_expires_or_is_lifted(live):
    # Windows close "at" these times; the pattern entry expires between the two closes.
    now = now_micros()
    first_close, second_close = now + 60_000_000, now + 2 * DAY_US
    expires = to_rfc3339(now + DAY_US)
    with live.client("mira") as client:
        made = client.post(
            "/v1/suppressions",
            json={
                "kind": "pattern",
                "value": "official-*",
                "reason": "the marketplace's own help accounts",
                "expires": expires,
            },
        )
        exact = client.post(
            "/v1/suppressions",
            json={"kind": "account", "value": "m-carol", "reason": "bulk seller, checked"},
        )
        everything = client.post(
            "/v1/suppressions", json={"kind": "pattern", "value": "*?*", "reason": "all"}
        )
        past = client.post(
            "/v1/suppressions",
            json={
                "kind": "account",
                "value": "m-x",
                "reason": "r",
                "expires": "2020-01-01T00:00:00Z",
            },
        )
    with live.client("reader") as client:
        refused = client.post(
            "/v1/suppressions", json={"kind": "account", "value": "m-y", "reason": "r"}
        )
    assert made.status_code == 201, made.text
    assert made.json()["expires"] == expires and made.json()["created_by"]["name"] == "Mira (T&S)"
    assert exact.status_code == 201
    # The default expiry: ROLEWATCH_SUPPRESSION_DEFAULT_EXPIRY (90 days) after it was made.
    assert exact.json()["expires"] > exact.json()["created"]
    assert everything.status_code == 422 and "every account" in everything.json()["detail"]
    assert past.status_code == 422 and refused.status_code == 403

    # Both entries are in force at the first close.
    kept, filed = file_window(
        live,
        live.settings,
        0,
        [
            new_alert("official-help", 9.0),
            new_alert("official-news", 8.0),
            new_alert("m-carol", 7.0),
            new_alert("official", 6.5),  # not covered: the pattern needs the "-"
            new_alert("m-dan", 6.0),
        ],
        now_us=first_close,
    )
    assert sorted(alert["account"] for alert in kept) == ["m-dan", "official"]
    assert filed.suppressed == 3
    # After the pattern's expiry, its accounts alert again; the exact entry still holds.
    kept, filed = file_window(
        live,
        live.settings,
        1,
        [new_alert("official-help", 9.0), new_alert("m-carol", 7.0)],
        now_us=second_close,
    )
    assert [alert["account"] for alert in kept] == ["official-help"] and filed.suppressed == 1

    with live.client("mira") as client:
        lifted = client.delete(f"/v1/suppressions/{exact.json()['id']}")
        again = client.delete(f"/v1/suppressions/{exact.json()['id']}")
        missing = client.delete("/v1/suppressions/999999")
    assert lifted.status_code == 200 and lifted.json()["active"] is False
    assert lifted.json()["lifted_by"]["key_id"] == live.ids["mira"]
    assert again.status_code == 409 and missing.status_code == 404
    kept, filed = file_window(live, live.settings, 2, [new_alert("m-carol", 7.0)], now_us=now)
    assert [alert["account"] for alert in kept] == ["m-carol"] and filed.suppressed == 0

    with live.client("reader") as client:
        in_force = client.get("/v1/suppressions").json()["suppressions"]
        every = client.get("/v1/suppressions", params={"all": "true"}).json()["suppressions"]
        stats = client.get("/v1/review/stats").json()
    # Now (by the wall clock) the pattern is in force again until its expiry; the exact
    # entry stays listed, lifted, with every entry that ended.
    assert [entry["value"] for entry in in_force] == ["official-*"]
    assert {entry["value"]: entry["active"] for entry in every} == {
        "official-*": True,
        "m-carol": False,
    }
    counts = {entry["value"]: entry["held_back"] for entry in every}
    assert counts == {"official-*": 2, "m-carol": 2}
    assert [w["suppressed"] for w in stats["windows"]] == [3, 1, 0]
    assert [w["raised"] for w in stats["windows"]] == [2, 1, 1]
