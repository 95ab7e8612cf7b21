"""Sign-in for the web pages: the API key kept in an http-only, SameSite=Strict cookie.

The cookie holds the key the person typed (it is checked against the stored sha256 on every
request, like a Bearer header), so revoking the key signs the browser out. Forms that change
something carry a token derived from the key (an HMAC), checked on POST, on top of SameSite.
"""

from __future__ import annotations

import hashlib
import hmac
from urllib.parse import quote

from fastapi import Request
from fastapi.responses import RedirectResponse, Response
from sqlalchemy.engine import Engine

from rolewatch.store.keys import ApiKey, verify_key

COOKIE = "rolewatch_key"
MAX_AGE_SECONDS = 12 * 3600


def current_key(engine: Engine, request: Request) -> ApiKey | None:
    """The valid key in the request's cookie, or None (absent, unknown or revoked)."""
    presented = request.cookies.get(COOKIE)
    if not presented or len(presented) > 300:
        return None
    return verify_key(engine, presented)


def form_token(request: Request) -> str:
    """A per-key token for forms that change state (empty when not signed in)."""
    presented = request.cookies.get(COOKIE) or ""
    if not presented:
        return ""
    return hmac.new(presented.encode(), b"rolewatch web form", hashlib.sha256).hexdigest()[:32]


def form_token_ok(request: Request, token: str | None) -> bool:
    """True when ``token`` is the form token of the key in the request's cookie."""
    expected = form_token(request)
    return bool(expected) and hmac.compare_digest(expected, token or "")


def safe_next(target: str | None) -> str:
    """Where to go after signing in: a local path only (never another site), else ``/``."""
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/"
    return target


def to_signin(request: Request) -> RedirectResponse:
    """Redirect to the sign-in page, remembering the page asked for."""
    here = request.url.path + (f"?{request.url.query}" if request.url.query else "")
    return RedirectResponse(f"/signin?next={quote(here, safe='')}", status_code=303)


def set_key_cookie(response: Response, key: str, *, secure: bool) -> None:
    """Keep ``key`` in the sign-in cookie (http-only, SameSite=Strict, Secure over https)."""
    response.set_cookie(
        COOKIE,
        key,
        max_age=MAX_AGE_SECONDS,
        path="/",
        httponly=True,
        samesite="strict",
        secure=secure,
    )


def clear_key_cookie(response: Response, *, secure: bool) -> None:
    """Sign out: tell the browser to drop the sign-in cookie."""
    response.delete_cookie(COOKIE, path="/", httponly=True, samesite="strict", secure=secure)
