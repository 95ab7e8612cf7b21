"""Signing in over plain HTTP, the way the sign-in form does: fetch the form (which sets
its token cookie), then post the key with the form's token."""

from __future__ import annotations

import re

_TOKEN = re.compile(r'name="token" value="([^"]*)"')


def form_token(html: str) -> str:
    """The value of the page's first hidden ``token`` field."""
    found = _TOKEN.search(html)
    assert found is not None, "the page has no form token"
    return found.group(1)


def sign_in_http(client, key: str, next_path: str = "/", **headers):
    """Sign ``client`` (httpx or Starlette's TestClient, keeping cookies) in with ``key``;
    the response to the form's POST."""
    page = client.get("/signin")
    assert page.status_code == 200
    data = {"key": key, "next": next_path, "token": form_token(page.text)}
    return client.post("/signin", data=data, headers=headers, follow_redirects=False)
