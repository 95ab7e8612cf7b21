"""Hostile use of the web pages over real HTTP: forms posted from another site, the sign-in
cookie, odd numbers in page parameters, and account ids built to look like others.

A cross-site form is what a page on another origin makes a signed-in browser send: a POST
with that page's ``Origin`` (RFC 6454) and without the cookies marked SameSite=Strict.
"""

from __future__ import annotations

import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager

import httpx

from .hostile import Live, form_token, recent, sign_in_http
from .servers import Server, make_keys, server_env

EVIL = {"Origin": "http://evil.example.test"}
HUGE = "99999999999999999999"


def _client(live: Live) -> httpx.Client:
    return httpx.Client(base_url=live.url, follow_redirects=False, timeout=60)


@contextmanager
def _signed_in(live: Live, scope: str = "admin") -> Iterator[httpx.Client]:
    with _client(live) as client:
        response = sign_in_http(client, live.keys[scope], "/roles", Origin=live.url)
        assert response.status_code == 303, response.text
        yield client


def _who(client: httpx.Client) -> str | None:
    """The key id the pages show as signed in, or None when sent to sign in."""
    page = client.get("/roles")
    if page.status_code != 200:
        return None
    return page.text.split('class="who">key <code>', 1)[1].split("</code>", 1)[0]


def test_sign_in_from_another_site_is_refused(live):
    with _signed_in(live, "admin") as admin:
        admin_id = _who(admin)
        # The other site's form: no sign-in token (its cookie is SameSite=Strict), its Origin.
        forged = {"key": live.keys["read"], "next": "/"}
        for headers in (EVIL, {"Origin": "null"}, {}):
            response = admin.post("/signin", data=forged, headers=headers)
            assert response.status_code == 403, (headers, response.status_code)
            assert "rolewatch_session" not in response.headers.get("set-cookie", "")
        # Even with a valid form token, another Origin is refused.
        token = form_token(admin.get("/signin").text)
        response = admin.post("/signin", data={**forged, "token": token}, headers=EVIL)
        assert response.status_code == 403
        assert _who(admin) == admin_id


def test_sign_out_from_another_site_is_refused(live):
    with _signed_in(live, "read") as reader:
        token = form_token(reader.get("/roles").text)
        assert reader.post("/signout", headers=EVIL).status_code == 403
        assert reader.post("/signout", data={"token": token}, headers=EVIL).status_code == 403
        assert reader.post("/signout", data={"token": "x" * 32}).status_code == 403
        assert _who(reader) is not None
        session = reader.cookies["rolewatch_session"]
        done = reader.post("/signout", data={"token": token}, headers={"Origin": live.url})
        assert done.status_code == 303
    # Signing out ended the session on the server: its cookie value opens nothing any more.
    with _client(live) as replayed:
        replayed.cookies.set("rolewatch_session", session)
        assert _who(replayed) is None


def test_the_cookie_holds_a_session_not_the_key(live):
    with _signed_in(live, "read") as reader:
        session = reader.cookies["rolewatch_session"]
        key = live.keys["read"]
        # The secret is everything after the key id; it may itself hold "_" (URL-safe base64).
        secret = key.split("_", 2)[2]
        assert key not in session and secret not in session
        assert len(session) >= 40


def test_revoking_the_key_ends_its_sessions(live):
    keys = make_keys(live.database_url)  # fresh keys, so the suite's own stay valid
    with _client(live) as reader:
        assert sign_in_http(reader, keys["read"], "/roles").status_code == 303
        assert _who(reader) is not None
        key_id = keys["read"].split("_")[1]
        revoked = subprocess.run(
            [sys.executable, "-m", "rolewatch.cli", "keys", "revoke", key_id],
            env=server_env(live.database_url),
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert revoked.returncode == 0, revoked.stderr
        assert _who(reader) is None


def test_sessions_expire_on_the_server(store_url):
    keys = make_keys(store_url)
    server = Server(store_url, {"role": "api", "session_lifetime": "2s"}).start()
    try:
        live = Live(server, store_url, keys)
        with _signed_in(live, "read") as reader:
            session = reader.cookies["rolewatch_session"]
        time.sleep(3)
        # Sent by hand: the server, not the browser's cookie expiry, must refuse it.
        with _client(live) as replayed:
            replayed.cookies.set("rolewatch_session", session)
            assert _who(replayed) is None
    finally:
        server.kill()


def test_odd_numbers_in_page_and_api_parameters_get_no_server_error(live):
    with _signed_in(live, "admin") as admin:
        for path in (
            f"/alerts?before={HUGE}",
            "/alerts?before=-5",
            "/alerts?before=%C2%B2",  # superscript two: str.isdigit() says yes, int() says no
            f"/roles?renamed={HUGE}",
            f"/accounts/m-odd?window={HUGE}",
        ):
            response = admin.get(path)
            assert response.status_code < 500, (path, response.status_code)
        token = form_token(admin.get("/roles").text)
        renamed = admin.post(
            "/roles",
            data={"role_id": HUGE, "name": "Renamed", "token": token},
            headers={"Origin": live.url},
        )
        assert renamed.status_code == 404, renamed.status_code
    for cursor in ("%C2%B2", HUGE, "%D9%A3", "-1", "0"):
        response = live.request("GET", f"/v1/alerts?cursor={cursor}", "read")
        assert response.status_code == 400, (cursor, response.status_code)
        assert "next_cursor" in response.json()["detail"]


def test_account_ids_are_isolated_and_unusual_characters_shown(live):
    nbsp_inside = "m-02\u00a0240"  # allowed inside an id, but invisible to a reader
    right_to_left = "\u05d0\u05d1-7"  # Hebrew letters: would reorder the text beside them
    events = [
        {"time": recent(), "actor": nbsp_inside, "target": right_to_left, "id": "shown-1"},
    ]
    response = live.request("POST", "/v1/events", "ingest", json={"events": events})
    assert response.json()["accepted"] == 1, response.text
    with _signed_in(live, "read") as reader:
        page = reader.get("/accounts/" + httpx.URL(path=nbsp_inside).raw_path.decode())
        assert page.status_code == 200, page.status_code
        heading = page.text.split("<h1>", 1)[1].split("</h1>", 1)[0]
        assert "<bdi>m-02&lt;U+00A0&gt;240</bdi>" in heading
        assert "\u00a0" not in heading
        other = reader.get("/accounts/" + httpx.URL(path=right_to_left).raw_path.decode())
        assert "<bdi>\u05d0\u05d1-7</bdi>" in other.text
