"""The FastAPI dependencies routes and pages declare: settings, the store, and the caller's key.

``create_app`` keeps the settings and the store's engine on ``app.state``; this module is the
only reader of it. Routes take what they need as annotated parameters::

    async def get_roles(store: StoreDep, _key: ReadKey) -> dict: ...

API routes answer 401/403 without a key of the scope (see :mod:`rolewatch.api.auth`); web
pages declare :data:`PageKey` instead, which sends the browser to the sign-in page.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated

from fastapi import Depends, Request
from fastapi.responses import RedirectResponse
from fastapi.security import HTTPAuthorizationCredentials
from sqlalchemy.engine import Engine

from rolewatch.api.auth import bearer, check_scope
from rolewatch.api.limits import checked_key
from rolewatch.config import Settings
from rolewatch.store.keys import SCOPES, ApiKey
from rolewatch.web import session


async def get_settings(request: Request) -> Settings:
    """The settings the app was created with."""
    return request.app.state.settings


async def get_store(request: Request) -> Engine:
    """The store's engine, opened by the app's lifespan."""
    return request.app.state.engine


SettingsDep = Annotated[Settings, Depends(get_settings)]
StoreDep = Annotated[Engine, Depends(get_store)]
BearerCredentials = Annotated[HTTPAuthorizationCredentials | None, Depends(bearer)]


def require_scope(
    scope: str,
) -> Callable[[Request, Engine, HTTPAuthorizationCredentials | None], ApiKey]:
    """A dependency that admits keys allowed ``scope`` and returns the key (401/403 otherwise)."""
    if scope not in SCOPES:
        raise ValueError(f"unknown scope {scope!r}")

    def dependency(request: Request, store: StoreDep, credentials: BearerCredentials) -> ApiKey:
        checked = (
            None if credentials is None else checked_key(request.scope, credentials.credentials)
        )
        return check_scope(store, credentials, scope, checked)

    dependency.__name__ = f"require_{scope}"
    return dependency


ReadKey = Annotated[ApiKey, Depends(require_scope("read"))]
IngestKey = Annotated[ApiKey, Depends(require_scope("ingest"))]
AdminKey = Annotated[ApiKey, Depends(require_scope("admin"))]
ReviewKey = Annotated[ApiKey, Depends(require_scope("review"))]


class SignInRequired(Exception):
    """Raised by :func:`page_key` when the browser holds no valid key with the read scope."""


def page_key(request: Request, store: StoreDep) -> ApiKey:
    """The read-scope key in the sign-in cookie; raises :class:`SignInRequired` otherwise."""
    key = session.current_key(store, request)
    if key is None or not key.allows("read"):
        raise SignInRequired
    return key


PageKey = Annotated[ApiKey, Depends(page_key)]


async def redirect_to_signin(request: Request, _error: Exception) -> RedirectResponse:
    """The exception handler for :class:`SignInRequired`: back to the page after signing in."""
    return session.to_signin(request)
