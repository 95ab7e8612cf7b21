"""Keys and scopes, /healthz, /metrics and /openapi.json over HTTP on the real app."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from rolewatch.api.app import create_app
from rolewatch.clock import now_micros
from rolewatch.store.keys import create_key, revoke_key, verify_key

ROUTES = [
    ("get", "/v1/alerts", "read"),
    ("get", "/v1/alerts/1", "read"),
    ("get", "/v1/roles", "read"),
    ("get", "/v1/windows", "read"),
    ("get", "/v1/accounts/m-1/roles", "read"),
    ("post", "/v1/events", "ingest"),
    ("patch", "/v1/roles/1", "admin"),
    ("post", "/v1/admin/basis", "admin"),
    ("get", "/v1/admin/keys", "admin"),
    ("get", "/metrics", "read"),
]


@pytest.mark.parametrize("method, path, scope", ROUTES)
def test_every_route_needs_a_key(app_client, method, path, scope):
    response = getattr(app_client.client, method)(path)
    assert response.status_code == 401
    # RFC 6750 section 3: a 401 carries a Bearer challenge.
    assert response.headers["WWW-Authenticate"].startswith('Bearer realm="rolewatch"')
    assert "Authorization: Bearer" in response.json()["detail"]


@pytest.mark.parametrize("presented", ["rwk_nothere_secret", "not-a-key", "rwk_", ""])
def test_invalid_keys_are_401(app_client, presented):
    response = app_client.client.get("/v1/roles", headers={"Authorization": f"Bearer {presented}"})
    assert response.status_code == 401
    assert "WWW-Authenticate" in response.headers


def test_right_key_id_with_wrong_secret_is_401(app_client):
    key = app_client.keys["admin"]
    prefix, key_id, secret = key.split("_", 2)
    forged = f"{prefix}_{key_id}_{'A' * len(secret)}"
    response = app_client.client.get("/v1/roles", headers={"Authorization": f"Bearer {forged}"})
    assert response.status_code == 401
    assert 'error="invalid_token"' in response.headers["WWW-Authenticate"]


@pytest.mark.parametrize("method, path, scope", ROUTES)
def test_scopes(app_client, method, path, scope):
    for holder in ("ingest", "read", "admin"):
        response = getattr(app_client.client, method)(path, headers=app_client.headers(holder))
        allowed = holder == scope or holder == "admin"
        if allowed:
            assert response.status_code not in (401, 403), (holder, response.text)
        else:
            assert response.status_code == 403, (holder, response.text)
            assert f"lacks the '{scope}' scope" in response.json()["detail"]


def test_revoked_key_is_refused(app_client):
    record, key = create_key(app_client.engine, ["read"], now_us=now_micros())
    headers = {"Authorization": f"Bearer {key}"}
    assert app_client.client.get("/v1/roles", headers=headers).status_code == 200
    assert revoke_key(app_client.engine, record.key_id, now_us=now_micros())
    assert app_client.client.get("/v1/roles", headers=headers).status_code == 401
    assert verify_key(app_client.engine, key) is None


def test_key_format_and_hash_only_storage(app_client):
    import hashlib

    import sqlalchemy as sa

    from rolewatch.store.schema import api_keys

    record, key = create_key(app_client.engine, ["ingest", "read"], label="x", now_us=0)
    assert key.startswith(f"rwk_{record.key_id}_") and len(key) > 50
    with app_client.engine.connect() as connection:
        row = connection.execute(
            sa.select(api_keys).where(api_keys.c.key_id == record.key_id)
        ).one()
    assert row.secret_hash == hashlib.sha256(key.encode()).hexdigest()
    assert key.split("_", 2)[2] not in " ".join(str(v) for v in row)
    listed = app_client.client.get("/v1/admin/keys", headers=app_client.headers("admin")).json()
    assert {k["key_id"] for k in listed} >= {record.key_id}
    assert all(set(k) == {"key_id", "scopes", "label", "created", "revoked"} for k in listed)


def test_healthz_is_open_and_checks_the_database(app_client):
    response = app_client.client.get("/healthz")
    assert response.status_code == 200
    assert response.json() == {"status": "ok", "database": "ok"}
    assert response.headers["x-request-id"]


def test_request_id_is_echoed(app_client):
    response = app_client.client.get("/healthz", headers={"X-Request-ID": "trace-123"})
    assert response.headers["x-request-id"] == "trace-123"


def test_metrics_exposition_parses(app_client, make_event):
    app_client.client.post(
        "/v1/events",
        json={"events": [make_event(), make_event(), {"bad": 1}]},
        headers=app_client.headers("ingest"),
    )
    from rolewatch import metrics

    def value(families, name, suffix):
        return sum(s.value for s in families[name].samples if s.name.endswith(suffix))

    before = {
        f.name: f
        for f in text_string_to_metric_families(
            app_client.client.get("/metrics", headers=app_client.headers("read")).text
        )
    }
    metrics.record_window_closed(seconds=0.3, alerts=2)  # as the window closer reports
    response = app_client.client.get("/metrics", headers=app_client.headers("read"))
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/plain")
    # Parsed with prometheus_client's own parser of the Prometheus text exposition format.
    families = {f.name: f for f in text_string_to_metric_families(response.text)}
    for name in (
        "rolewatch_events_accepted",
        "rolewatch_events_rejected",
        "rolewatch_events_duplicate",
        "rolewatch_events_late",
        "rolewatch_windows_closed",
        "rolewatch_window_close_seconds",
        "rolewatch_alerts_raised",
        "rolewatch_deliveries",
        "rolewatch_http_requests",
    ):
        assert name in families, name
    accepted = sum(
        s.value for s in families["rolewatch_events_accepted"].samples if s.name.endswith("_total")
    )
    assert accepted >= 2
    assert (
        value(families, "rolewatch_windows_closed", "_total")
        == value(before, "rolewatch_windows_closed", "_total") + 1
    )
    assert (
        value(families, "rolewatch_alerts_raised", "_total")
        == value(before, "rolewatch_alerts_raised", "_total") + 2
    )
    assert (
        value(families, "rolewatch_window_close_seconds", "_count")
        == value(before, "rolewatch_window_close_seconds", "_count") + 1
    )
    outcomes = {s.labels.get("outcome") for s in families["rolewatch_deliveries"].samples}
    assert {"delivered", "retry", "failed"} <= outcomes
    routes = {s.labels.get("route") for s in families["rolewatch_http_requests"].samples}
    assert "/v1/events" in routes
    # No label may carry a client-supplied value such as an account id.
    assert "m-0" not in response.text


def test_metrics_public_setting(app_settings):
    settings = app_settings.model_copy(update={"metrics_public": True})
    with TestClient(create_app(settings, run_jobs=False)) as client:
        assert client.get("/metrics").status_code == 200
        assert client.get("/v1/roles").status_code == 401


def test_openapi_document_needs_a_key_and_no_docs_page_is_served(app_client):
    # README: every route but /healthz needs a key; the interactive docs page, which would
    # load a script from outside the package, is not served at all.
    for path in ("/docs", "/redoc", "/docs/oauth2-redirect"):
        assert app_client.client.get(path, headers=app_client.headers("read")).status_code == 404
    assert app_client.client.get("/openapi.json").status_code == 401
    document = app_client.client.get("/openapi.json", headers=app_client.headers("read")).json()
    assert "/v1/events" in document["paths"]
    assert (
        "application/x-ndjson" in document["paths"]["/v1/events"]["post"]["requestBody"]["content"]
    )
