"""Managing the suppression list: add an entry, list entries, lift one early.

Each entry keeps who made it, why, until when, and (if lifted) who lifted it; nothing is
deleted. Entries apply from the next window close on (:mod:`rolewatch.review.intake`).
The pattern language is described in :mod:`rolewatch.review.suppression`.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy.engine import Engine

from rolewatch.clock import to_rfc3339
from rolewatch.config import Settings
from rolewatch.review.forms import person
from rolewatch.review.suppression import SuppressionError, check_entry
from rolewatch.store import suppressions as suppression_store
from rolewatch.store.db import Connection, write_transaction
from rolewatch.store.keys import ApiKey, key_names
from rolewatch.store.suppressions import SuppressionRecord


class SuppressionNotFound(LookupError):
    """No entry has this id."""


def entry_form(entry: SuppressionRecord, names: dict[str, str], now_us: int) -> dict[str, Any]:
    """An entry in its API form; ``active`` says whether it applies at ``now_us``."""
    return {
        "id": entry.id,
        "kind": entry.kind,
        "value": entry.value,
        "reason": entry.reason,
        "created": to_rfc3339(entry.created_us),
        "created_by": person(entry.created_by, names),
        "expires": to_rfc3339(entry.expires_us),
        "lifted": to_rfc3339(entry.lifted_us) if entry.lifted_us is not None else None,
        "lifted_by": person(entry.lifted_by, names),
        "active": entry.lifted_us is None and entry.expires_us > now_us,
        "held_back": entry.hits,
        "last_held_back_window_id": entry.last_hit_window_id,
    }


def add_entry(
    engine: Engine,
    settings: Settings,
    key: ApiKey,
    *,
    kind: str,
    value: str,
    reason: str,
    expires_us: int | None,
    now_us: int,
) -> dict[str, Any]:
    """Store a new entry (expiry defaults to ``suppression_default_expiry`` from now);
    :class:`SuppressionError` when it is refused."""
    value, reason = check_entry(kind, value, reason)
    if expires_us is None:
        expires_us = now_us + int(settings.suppression_default_expiry.total_seconds() * 1e6)
    if expires_us <= now_us:
        raise SuppressionError("the expiry must be in the future")
    with write_transaction(engine) as connection:
        entry_id = suppression_store.insert_suppression(
            connection,
            kind=kind,
            value=value,
            reason=reason,
            created_us=now_us,
            created_by=key.key_id,
            expires_us=expires_us,
        )
        return _one(connection, entry_id, now_us)


def _one(connection: Connection, entry_id: int, now_us: int) -> dict[str, Any]:
    found = suppression_store.list_entries(
        connection, now_us=now_us, include_inactive=True, entry_id=entry_id
    )
    if not found:
        raise SuppressionNotFound(f"no suppression {entry_id}")
    return entry_form(found[0], key_names(connection), now_us)


def list_entries(engine: Engine, *, now_us: int, include_inactive: bool) -> list[dict[str, Any]]:
    """Entries newest first (only those in force unless ``include_inactive``)."""
    with engine.connect() as connection:
        found = suppression_store.list_entries(
            connection, now_us=now_us, include_inactive=include_inactive
        )
        names = key_names(connection)
    return [entry_form(entry, names, now_us) for entry in found]


def lift_entry(engine: Engine, key: ApiKey, entry_id: int, *, now_us: int) -> dict[str, Any]:
    """End an entry now. :class:`SuppressionNotFound` for an unknown id,
    :class:`SuppressionError` when it has already ended."""
    with write_transaction(engine) as connection:
        if suppression_store.find_entry(connection, entry_id) is None:
            raise SuppressionNotFound(f"no suppression {entry_id}")
        if not suppression_store.lift_entry(connection, entry_id, now_us=now_us, by=key.key_id):
            raise SuppressionError(f"suppression {entry_id} has already been lifted or expired")
        return _one(connection, entry_id, now_us)
