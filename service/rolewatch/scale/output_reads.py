"""Reading the per-window Parquet outputs (:mod:`rolewatch.scale.outputs`) back: one
account's rows over many windows, and one whole window as the store would give it.

One account's history uses a small index per window file: the footer is read once and the
first and last account of every row group kept in memory (the files are sorted by account,
so those bounds are sorted too). A look-up is then one binary search and one row-group read
per window, the windows' reads spread over a few threads (Parquet decoding runs without the
GIL); ``rolewatch bench archive-history-52`` measures it beside one pyarrow dataset scan with
a filter on ``account``. A closed window's file never changes (a retried close rewrites it
before the window's store transaction commits), so the index is kept for the life of the
process.
"""

from __future__ import annotations

import threading
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from rolewatch.scale.outputs import (
    MEMBERSHIPS_FILE,
    OUTPUT_SCHEMA,
    PARTITION,
    TIE_COLUMNS,
    window_file,
)
from rolewatch.store.memberships import MIXTURE_DECIMALS, StoredWindow

__all__ = [
    "OutputIndex",
    "account_history",
    "archived_window_ends",
    "output_index",
    "stored_window",
]

HISTORY_COLUMNS = [name for name in OUTPUT_SCHEMA.names if name not in TIE_COLUMNS + ("community",)]


@dataclass(frozen=True)
class _WindowFile:
    """One window's open file and the account bounds of its row groups."""

    file: pq.ParquetFile
    first: np.ndarray  # str, the first account of each row group
    last: np.ndarray  # str, the last account of each row group
    lock: threading.Lock = field(default_factory=threading.Lock)  # one read of the file at once


def _open_window(path: str, end_us: int) -> _WindowFile | None:
    filesystem, name = window_file(path, end_us)
    try:
        file = pq.ParquetFile(filesystem.open_input_file(name))
    except FileNotFoundError:
        return None
    metadata = file.metadata
    column = metadata.schema.names.index("account")
    groups = range(metadata.num_row_groups)
    bounds = [metadata.row_group(i).column(column).statistics for i in groups]
    if all(stats is not None and stats.has_min_max for stats in bounds):
        first = [stats.min for stats in bounds]
        last = [stats.max for stats in bounds]
    else:  # a writer that left statistics out (or dropped them for long ids): read the ids
        accounts = file.read(columns=["account"]).column("account").to_numpy(zero_copy_only=False)
        sizes = np.array([metadata.row_group(i).num_rows for i in groups], dtype=np.int64)
        ends = np.cumsum(sizes)
        first = accounts[ends - sizes].tolist()
        last = [accounts[end - 1] for end in ends]
    return _WindowFile(file=file, first=np.array(first, dtype=str), last=np.array(last, dtype=str))


class OutputIndex:
    """The outputs at ``path`` with every window file's row-group bounds kept in memory."""

    def __init__(self, path: str) -> None:
        self.path = path
        self._files: dict[int, _WindowFile] = {}
        self._lock = threading.Lock()

    def window(self, end_us: int) -> _WindowFile | None:
        """The window's file (None when it was never written)."""
        with self._lock:
            found = self._files.get(end_us)
        if found is None:
            found = _open_window(self.path, end_us)
            if found is not None:
                with self._lock:
                    self._files[end_us] = found
        return found

    def account_rows(self, account: str, window_ends: list[int]) -> dict[int, dict[str, Any]]:
        """``{window end: row}`` for the windows among ``window_ends`` in which ``account``
        has a row; each row holds :data:`HISTORY_COLUMNS` with the mixture as
        ``{role id (str): share}`` rounded as the store rounds it."""

        def row_in(end_us: int) -> dict[str, Any] | None:
            window = self.window(end_us)
            return None if window is None else _row_of(window, account)

        rows = _readers().map(row_in, window_ends)
        return {end: row for end, row in zip(window_ends, rows, strict=True) if row is not None}


def _row_of(window: _WindowFile, account: str) -> dict[str, Any] | None:
    group = int(np.searchsorted(window.first, account, side="right")) - 1
    if group < 0 or window.last[group] < account:
        return None
    with window.lock:
        table = window.file.read_row_group(group, columns=HISTORY_COLUMNS, use_threads=False)
    accounts = table.column("account").to_numpy(zero_copy_only=False)
    at = int(np.searchsorted(accounts, account))
    if at >= len(accounts) or accounts[at] != account:
        return None
    row = table.slice(at, 1).to_pylist()[0]
    row["mixture"] = {
        str(role): round(share, MIXTURE_DECIMALS) for role, share in row["mixture"] or []
    }
    return row


