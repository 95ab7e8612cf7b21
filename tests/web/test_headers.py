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

EXPECTED = {
    "content-security-policy": "default-src 'self'; img-src 'self' data:; style-src 'self'; "
    "script-src 'self'; object-src 'none'; base-uri 'none'; form-action 'self'; "
    "frame-ancestors 'none'",
    "x-content-type-options": "nosniff",
    "referrer-policy": "no-referrer",
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
    signed_in = client.post("/signin", data={"key": key, "next": "/roles"})
    assert signed_in.status_code == 303
    assert_protected(signed_in)
    signed_out = client.post("/signout")
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


def test_api_docs_keep_their_scripts(live):
    """The interactive docs load a script from a CDN and run an inline one: they get every
    header but the Content-Security-Policy, which would leave them blank."""
    client, _, _ = live
    for path in ("/docs", "/redoc"):
        page = client.get(path)
        assert page.status_code == 200 and "<script" in page.text
        assert "content-security-policy" not in page.headers
        for name in ("x-content-type-options", "referrer-policy", "cache-control"):
            assert page.headers[name] == EXPECTED[name]
