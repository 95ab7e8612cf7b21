"""Reading RFC 3339 times from query strings and request bodies (400 with a reason otherwise)."""

from __future__ import annotations

from fastapi import HTTPException, status

from rolewatch.store.events import parse_time_us


def time_param(name: str, value: str | None) -> int | None:
    """Microseconds for an optional RFC 3339 parameter; 400 naming ``name`` when it is wrong."""
    if value is None or value == "":
        return None
    try:
        return parse_time_us(value)
    except ValueError as error:
        reason = str(error).removeprefix("time: ")
        raise HTTPException(status.HTTP_400_BAD_REQUEST, detail=f"{name}: {reason}") from None


def time_range(from_value: str | None, to_value: str | None) -> tuple[int | None, int | None]:
    """Both ends of a ``from``/``to`` range; 400 when ``from`` is not before ``to``."""
    start, end = time_param("from", from_value), time_param("to", to_value)
    if start is not None and end is not None and start >= end:
        raise HTTPException(status.HTTP_400_BAD_REQUEST, detail="from must be before to")
    return start, end


def _missing(name: str) -> HTTPException:
    return HTTPException(
        status.HTTP_400_BAD_REQUEST,
        detail=f"{name}: required; give an RFC 3339 time such as 2026-02-12T09:30:00Z",
    )


def required_time_range(from_value: str, to_value: str) -> tuple[int, int]:
    """Like :func:`time_range`, but both ends must be given; 400 naming an empty one."""
    start, end = time_range(from_value, to_value)
    if start is None:
        raise _missing("from")
    if end is None:
        raise _missing("to")
    return start, end
