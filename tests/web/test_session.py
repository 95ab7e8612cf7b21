"""Sign-in cookie attributes and page headers, over HTTP without a browser.

The cookie attributes follow RFC 6265 (Secure, HttpOnly) and RFC 6265bis (SameSite=Strict);
the app runs for real on a SQLite file, reached through Starlette's TestClient.
"""

from __future__ import annotations

from http.cookies import SimpleCookie

import pytest
from fastapi.testclient import TestClient

from rolewatch.api.app import create_app
from rolewatch.clock import now_micros
from rolewatch.config import load_settings
from rolewatch.store.db import open_store
from rolewatch.store.keys import create_key, revoke_key
from rolewatch.store.sessions import start_session

from .signin import sign_in_http


@pytest.fixture(params=["https://rolewatch.example.test", "http://127.0.0.1:8000"])
def served(request, tmp_path):
    settings = load_settings(
        database_url=f"sqlite:///{tmp_path / 'rolewatch.db'}",
        public_url=request.param,
        log_json=False,
    )
    engine = open_store(settings)
    now = now_micros()
    record, key = create_key(engine, ["read"], label="web session test", now_us=now)
    with TestClient(create_app(settings, run_jobs=False), base_url=request.param) as client:
        yield client, engine, record, key, request.param.startswith("https://")
    engine.dispose()


def _set_cookie(response) -> SimpleCookie:
    cookie = SimpleCookie()
    for header in response.headers.get_list("set-cookie"):
        cookie.load(header)
    return cookie


def test_sign_in_cookie_attributes(served):
    client, _, _, key, https = served
    response = sign_in_http(client, key, "/roles")
    assert response.status_code == 303 and response.headers["location"] == "/roles"
    morsel = _set_cookie(response)["rolewatch_session"]
    assert morsel["httponly"] is True
    assert morsel["samesite"] == "strict"
    assert bool(morsel["secure"]) is https  # Secure exactly when public_url is https
    assert morsel["path"] == "/"


def test_next_never_leaves_the_site(served):
    client, _, _, key, _ = served
    for target in ("https://elsewhere.example.test/", "//elsewhere.example.test/", "/\\evil"):
        response = sign_in_http(client, key, target)
        assert response.headers["location"] == "/"


def test_pages_send_protective_headers_and_no_secret(served):
    client, _, record, key, _ = served
    sign_in_http(client, key)
    response = client.get("/alerts")
    assert response.status_code == 200
    assert "script-src 'self'" in response.headers["content-security-policy"]
    assert response.headers["x-content-type-options"] == "nosniff"
    assert key not in response.text and record.key_id in response.text
    assert "leads for human review, not verdicts" in response.text


def test_revoked_key_is_signed_out(served):
    client, engine, record, key, _ = served
    sign_in_http(client, key)
    assert client.get("/roles", follow_redirects=False).status_code == 200
    revoke_key(engine, record.key_id, now_us=now_micros())
    response = client.get("/roles", follow_redirects=False)
    assert response.status_code == 303 and response.headers["location"].startswith("/signin")


def test_a_key_without_read_scope_gets_no_page(served):
    """Sign-in refuses such a key; one put in the cookie by hand is sent to sign-in by every
    page, the rename form included (it would otherwise show the role catalogue)."""
    client, engine, _, _, _ = served
    _, ingest_only = create_key(engine, ["ingest"], label="ingest only", now_us=now_micros())
    refused = sign_in_http(client, ingest_only)
    assert refused.status_code == 401 and "lacks the read scope" in refused.text
    # A session for that key made in the store directly: its cookie opens no page either.
    token = start_session(
        engine, ingest_only.split("_")[1], now_us=now_micros(), lifetime_us=3_600_000_000
    )
    client.cookies.set("rolewatch_session", token)
    for method, path in (
        ("GET", "/alerts"),
        ("GET", "/roles"),
        ("GET", "/accounts/m-1"),
        ("GET", "/accounts?account=m-1"),
        ("POST", "/roles"),
    ):
        data = {"role_id": "1", "name": "renamed", "token": ""} if method == "POST" else None
        response = client.request(method, path, data=data, follow_redirects=False)
        assert response.status_code == 303, (method, path)
        assert response.headers["location"].startswith("/signin?next="), (method, path)
