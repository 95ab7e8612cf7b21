"""API key authentication: ``Authorization: Bearer rwk_<key_id>_<secret>`` with scopes.

``require_scope("read")`` is the FastAPI dependency a route declares. Answers: 401 when the
header is missing, malformed or names an unknown or revoked key (with a ``WWW-Authenticate``
header, RFC 6750), 403 when the key lacks the scope. ``admin`` implies ``ingest`` and
``read``. Keys are checked against the sha256 stored by :mod:`rolewatch.store.keys`.
"""

from __future__ import annotations

from fastapi import Depends, HTTPException, Request, status
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from rolewatch.store.keys import SCOPES, ApiKey, verify_key

_bearer = HTTPBearer(
    auto_error=False,
    description="An API key made with `rolewatch keys create --scope S`, sent as "
    "`Authorization: Bearer rwk_<key_id>_<secret>`.",
)
REALM = 'Bearer realm="rolewatch"'


def _unauthorized(message: str, *, invalid: bool) -> HTTPException:
    challenge = REALM + (', error="invalid_token"' if invalid else "")
    return HTTPException(
        status_code=status.HTTP_401_UNAUTHORIZED,
        detail=message,
        headers={"WWW-Authenticate": challenge},
    )


def authenticate(request: Request, credentials: HTTPAuthorizationCredentials | None) -> ApiKey:
    """The key presented with ``request``; raises 401 when there is none or it is not valid."""
    if credentials is None:
        raise _unauthorized(
            "missing API key: send the header 'Authorization: Bearer <key>' with a key made "
            "by 'rolewatch keys create'",
            invalid=False,
        )
    key = verify_key(request.app.state.engine, credentials.credentials)
    if key is None:
        raise _unauthorized(
            "invalid API key: it is unknown, revoked or mistyped; make a new one with "
            "'rolewatch keys create'",
            invalid=True,
        )
    request.state.key_id = key.key_id
    return key


def require_scope(scope: str):
    """A FastAPI dependency that admits keys allowed ``scope`` and returns the key."""
    if scope not in SCOPES:
        raise ValueError(f"unknown scope {scope!r}")

    def dependency(
        request: Request, credentials: HTTPAuthorizationCredentials | None = Depends(_bearer)
    ) -> ApiKey:
        key = authenticate(request, credentials)
        if not key.allows(scope):
            raise HTTPException(
                status_code=status.HTTP_403_FORBIDDEN,
                detail=f"this key ({key.key_id}) lacks the '{scope}' scope; it has: "
                f"{', '.join(key.scopes)}",
            )
        return key

    dependency.__name__ = f"require_{scope}"
    return dependency
