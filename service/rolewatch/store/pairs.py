"""The known-pair history: each window's first-seen account pairs, as 64-bit keys.

Whether a counterpart is new to an account is judged against every pair that interacted in
an earlier window (:class:`rolewatch.engine.pairs.KnownPairs`). A window close stores the
keys of its pairs that were not known before it (sorted, 8 bytes each, little-endian), so
the history holds each pair once; the next close reads all of them back.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import sqlalchemy as sa
from sqlalchemy.engine import Connection

from rolewatch.store.schema import pair_history, windows

_WIRE = np.dtype("<u8")


def insert_window_pairs(connection: Connection, window_id: int, keys: np.ndarray) -> None:
    """Keep the keys of the pairs first seen in window ``window_id``."""
    values = np.sort(np.asarray(keys, dtype=np.uint64)).astype(_WIRE)
    connection.execute(
        pair_history.insert().values(
            window_id=window_id, pair_count=int(values.size), pairs=values.tobytes()
        )
    )


def known_pair_parts(connection: Connection, *, before_end_us: int) -> list[np.ndarray]:
    """The stored keys of every window that ends before ``before_end_us``, one array each."""
    rows = connection.execute(
        sa.select(pair_history.c.pairs)
        .join(windows, windows.c.id == pair_history.c.window_id)
        .where(windows.c.end_us < before_end_us)
        .order_by(windows.c.end_us)
    ).scalars()
    return [np.frombuffer(bytes(blob), dtype=_WIRE).astype(np.uint64) for blob in rows]


def known_pair_windows(connection: Connection, *, before_end_us: int) -> list[int]:
    """The ends of the windows before ``before_end_us`` that stored their new pairs, oldest
    first."""
    rows = connection.execute(
        sa.select(windows.c.end_us)
        .join(pair_history, windows.c.id == pair_history.c.window_id)
        .where(windows.c.end_us < before_end_us)
        .order_by(windows.c.end_us)
    ).scalars()
    return [int(end) for end in rows]


class PairWindow(NamedTuple):
    """One window's part of the stored history, named without reading it: a part whose
    window, record or size differ is a different part."""

    end_us: int
    window_id: int
    pair_count: int


def pair_window_parts(connection: Connection, *, before_end_us: int) -> list[PairWindow]:
    """The parts of the history before ``before_end_us``, oldest first (their keys not
    read)."""
    rows = connection.execute(
        sa.select(windows.c.end_us, windows.c.id, pair_history.c.pair_count)
        .join(pair_history, windows.c.id == pair_history.c.window_id)
        .where(windows.c.end_us < before_end_us)
        .order_by(windows.c.end_us)
    ).all()
    return [PairWindow(int(end), int(window_id), int(count)) for end, window_id, count in rows]


def window_pair_keys(connection: Connection, *, end_us: int) -> np.ndarray:
    """The stored new pairs of the window ending at ``end_us`` (none when it stored none)."""
    blob = connection.execute(
        sa.select(pair_history.c.pairs)
        .join(windows, windows.c.id == pair_history.c.window_id)
        .where(windows.c.end_us == end_us)
    ).scalar()
    if blob is None:
        return np.zeros(0, dtype=np.uint64)
    return np.frombuffer(bytes(blob), dtype=_WIRE).astype(np.uint64)
