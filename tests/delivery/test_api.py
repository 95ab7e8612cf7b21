"""The subscription and delivery endpoints through the real application (FastAPI app, real
SQLite file migrated by the app's own start-up, real loopback receivers)."""

from __future__ import annotations

import json
import warnings

import pytest
from standardwebhooks.webhooks import Webhook

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

from rolewatch.api.app import create_app
from rolewatch.delivery.outbox import enqueue_alerts
from rolewatch.delivery.worker import deliver_due
from rolewatch.store.db import write_transaction
from rolewatch.store.keys import create_key

from .conftest import delivery_settings, now_us, store_alert


@pytest.fixture
def make_service(tmp_path):
    """Start the real app on a fresh SQLite file; API keys for each scope."""
    stack = []

    def start(**overrides):
        settings = delivery_settings(f"sqlite:///{tmp_path / f'api{len(stack)}.db'}", **overrides)
        app = create_app(settings, run_jobs=False)
        client = TestClient(app)
        client.__enter__()
        stack.append(client)
        engine = app.state.engine
        keys = {
            scope: create_key(engine, [scope], label=f"delivery tests {scope}", now_us=now_us())[1]
            for scope in ("admin", "read", "ingest")
        }
        client.engine, client.settings = engine, settings
        client.as_ = lambda scope: {"Authorization": f"Bearer {keys[scope]}"}
        return client

    yield start
    for client in stack:
        client.__exit__(None, None, None)


@pytest.fixture
def service(make_service):
    return make_service()


def test_subscription_lifecycle(service, receiver):
    hook = receiver().start()
    admin = service.as_("admin")
    made = service.post(
        "/v1/subscriptions",
        headers=admin,
        json={"url": hook.url, "format": "json", "min_score": 0.5, "roles": [3]},
    )
    assert made.status_code == 201, made.text
    body = made.json()
    secret, sub_id = body["secret"], body["id"]
    assert secret.startswith("whsec_") and body["roles"] == [3] and body["min_score"] == 0.5

    listed = service.get("/v1/subscriptions", headers=admin)
    assert listed.status_code == 200 and [s["id"] for s in listed.json()["subscriptions"]] == [
        sub_id
    ]
    assert (
        secret not in listed.text
        and secret[6:] not in listed.text
        and "secret" not in listed.json()["subscriptions"][0]
    )
    one = service.get(f"/v1/subscriptions/{sub_id}", headers=admin)
    assert one.status_code == 200 and secret[6:] not in one.text

    # A test alert goes through the outbox and arrives signed with the secret shown once.
    queued = service.post(f"/v1/subscriptions/{sub_id}/test", headers=admin)
    assert queued.status_code == 202
    deliver_due(service.engine, service.settings)
    [request] = hook.received
    # Verified with the `standardwebhooks` reference package.
    assert Webhook(secret).verify(request.body, request.headers)["type"] == "alert.test"
    assert request.headers["webhook-id"] == queued.json()["delivery_id"]

    rotated = service.post(f"/v1/subscriptions/{sub_id}/rotate", headers=admin)
    assert rotated.status_code == 200 and rotated.json()["secret"] != secret
    assert rotated.json()["rotating_until"]
    assert rotated.json()["secret"][6:] not in service.get("/v1/subscriptions", headers=admin).text

    assert service.delete(f"/v1/subscriptions/{sub_id}", headers=admin).status_code == 204
    assert service.get(f"/v1/subscriptions/{sub_id}", headers=admin).status_code == 404
    assert service.delete(f"/v1/subscriptions/{sub_id}", headers=admin).status_code == 404


@pytest.mark.parametrize(
    ("url", "reason"),
    [
        ("http://127.0.0.1:9/hook", "loopback"),
        ("https://169.254.169.254/latest/meta-data/", "cloud metadata"),
        ("https://[::ffff:10.0.0.1]/hook", "10.0.0.1, a private address"),
        ("https://localhost/hook", "localhost resolves to 127.0.0.1"),
        ("ftp://files.example.org/hook", "not supported"),
    ],
)
def test_refused_urls_answer_422_with_the_reason(make_service, url, reason):
    strict = make_service(webhook_allow_hosts=[])
    answer = strict.post("/v1/subscriptions", headers=strict.as_("admin"), json={"url": url})
    assert answer.status_code == 422
    assert reason in answer.json()["detail"]
    assert (
        strict.get("/v1/subscriptions", headers=strict.as_("admin")).json()["subscriptions"] == []
    )


def test_https_required_answers_422(make_service):
    strict = make_service(webhook_allow_http=False)
    answer = strict.post(
        "/v1/subscriptions", headers=strict.as_("admin"), json={"url": "http://hooks.example.org/x"}
    )
    assert answer.status_code == 422 and "must use https://" in answer.json()["detail"]


def test_bad_fields_answer_422(service):
    admin = service.as_("admin")
    for body in (
        {"url": "https://8.8.8.8/x", "format": "xml"},
        {"url": "https://8.8.8.8/x", "min_score": -1},
        {"url": "https://8.8.8.8/x", "roles": ["three"]},
        {"url": "https://8.8.8.8/x", "roles": []},
        {"format": "json"},
    ):
        assert service.post("/v1/subscriptions", headers=admin, json=body).status_code == 422


