"""Integers from query strings and forms, read the way the store can hold them.

Python's ``int()`` also reads non-ASCII decimal digits (``"٣"``, full-width ``"３"``) and
numbers of any size, which the database then refuses (a 500). Ids, cursors and page
positions are therefore read as ASCII digits only and range-checked to a signed 64-bit
integer (SQLite's INTEGER and PostgreSQL's BIGINT), or to a narrower column's range.
"""

from __future__ import annotations

INT64_MAX = 2**63 - 1
INT32_MAX = 2**31 - 1


def stored_integer(text: str | None, *, low: int = 0, high: int = INT64_MAX) -> int | None:
    """``text`` as an integer in ``[low, high]`` when it is written in ASCII digits only;
    None when it is absent, empty or anything else."""
    if not text or not text.isascii() or not text.isdigit() or len(text) > 19:
        return None
    value = int(text)
    return value if low <= value <= high else None
