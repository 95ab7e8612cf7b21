"""API key authentication: ``Authorization: Bearer rwk_<key_id>_<secret>`` with scopes.

Routes declare the annotated dependencies of :mod:`rolewatch.api.deps` (``ReadKey``,
``IngestKey``, ``AdminKey``), which call :func:`check_scope`. Answers: 401 when the header is
missing, malformed or names an unknown or revoked key (with a ``WWW-Authenticate`` header,
RFC 6750), 403 when the key lacks the scope. ``admin`` implies ``ingest`` and ``read``. Keys
are checked against the sha256 stored by :mod:`rolewatch.store.keys`.
"""

from __future__ import annotations

from fastapi import HTTPException, status
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from sqlalchemy.engine import Engine

from rolewatch.store.keys import ApiKey, verify_key

bearer = HTTPBearer(
    auto_error=False,
    description="An API key made with `rolewatch keys create --scope S`, sent as "
    "`Authorization: Bearer rwk_<key_id>_<secret>`.",
)
REALM = 'Bearer realm="rolewatch"'
MISSING_KEY = (
    "missing API key: send the header 'Authorization: Bearer <key>' with a key made "
    "by 'rolewatch keys create'"
)
UNKNOWN_KEY = (
    "invalid API key: it is unknown, revoked or mistyped; make a new one with "
    "'rolewatch keys create'"
)


def challenge(invalid: bool) -> str:
    """The ``WWW-Authenticate`` value of a 401 (RFC 6750 section 3)."""
    return REALM + (', error="invalid_token"' if invalid else "")


def _unauthorized(message: str, *, invalid: bool) -> HTTPException:
    return HTTPException(
        status_code=status.HTTP_401_UNAUTHORIZED,
        detail=message,
        headers={"WWW-Authenticate": challenge(invalid)},
    )


def authenticate(
    engine: Engine,
    credentials: HTTPAuthorizationCredentials | None,
    checked: ApiKey | None = None,
) -> ApiKey:
    """The key presented in ``credentials``; raises 401 when there is none or it is not valid.

    ``checked`` is the key the body gate (:mod:`rolewatch.api.limits`) already verified for
    these credentials in this request, if any."""
    if credentials is None:
        raise _unauthorized(MISSING_KEY, invalid=False)
    key = checked or verify_key(engine, credentials.credentials)
    if key is None:
        raise _unauthorized(UNKNOWN_KEY, invalid=True)
    return key


def check_scope(
    engine: Engine,
    credentials: HTTPAuthorizationCredentials | None,
    scope: str,
    checked: ApiKey | None = None,
) -> ApiKey:
    """The presented key when it is allowed ``scope``; raises 401 or 403 otherwise."""
    key = authenticate(engine, credentials, checked)
    if not key.allows(scope):
        raise HTTPException(
            status_code=status.HTTP_403_FORBIDDEN,
            detail=f"this key ({key.key_id}) lacks the '{scope}' scope; it has: "
            f"{', '.join(key.scopes)}",
        )
    return key
