"""Web sign-in sessions: start, look up, end. Only a sha256 of each session token is stored.

The token (43 URL-safe base64 characters, 256 bits) lives in the browser's http-only cookie
and nowhere else; the API key the person typed is never stored in the browser. A session
is valid until ``expires_us``, until it is ended by signing out, and only while its key is
active (the caller checks the key, see :mod:`rolewatch.web.session`).
"""

from __future__ import annotations

import hashlib
import secrets

from sqlalchemy import delete, insert, or_, select, update
from sqlalchemy.engine import Engine

from rolewatch.store.db import write_transaction
from rolewatch.store.schema import web_sessions

MAX_TOKEN_CHARS = 100


def _hash(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def start_session(engine: Engine, key_id: str, *, now_us: int, lifetime_us: int) -> str:
    """Store a new session for ``key_id``; return its token (shown to the browser only).

    Sessions that expired or were ended are deleted on the way."""
    token = secrets.token_urlsafe(32)
    with write_transaction(engine) as connection:
        connection.execute(
            delete(web_sessions).where(
                or_(web_sessions.c.expires_us <= now_us, web_sessions.c.ended_us.is_not(None))
            )
        )
        connection.execute(
            insert(web_sessions).values(
                token_hash=_hash(token),
                key_id=key_id,
                created_us=now_us,
                expires_us=now_us + lifetime_us,
            )
        )
    return token


def session_key_id(engine: Engine, token: str, *, now_us: int) -> str | None:
    """The key id of the live session ``token`` names, or None (unknown, expired, ended)."""
    if not token or len(token) > MAX_TOKEN_CHARS or not token.isascii():
        return None
    with engine.connect() as connection:
        row = connection.execute(
            select(web_sessions.c.key_id).where(
                web_sessions.c.token_hash == _hash(token),
                web_sessions.c.ended_us.is_(None),
                web_sessions.c.expires_us > now_us,
            )
        ).first()
    return None if row is None else row.key_id


def end_session(engine: Engine, token: str, *, now_us: int) -> bool:
    """End the session ``token`` names (signing out); False when it was not live."""
    if not token or len(token) > MAX_TOKEN_CHARS or not token.isascii():
        return False
    with write_transaction(engine) as connection:
        changed = connection.execute(
            update(web_sessions)
            .where(web_sessions.c.token_hash == _hash(token), web_sessions.c.ended_us.is_(None))
            .values(ended_us=now_us)
        ).rowcount
    return changed == 1