_INDEXES: dict[str, OutputIndex] = {}
_INDEXES_LOCK = threading.Lock()
_READERS: list[ThreadPoolExecutor] = []
READ_THREADS = 4


def _readers() -> ThreadPoolExecutor:
    """The threads that read windows' row groups, started on first use."""
    with _INDEXES_LOCK:
        if not _READERS:
            _READERS.append(ThreadPoolExecutor(READ_THREADS, thread_name_prefix="outputs"))
        return _READERS[0]


def output_index(path: str) -> OutputIndex:
    """This process's one :class:`OutputIndex` of ``path``."""
    with _INDEXES_LOCK:
        return _INDEXES.setdefault(path, OutputIndex(path))


def archived_window_ends(path: str) -> list[int]:
    """The window ends whose memberships file is in the outputs, oldest first (one listing
    of the folders' files: a folder holding only a window's pairs, closed before the
    outputs were set, is not listed, and no read tries to open its memberships)."""
    filesystem, name = window_file(path, 0)
    root = name.rsplit("/", 2)[0]
    selector = pa.fs.FileSelector(root, allow_not_found=True, recursive=True)
    ends = []
    for info in filesystem.get_file_info(selector):
        if info.type != pa.fs.FileType.File or info.base_name != MEMBERSHIPS_FILE:
            continue
        parent, folder, _file = info.path.rsplit("/", 2)
        key, _, value = folder.partition("=")
        if parent == root and key == PARTITION and value.isdigit():
            ends.append(int(value))
    return sorted(ends)


def account_history(
    outputs: str | OutputIndex, account: str, *, limit: int = 52
) -> list[dict[str, Any]]:
    """One account's rows in its last ``limit`` archived windows, newest first, each with
    its ``window_end_us`` (``outputs``: a path, or an index kept between calls)."""
    index = output_index(outputs) if isinstance(outputs, str) else outputs
    found = index.account_rows(account, archived_window_ends(index.path))
    ends = sorted(found, reverse=True)[:limit]
    return [{**found[end], PARTITION: end} for end in ends]


def stored_window(path: str, end_us: int, role_ids: Sequence[str]) -> StoredWindow:
    """One window's memberships read from its file, laid out as
    :func:`rolewatch.store.memberships.window_columns` reads them from the store (mixtures
    in the columns of ``role_ids``, rounded to the store's decimals, NaN for unknown tie
    cells, -1 for no community); no rows when the window has no file."""
    filesystem, name = window_file(path, end_us)
    try:
        table = pq.read_table(name, filesystem=filesystem, use_threads=False)
    except FileNotFoundError:
        table = OUTPUT_SCHEMA.empty_table()

    def numbers(name: str) -> np.ndarray:
        return table.column(name).to_numpy(zero_copy_only=False).astype(np.float64)

    return StoredWindow(
        accounts=np.asarray(table.column("account").to_pylist(), dtype=object),
        mixture=_mixture_rows(table.column("mixture"), role_ids),
        status=np.asarray(table.column("status").to_pylist(), dtype=object),
        events_out=numbers("events_out"),
        events_in=numbers("events_in"),
        counterparts=numbers("counterparts"),
        new_counterparts=numbers("new_counterparts"),
        ties=np.column_stack([numbers(name) for name in TIE_COLUMNS]).reshape(-1, 4),
        community=pc.fill_null(table.column("community"), -1).to_numpy().astype(np.int64),
    )


def _mixture_rows(column: pa.ChunkedArray, role_ids: Sequence[str]) -> np.ndarray:
    """Each row's shares in the columns of ``role_ids``, rounded to the store's decimals
    (0 where the row lacks a role; roles not in the list are dropped), row-major."""
    flat = pa.concat_arrays(column.chunks) if column.num_chunks else pa.array([], column.type)
    offsets = flat.offsets.to_numpy()
    shares = np.zeros((len(flat), len(role_ids)))
    if not len(flat):
        return shares
    entries = slice(int(offsets[0]), int(offsets[-1]))  # keys and items of the rows held
    roles, at = np.unique(flat.keys.to_numpy()[entries], return_inverse=True)
    column_of = {role_id: j for j, role_id in enumerate(role_ids)}
    columns = np.array([column_of.get(role, -1) for role in roles.astype(str)], dtype=np.int64)[at]
    rows = np.repeat(np.arange(len(flat)), np.diff(offsets))
    kept = columns >= 0
    values = np.round(flat.items.to_numpy()[entries], MIXTURE_DECIMALS)
    shares[rows[kept], columns[kept]] = values[kept]
    return shares
