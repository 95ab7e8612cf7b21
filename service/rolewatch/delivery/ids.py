"""Identifiers the delivery layer makes: ULIDs for messages, short random ids for subscriptions."""

from __future__ import annotations

import os
import secrets

from rolewatch.clock import now_micros

_CROCKFORD = "0123456789ABCDEFGHJKMNPQRSTVWXYZ"


def ulid(now_ms: int | None = None) -> str:
    """A ULID: 48-bit millisecond time then 80 random bits, in Crockford base32 (26 chars).

    Sorting ULIDs as text sorts them by creation time, which keeps message ids readable in logs.
    """
    ms = now_micros() // 1000 if now_ms is None else int(now_ms)
    value = (ms & ((1 << 48) - 1)) << 80 | int.from_bytes(os.urandom(10), "big")
    chars = []
    for _ in range(26):
        chars.append(_CROCKFORD[value & 31])
        value >>= 5
    return "".join(reversed(chars))


def message_id(now_us: int | None = None) -> str:
    """A Standard Webhooks message id, ``msg_<ulid>``, fixed for all retries of one delivery."""
    return "msg_" + ulid(None if now_us is None else now_us // 1000)


def subscription_id() -> str:
    """A subscription id, ``sub_<22 url-safe random chars>``."""
    return "sub_" + secrets.token_urlsafe(16)
