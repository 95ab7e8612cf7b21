"""Protective response headers on every kind of answer, read over real HTTP (uvicorn on
loopback, httpx as the client): pages, redirects (sign-out among them), API answers, errors.

The expected values are the policy the pages have always sent, written out here rather than
imported, so a change to the policy has to change this test too. The header meanings follow
the standards that define them: Content-Security-Policy (W3C CSP Level 3),
X-Content-Type-Options (WHATWG Fetch), Referrer-Policy (W3C Referrer Policy) and
Cache-Control: no-store (RFC 9111 section 5.2.2.5).
"""

from __future__ import annotations

import httpx
import pytest
import sqlalchemy as sa

from rolewatch.api.app import create_app
from rolewatch.clock import now_micros
from rolewatch.config import load_settings
from rolewatch.store.db import open_store
from rolewatch.store.keys import create_key

from .conftest import serve
from .signin import form_token, sign_in_http

EXPECTED = {
    "content-security-policy": "default-src 'self'; img-src 'self' data:; style-src 'self'; "
    "script-src 'self'; object-src 'none'; base-uri 'none'; form-action 'self'; "
    "frame-ancestors 'none'",
    "x-content-type-options": "nosniff",
    "referrer-policy": "same-origin",
    "cache-control": "no-store",
}


@pytest.fixture
def live(tmp_path):
    """The app on a fresh SQLite store, served on loopback, with a read key."""
    settings = load_settings(
        database_url=f"sqlite:///{tmp_path / 'rolewatch.db'}", log_json=False, log_level="ERROR"
    )
    engine = open_store(settings)
    _, key = create_key(engine, ["read"], label="header test", now_us=now_micros())
    with serve(create_app(settings, run_jobs=False)) as url:
        with httpx.Client(base_url=url, follow_redirects=False, timeout=30) as client:
            yield client, engine, key
    engine.dispose()


def assert_protected(response: httpx.Response) -> None:
    for name, value in EXPECTED.items():
        assert response.headers.get(name) == value, (response.request.url, name)


def test_sign_out_and_not_found_carry_the_headers(live):
    client, _, key = live
    signed_in = sign_in_http(client, key, "/roles")
    assert signed_in.status_code == 303
    assert_protected(signed_in)
    token = form_token(client.get("/roles").text)
    signed_out = client.post("/signout", data={"token": token})
    assert signed_out.status_code == 303 and signed_out.headers["location"] == "/signin"
    assert_protected(signed_out)
    missing = client.get("/no-such-page")
    assert missing.status_code == 404
    assert_protected(missing)


def test_redirects_api_answers_and_static_files_carry_the_headers(live):
    client, _, key = live
    to_signin = client.get("/alerts")
    assert to_signin.status_code == 303 and to_signin.headers["location"].startswith("/signin")
    assert_protected(to_signin)
    unauthorized = client.get("/v1/roles")
    assert unauthorized.status_code == 401
    assert_protected(unauthorized)
    answered = client.get("/v1/roles", headers={"Authorization": f"Bearer {key}"})
    assert answered.status_code == 200
    assert_protected(answered)
    assert_protected(client.get("/healthz"))
    assert_protected(client.get("/static/style.css"))


def test_a_server_error_carries_the_headers_and_a_request_id(live):
    client, engine, key = live
    with engine.begin() as connection:  # a real fault: the role bases table is gone
        connection.execute(sa.text("DROP TABLE bases"))
    failed = client.get("/v1/roles", headers={"Authorization": f"Bearer {key}"})
    assert failed.status_code == 500
    assert failed.text == "Internal Server Error"
    assert failed.headers["x-request-id"]
    assert_protected(failed)


def test_no_page_runs_scripts_from_elsewhere(live):
    """The interactive API docs (a CDN script and an inline one) are not served; the OpenAPI
    document needs a key like every route but /healthz, and carries the same headers."""
    client, _, key = live
    for path in ("/docs", "/redoc"):
        missing = client.get(path)
        assert missing.status_code == 404
        assert_protected(missing)
    assert client.get("/openapi.json").status_code == 401
    document = client.get("/openapi.json", headers={"Authorization": f"Bearer {key}"})
    assert document.status_code == 200 and "/v1/events" in document.json()["paths"]
    assert_protected(document)
