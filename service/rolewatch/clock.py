"""Time in rolewatch: the one wall-clock read and the one RFC 3339 formatting.

Times are kept everywhere as integer microseconds since the Unix epoch, UTC. Code that
needs "now" calls :func:`now_micros` (or :func:`now_seconds`); tests and replays pass an
explicit ``now_us`` instead, so nothing else reads the clock.
"""

from __future__ import annotations

import time
from datetime import UTC, datetime, timedelta

MICROS = 1_000_000
EPOCH = datetime(1970, 1, 1, tzinfo=UTC)

__all__ = ["EPOCH", "MICROS", "now_micros", "now_seconds", "to_datetime", "to_rfc3339"]


def now_micros() -> int:
    """The wall clock in microseconds since the epoch (the service's only clock read)."""
    return time.time_ns() // 1000


def now_seconds() -> int:
    """The wall clock in whole seconds since the epoch (webhook timestamps)."""
    return now_micros() // MICROS


def to_datetime(time_us: int) -> datetime:
    """Microseconds since the epoch as an aware UTC datetime."""
    return EPOCH + timedelta(microseconds=int(time_us))


def to_rfc3339(time_us: int) -> str:
    """Microseconds since the epoch as RFC 3339 UTC with ``Z``; fractional seconds (six
    digits) only when they are not zero, e.g. ``2026-02-05T00:00:00Z``."""
    moment = to_datetime(time_us)
    if moment.microsecond:
        return moment.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    return moment.strftime("%Y-%m-%dT%H:%M:%SZ")
