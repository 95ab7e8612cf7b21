"""Each window's first-seen account pairs beside its memberships in the Parquet outputs, so a
Dask close reads the known-pair history on the workers, one key range each.

Layout::

    OUTPUTS/window_end_us=1768435200000000/pairs.parquet

One column, ``pair_key`` (uint64: :func:`rolewatch.engine.pairs.pair_keys`), the window's
pairs that no earlier window had (the part of the history the store keeps for it,
:mod:`rolewatch.store.pairs`), sorted and unique, in row groups of :data:`ROW_GROUP` keys
with min/max statistics: a read of one key range decodes only the row groups that reach
into it. The file is written with the window's memberships, inside its store transaction (a
retried close writes it again, the same keys).
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from rolewatch.engine.sorting import merged_sorted
from rolewatch.scale.outputs import window_file

__all__ = [
    "PAIRS_FILE",
    "ROW_GROUP",
    "pair_range",
    "pair_windows",
    "with_window_pairs",
    "write_window_pairs",
]

PAIRS_FILE = "pairs.parquet"
# 1 MB of keys a row group: a range read decodes at most two groups it does not need whole
# (common practice, no source).
ROW_GROUP = 131_072
_SCHEMA = pa.schema([("pair_key", pa.uint64())])


def write_window_pairs(path: str, window_end_us: int, keys: np.ndarray) -> int:
    """Write (or replace) one window's first-seen pairs; return the keys written."""
    values = np.unique(np.asarray(keys, dtype=np.uint64))
    filesystem, file = window_file(path, window_end_us, PAIRS_FILE)
    filesystem.create_dir(file.rsplit("/", 1)[0], recursive=True)
    pq.write_table(
        pa.table({"pair_key": pa.array(values, pa.uint64())}, schema=_SCHEMA),
        file,
        filesystem=filesystem,
        row_group_size=ROW_GROUP,
        write_statistics=True,
    )
    return int(values.size)


def pair_windows(path: str, window_ends: Iterable[int]) -> set[int]:
    """Which of ``window_ends`` have a pairs file in the outputs at ``path``."""
    ends = [int(end) for end in window_ends]
    if not ends:
        return set()
    filesystem, _ = window_file(path, ends[0], PAIRS_FILE)
    names = [window_file(path, end, PAIRS_FILE)[1] for end in ends]
    found = filesystem.get_file_info(names)
    return {end for end, info in zip(ends, found, strict=True) if info.type == pa.fs.FileType.File}


def _range_of_file(file: pq.ParquetFile, low: int, high: int | None) -> np.ndarray:
    """The keys ``low <= key < high`` (no upper bound when None) of one sorted file."""
    metadata = file.metadata
    groups = []
    for index in range(metadata.num_row_groups):
        stats = metadata.row_group(index).column(0).statistics
        if stats is not None and stats.has_min_max:
            if int(stats.max) < low or (high is not None and int(stats.min) >= high):
                continue
        groups.append(index)
    if not groups:
        return np.zeros(0, dtype=np.uint64)
    keys = file.read_row_groups(groups, columns=["pair_key"]).column(0)
    values = np.asarray(keys.to_numpy(), dtype=np.uint64)
    first = np.searchsorted(values, np.uint64(low), side="left")
    last = values.size if high is None else np.searchsorted(values, np.uint64(high), side="left")
    return values[first:last]


def pair_range(path: str, window_ends: Iterable[int], low: int, high: int | None) -> np.ndarray:
    """The known pairs ``low <= key < high`` of the windows ``window_ends`` (each must have
    its file), sorted and unique: one range of the history they make together."""
    parts = []
    for end in window_ends:
        filesystem, name = window_file(path, end, PAIRS_FILE)
        with filesystem.open_input_file(name) as handle:
            parts.append(_range_of_file(pq.ParquetFile(handle), low, high))
    if not parts:
        return np.zeros(0, dtype=np.uint64)
    merged = np.concatenate(parts)
    del parts
    merged.sort()
    if merged.size < 2:
        return merged
    return merged[np.r_[True, merged[1:] != merged[:-1]]]


def with_window_pairs(
    keys: np.ndarray, path: str, window_ends: Iterable[int], low: int, high: int | None
) -> np.ndarray:
    """The sorted range ``keys`` with the pairs ``low <= key < high`` of the windows
    ``window_ends`` merged in (each must have its file): the same range of the history
    they make together, read from those windows' files only."""
    return merged_sorted(keys, pair_range(path, window_ends, low, high))
