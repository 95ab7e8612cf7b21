"""A window's event ids as the readers hand them over: an object array of str (built in
Python: ingest, the in-process SQLite read, offline files) or an Arrow string array (the
helper's and PostgreSQL's reads), which holds no Python string per event: about 20 bytes an
id instead of about 70, so a 10,000,000-event window's ids take 200 MB, not 690 MB.

Both are read the same way where the close needs ids: ``len(ids)``, and ``str(ids[i])``
for the few events an alert quotes.
"""

from __future__ import annotations

from typing import TypeAlias

import numpy as np
import pyarrow as pa

__all__ = ["EventIds", "as_event_ids", "ids_at", "reordered"]

EventIds: TypeAlias = np.ndarray | pa.Array


def ids_at(ids: EventIds, rows: np.ndarray) -> np.ndarray:
    """The ids at ``rows`` as a numpy array of str (compared by code point when sorted)."""
    if isinstance(ids, pa.Array):
        return np.array(ids.take(pa.array(rows, type=pa.int64())).to_pylist(), dtype=str)
    return np.asarray(ids[rows]).astype(str)


def as_event_ids(ids: object) -> EventIds:
    """``ids`` as one of the two forms: an Arrow array (chunks combined) stays Arrow,
    anything else becomes an object array."""
    if isinstance(ids, pa.ChunkedArray):
        return ids.combine_chunks()
    if isinstance(ids, pa.Array):
        return ids
    return np.asarray(ids, dtype=object)


def reordered(ids: EventIds, order: np.ndarray) -> EventIds:
    """``ids`` in the order ``order`` gives, in the form :func:`as_event_ids` gives."""
    ids = as_event_ids(ids)
    if isinstance(ids, pa.Array):
        return ids.take(pa.array(order, type=pa.int64()))
    return ids[order]
