"""A window's event ids as the readers hand them over: an object array of str (built in
Python: ingest, the in-process SQLite read, offline files) or an Arrow string array (the
helper's and PostgreSQL's reads), which holds no Python string per event: about 20 bytes an
id instead of about 70, so a 10,000,000-event window's ids take 200 MB, not 690 MB.

Both are read the same way where the close needs ids: ``len(ids)``, and ``str(ids[i])``
for the few events an alert quotes. A large window's ids can be kept in a file on local disk
instead, memory-mapped (:func:`kept_on_disk`): the close reads only those few.
"""

from __future__ import annotations

import os
import tempfile
from typing import TypeAlias

import numpy as np
import pyarrow as pa

__all__ = ["EventIds", "as_event_ids", "ids_at", "kept_on_disk", "reordered"]

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


def kept_on_disk(ids: EventIds, directory: str | None = None) -> pa.Array:
    """``ids`` as an Arrow string array whose bytes are in a file on local disk, mapped into
    memory, not in this process's heap.

    A window's ids are read only for the few events an alert quotes, so almost none of the
    file's pages are ever loaded: a 30,000,000-event window's ids (about 600 MB) stop
    counting against the closing process, and the operating system can drop the pages it
    read without swapping. The file (in ``directory``, or the system's temporary directory)
    is unlinked as soon as it is mapped: nothing is left behind whatever ends the process,
    and its disk space is returned when the array is let go. On a memory-backed directory
    (tmpfs) this saves nothing.
    """
    ids = as_event_ids(ids)
    array = ids if isinstance(ids, pa.Array) else pa.array(ids, type=pa.large_string())
    handle, path = tempfile.mkstemp(prefix="rolewatch-event-ids-", suffix=".arrow", dir=directory)
    os.close(handle)
    try:
        batch = pa.record_batch([array], names=["id"])
        with pa.OSFile(path, "wb") as sink, pa.ipc.new_file(sink, batch.schema) as writer:
            writer.write_batch(batch)
        # the array's buffers hold the map: it outlives the file's name and this handle
        return pa.ipc.open_file(pa.memory_map(path, "r")).get_batch(0).column(0)
    finally:
        os.unlink(path)
