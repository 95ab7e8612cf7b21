"""API keys: create, list, revoke, verify. Only a sha256 of each whole key is stored.

A key looks like ``rwk_<key_id>_<secret>``: ``key_id`` (12 hex characters) is public and
names the key in lists and logs; ``secret`` (43 URL-safe base64 characters, 256 bits) is
shown once, when the key is made. Scopes: ``ingest``, ``read``, ``review``, ``admin``
(admin implies the others; review implies read). A key may carry a display name: the name a
reviewer goes by on cases (assignment, audit history).
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import dataclass

from sqlalchemy import insert, select, update
from sqlalchemy.engine import Connection, Engine

from rolewatch.store.db import write_transaction
from rolewatch.store.schema import api_keys, web_sessions

SCOPES = ("ingest", "read", "admin", "review")
PREFIX = "rwk_"
MAX_DISPLAY_NAME = 100


@dataclass(frozen=True)
class ApiKey:
    """A stored key, without its secret."""

    key_id: str
    scopes: tuple[str, ...]
    label: str | None
    created_us: int
    revoked_us: int | None
    display_name: str | None = None

    def allows(self, scope: str) -> bool:
        """True when this key may act with ``scope`` (admin implies every scope; review
        implies read, since reviewing means reading the cases)."""
        if self.revoked_us is not None:
            return False
        if scope in self.scopes or "admin" in self.scopes:
            return True
        return scope == "read" and "review" in self.scopes

    @property
    def name(self) -> str:
        """How people see this key on cases: its display name, else its label, else its id."""
        return self.display_name or self.label or self.key_id


def hash_key(key: str) -> str:
    """Hex sha256 of the whole key string, as stored."""
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def split_key(key: str) -> str | None:
    """The key id of a well-formed key, or None when ``key`` does not look like one."""
    if not key.startswith(PREFIX):
        return None
    parts = key[len(PREFIX) :].split("_", 1)
    if len(parts) != 2 or not parts[0] or not parts[1] or len(parts[0]) > 32:
        return None
    return parts[0]


def _check_scopes(scopes) -> tuple[str, ...]:
    chosen = tuple(dict.fromkeys(scopes))
    if not chosen:
        raise ValueError("a key needs at least one scope: ingest, read, review or admin")
    unknown = [s for s in chosen if s not in SCOPES]
    if unknown:
        raise ValueError(f"unknown scope {unknown[0]!r}; choose from ingest, read, review, admin")
    return chosen


def check_display_name(name: str | None) -> str | None:
    """A display name stripped of outer spaces (None when empty); ``ValueError`` when it is
    too long or holds control characters."""
    name = (name or "").strip()
    if not name:
        return None
    if len(name) > MAX_DISPLAY_NAME or any(ord(ch) < 32 or 127 <= ord(ch) < 160 for ch in name):
        raise ValueError(
            f"a display name needs 1 to {MAX_DISPLAY_NAME} printable characters, like 'Ana (T&S)'"
        )
    return name


def create_key(
    engine: Engine, scopes, *, label: str | None = None, now_us: int, name: str | None = None
) -> tuple[ApiKey, str]:
    """Make and store a new key; return its record and the full key (shown only this once).
    ``name`` is the display name reviewers see (optional)."""
    chosen = _check_scopes(scopes)
    name = check_display_name(name)
    key_id = secrets.token_hex(6)
    key = f"{PREFIX}{key_id}_{secrets.token_urlsafe(32)}"
    with write_transaction(engine) as connection:
        connection.execute(
            insert(api_keys).values(
                key_id=key_id,
                secret_hash=hash_key(key),
                scopes=" ".join(chosen),
                label=label,
                created_us=now_us,
                display_name=name,
            )
        )
    return ApiKey(key_id, chosen, label, now_us, None, name), key


def _record(row) -> ApiKey:
    return ApiKey(
        row.key_id,
        tuple(row.scopes.split()),
        row.label,
        row.created_us,
        row.revoked_us,
        row.display_name,
    )


def set_display_name(engine: Engine, key_id: str, name: str | None) -> bool:
    """Give an active key a display name (``None`` or empty clears it); False when no
    active key has that id."""
    name = check_display_name(name)
    with write_transaction(engine) as connection:
        changed = connection.execute(
            update(api_keys)
            .where(api_keys.c.key_id == key_id, api_keys.c.revoked_us.is_(None))
            .values(display_name=name)
        ).rowcount
    return changed == 1


def list_keys(engine: Engine, *, include_revoked: bool = True) -> list[ApiKey]:
    """Every stored key, oldest first (never the secrets)."""
    query = select(api_keys).order_by(api_keys.c.id)
    if not include_revoked:
        query = query.where(api_keys.c.revoked_us.is_(None))
    with engine.connect() as connection:
        return [_record(row) for row in connection.execute(query)]


def revoke_key(engine: Engine, key_id: str, *, now_us: int) -> bool:
    """Revoke a key by id, ending its web sessions; False when no active key has that id."""
    with write_transaction(engine) as connection:
        changed = connection.execute(
            update(api_keys)
            .where(api_keys.c.key_id == key_id, api_keys.c.revoked_us.is_(None))
            .values(revoked_us=now_us)
        ).rowcount
        connection.execute(
            update(web_sessions)
            .where(web_sessions.c.key_id == key_id, web_sessions.c.ended_us.is_(None))
            .values(ended_us=now_us)
        )
    return changed == 1


def active_key(engine: Engine, key_id: str) -> ApiKey | None:
    """The key record with id ``key_id`` unless it is unknown or revoked."""
    with engine.connect() as connection:
        row = connection.execute(select(api_keys).where(api_keys.c.key_id == key_id)).first()
    if row is None or row.revoked_us is not None:
        return None
    return _record(row)


def verify_key(engine: Engine, key: str) -> ApiKey | None:
    """The active key record for the presented ``key``, or None (unknown, wrong, revoked)."""
    key_id = split_key(key)
    if key_id is None:
        return None
    with engine.connect() as connection:
        row = connection.execute(select(api_keys).where(api_keys.c.key_id == key_id)).first()
    if row is None or row.revoked_us is not None:
        return None
    if not hmac.compare_digest(row.secret_hash, hash_key(key)):
        return None
    return _record(row)


def key_names(connection: Connection) -> dict[str, str]:
    """How every key (revoked ones too, for the history) is shown on cases:
    ``{key_id: display name, else label, else key id}``."""
    rows = connection.execute(select(api_keys.c.key_id, api_keys.c.display_name, api_keys.c.label))
    return {row.key_id: row.display_name or row.label or row.key_id for row in rows}
