"""Sign-in for the web pages: a server-side session named by an http-only cookie.

Signing in with an API key starts a session (:mod:`rolewatch.store.sessions`); the cookie
holds only the session's random token, never the key. The session ends when it expires
(``session_lifetime``), when the person signs out, or when the key is revoked (the key is
checked on every request).

Requests that change something are protected against cross-site forms twice:

* an ``Origin`` (or, without it, ``Referer``) header naming another site is refused;
* every such form carries a token the other site cannot read: the signed-in forms an HMAC of
  the session token, the sign-in form a random value also set in a SameSite=Strict cookie
  when the form was shown (the double-submit pattern).
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from urllib.parse import quote, urlsplit

from fastapi import Request
from fastapi.responses import RedirectResponse, Response
from sqlalchemy.engine import Engine

from rolewatch.clock import now_micros
from rolewatch.config import Settings
from rolewatch.store.keys import ApiKey, active_key
from rolewatch.store.sessions import end_session, session_key_id, start_session

COOKIE = "rolewatch_session"
SIGNIN_COOKIE = "rolewatch_signin"
SIGNIN_FORM_SECONDS = 3600


def _secure(settings: Settings) -> bool:
    """Whether cookies get the Secure attribute (the service is served over https)."""
    return settings.public_url.lower().startswith("https://")


def current_key(engine: Engine, request: Request) -> ApiKey | None:
    """The active key of the request's live session, or None."""
    token = request.cookies.get(COOKIE) or ""
    key_id = session_key_id(engine, token, now_us=now_micros())
    return None if key_id is None else active_key(engine, key_id)


def form_token(request: Request) -> str:
    """A per-session token for forms that change state (empty when not signed in)."""
    token = request.cookies.get(COOKIE) or ""
    if not token:
        return ""
    return hmac.new(token.encode(), b"rolewatch web form", hashlib.sha256).hexdigest()[:32]


def form_token_ok(request: Request, token: str | None) -> bool:
    """True when ``token`` is the form token of the request's session."""
    expected = form_token(request)
    return bool(expected) and hmac.compare_digest(expected, token or "")


def _origin(url: str) -> str:
    parts = urlsplit(url)
    return f"{parts.scheme}://{parts.netloc}".lower()


def same_site(request: Request, settings: Settings) -> bool:
    """False when the request's ``Origin`` (or ``Referer``) names another site than this
    service (its ``public_url`` or the address it was reached at). Requests with neither
    header come from programs, not from another site's form, and pass; "null" does not."""
    claimed = request.headers.get("origin")
    if claimed is None:
        referer = request.headers.get("referer")
        if not referer:
            return True
        claimed = _origin(referer)
    ours = {_origin(settings.public_url), _origin(str(request.base_url))}
    return claimed.lower().rstrip("/") in ours


def new_signin_token() -> str:
    """A fresh sign-in form token (see :func:`set_signin_cookie`)."""
    return secrets.token_urlsafe(24)


def set_signin_cookie(response: Response, token: str, settings: Settings) -> None:
    """Keep the sign-in form's token in a cookie, for :func:`signin_token_ok` to compare."""
    response.set_cookie(
        SIGNIN_COOKIE,
        token,
        max_age=SIGNIN_FORM_SECONDS,
        path="/signin",
        httponly=True,
        samesite="strict",
        secure=_secure(settings),
    )


def signin_token_ok(request: Request, token: str | None) -> bool:
    """True when the sign-in form's token matches the one set with the form."""
    expected = request.cookies.get(SIGNIN_COOKIE) or ""
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


def sign_in(engine: Engine, response: Response, key: ApiKey, settings: Settings) -> None:
    """Start a session for ``key`` and set its cookie (http-only, SameSite=Strict, Secure
    over https); the sign-in form's cookie is dropped."""
    lifetime = settings.session_lifetime
    token = start_session(
        engine, key.key_id, now_us=now_micros(), lifetime_us=int(lifetime.total_seconds() * 1e6)
    )
    response.set_cookie(
        COOKIE,
        token,
        max_age=int(lifetime.total_seconds()),
        path="/",
        httponly=True,
        samesite="strict",
        secure=_secure(settings),
    )
    response.delete_cookie(SIGNIN_COOKIE, path="/signin", secure=_secure(settings))


def sign_out(engine: Engine, request: Request, response: Response, settings: Settings) -> None:
    """End the request's session on the server and drop its cookie."""
    end_session(engine, request.cookies.get(COOKIE) or "", now_us=now_micros())
    response.delete_cookie(
        COOKIE, path="/", httponly=True, samesite="strict", secure=_secure(settings)
    )