def test_routes_are_in_the_openapi_document(service):
    paths = service.get("/openapi.json", headers=service.as_("read")).json()["paths"]
    for path in (
        "/v1/subscriptions",
        "/v1/subscriptions/{sub_id}",
        "/v1/subscriptions/{sub_id}/rotate",
        "/v1/subscriptions/{sub_id}/resume",
        "/v1/subscriptions/{sub_id}/test",
        "/v1/deliveries",
        "/v1/deliveries/{delivery_id}",
        "/v1/deliveries/{delivery_id}/redeliver",
    ):
        assert path in paths


def test_scopes(service):
    for scope in ("read", "ingest"):
        headers = service.as_(scope)
        assert service.get("/v1/subscriptions", headers=headers).status_code == 403
        assert (
            service.post(
                "/v1/subscriptions", headers=headers, json={"url": "https://8.8.8.8/x"}
            ).status_code
            == 403
        )
        assert service.post("/v1/deliveries/msg_x/redeliver", headers=headers).status_code == 403
    assert service.get("/v1/deliveries", headers=service.as_("read")).status_code == 200
    assert service.get("/v1/deliveries", headers=service.as_("ingest")).status_code == 403
    assert service.get("/v1/deliveries").status_code == 401


def test_deliveries_list_detail_redeliver_and_resume(service, receiver):
    hook = receiver(default=410).start()
    admin, read = service.as_("admin"), service.as_("read")
    sub_id = service.post("/v1/subscriptions", headers=admin, json={"url": hook.url}).json()["id"]
    with write_transaction(service.engine) as connection:
        alert = store_alert(connection)
        [delivery_id] = enqueue_alerts(connection, service.settings, [alert])
    deliver_due(service.engine, service.settings)

    sub = service.get(f"/v1/subscriptions/{sub_id}", headers=admin).json()
    assert sub["paused"] and "410" in sub["paused_reason"]
    pending = service.get(
        "/v1/deliveries", headers=read, params={"status": "pending", "subscription": sub_id}
    )
    assert [d["id"] for d in pending.json()["deliveries"]] == [delivery_id]
    assert (
        service.get("/v1/deliveries", headers=read, params={"status": "delivered"}).json()[
            "deliveries"
        ]
        == []
    )
    assert service.get("/v1/deliveries", headers=read, params={"status": "lost"}).status_code == 422
    detail = service.get(f"/v1/deliveries/{delivery_id}", headers=read).json()
    assert detail["alert_id"] == alert["id"] and detail["attempts"] == 1
    assert [a["status_code"] for a in detail["attempt_log"]] == [410]
    assert (
        detail["attempt_log"][0]["time"].endswith("Z")
        and "gone" in detail["attempt_log"][0]["error"]
    )
    assert service.get("/v1/deliveries/msg_nothing", headers=read).status_code == 404

    # The receiver comes back; resume and redeliver: same webhook-id, same bytes.
    hook.default = 200
    assert (
        service.post(f"/v1/subscriptions/{sub_id}/resume", headers=admin).json()["paused"] is False
    )
    again = service.post(f"/v1/deliveries/{delivery_id}/redeliver", headers=admin)
    assert again.status_code == 200 and again.json()["status"] == "pending"
    deliver_due(service.engine, service.settings)
    assert [r.headers["webhook-id"] for r in hook.received] == [delivery_id, delivery_id]
    assert hook.received[0].body == hook.received[1].body
    detail = service.get(f"/v1/deliveries/{delivery_id}", headers=read).json()
    assert detail["status"] == "delivered" and [
        a["status_code"] for a in detail["attempt_log"]
    ] == [410, 200]
    assert json.loads(hook.received[1].body)["data"]["id"] == alert["id"]

    service.delete(f"/v1/subscriptions/{sub_id}", headers=admin)
    assert service.post(f"/v1/deliveries/{delivery_id}/redeliver", headers=admin).status_code == 409


@pytest.fixture
def app_settings(store_url):
    """tests/conftest.py's app settings (SQLite file, or a PostgreSQL schema when configured),
    with loopback receivers allowed."""
    return delivery_settings(store_url)


def test_test_delivery_on_each_migrated_store(app_client, receiver):
    # Runs on SQLite and, when ROLEWATCH_TEST_POSTGRES_URL is set, on PostgreSQL, both with
    # the schema made by the Alembic migrations (open_store), not by create_all.
    hook = receiver(script=[503]).start()
    client, admin = app_client.client, app_client.headers("admin")
    made = client.post("/v1/subscriptions", headers=admin, json={"url": hook.url, "format": "text"})
    assert made.status_code == 201, made.text
    delivery_id = client.post(f"/v1/subscriptions/{made.json()['id']}/test", headers=admin).json()[
        "delivery_id"
    ]
    t = now_us()
    deliver_due(app_client.engine, app_client.settings, now_us=t)
    deliver_due(app_client.engine, app_client.settings, now_us=t + 3_600_000_000)
    detail = client.get(f"/v1/deliveries/{delivery_id}", headers=app_client.headers("read")).json()
    assert detail["status"] == "delivered" and [
        a["status_code"] for a in detail["attempt_log"]
    ] == [503, 200]
    assert [r.headers["webhook-id"] for r in hook.received] == [delivery_id, delivery_id]
    assert json.loads(hook.received[1].body)["text"].startswith("TEST")
    assert Webhook(made.json()["secret"]).verify(hook.received[1].body, hook.received[1].headers)
