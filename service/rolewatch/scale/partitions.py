"""Tables split into partitions by account on a Dask cluster, and the hash shuffle that
moves rows to the partition owning their key.

A :class:`Partitioned` table is a list of Dask futures, one pandas DataFrame per partition;
partition ``j`` holds the rows whose key account hashes to ``j``
(:func:`pandas.util.hash_array`, the same in every process). Each step is a Dask task on
one partition, so no process ever holds a whole table; a shuffle is one split task per
input partition and one concatenation per output partition (``P²`` pieces moved between
workers, each only once).
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["Partitioned", "owner", "shuffle", "split_by_owner"]


def owner(keys: np.ndarray | pd.Index | pd.Series, partitions: int) -> np.ndarray:
    """The partition owning each account id."""
    values = np.asarray(keys, dtype=object)
    if values.size == 0:
        return np.zeros(0, dtype=np.int64)
    hashed = pd.util.hash_array(values, categorize=False)
    return (hashed % np.uint64(partitions)).astype(np.int64)


def split_by_owner(frame: pd.DataFrame, column: str | None, partitions: int) -> tuple:
    """``frame``'s rows split by the owner of ``column`` (None: of the index)."""
    keys = frame.index if column is None else frame[column]
    parts = owner(keys, partitions)
    order = np.argsort(parts, kind="stable")
    bounds = np.searchsorted(parts[order], np.arange(partitions + 1))
    return tuple(frame.iloc[order[bounds[j] : bounds[j + 1]]] for j in range(partitions))


def _concat(pieces: Sequence[pd.DataFrame]) -> pd.DataFrame:
    return pd.concat(list(pieces))


@dataclass(frozen=True)
class Partitioned:
    """One future per partition on ``client``; see the module description."""

    client: Any
    futures: tuple[Any, ...]

    @property
    def partitions(self) -> int:
        return len(self.futures)

    def map(self, function: Callable[..., pd.DataFrame], *args: Any, **kwargs: Any) -> Partitioned:
        """``function(partition, *args)`` on every partition; futures among ``args`` that are
        :class:`Partitioned` are replaced by their partition of the same number."""
        futures = []
        for j, future in enumerate(self.futures):
            extra = [a.futures[j] if isinstance(a, Partitioned) else a for a in args]
            futures.append(self.client.submit(function, future, *extra, pure=False, **kwargs))
        return Partitioned(self.client, tuple(futures))

    def gather(self) -> pd.DataFrame:
        """All partitions in this process (only for per-account results)."""
        return pd.concat(self.client.gather(list(self.futures)))


def shuffle(table: Partitioned, column: str | None) -> Partitioned:
    """``table``'s rows moved to the partition owning ``column`` (None: the index)."""
    client, p = table.client, table.partitions
    splits = [
        client.submit(split_by_owner, future, column, p, pure=False) for future in table.futures
    ]
    pieces = [
        [client.submit(operator.getitem, split, j, pure=False) for split in splits]
        for j in range(p)
    ]
    return Partitioned(client, tuple(client.submit(_concat, row, pure=False) for row in pieces))
