"""A window's accounts split into contiguous ranges of their integer codes, one range per
partition, and the one exchange between partitions: rows fetched from the partitions that
own them.

Accounts are interned once by the closing process (their positions among the window's
sorted ids, :meth:`rolewatch.engine.snapshot.Snapshot.nodes`), so workers never hold
account ids as strings. Partition ``j`` owns the codes ``bounds[j] <= code < bounds[j+1]``,
ranges chosen so each partition gets about the same work (:func:`balanced_bounds`: a range
of equal code counts would give the first partition most of the events wherever the ids'
sort order follows their activity);
a :class:`Partitioned` value is one Dask future per partition. A partition that needs rows
owned by others (its accounts' neighbours' values) asks each owner for exactly the rows it
needs (:func:`fetch`): ``P²`` small pieces, each a block of rows, instead of a hash shuffle
of one row per neighbour pair.
"""

from __future__ import annotations

import operator
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["Partitioned", "balanced_bounds", "fetch", "split_by_range"]


def balanced_bounds(load: np.ndarray, partitions: int) -> np.ndarray:
    """Increasing code bounds splitting the codes ``0 <= code < len(load)`` into at most
    ``partitions`` contiguous ranges of about equal total ``load`` (one number per code).

    Every range but the last ends at the first code where the running total reaches its
    share, so no range holds more than ``total / partitions`` plus one code's load; a code
    heavier than a share leaves a range empty, and empty ranges are dropped (fewer
    partitions). ``load`` must be non-negative with a positive total.
    """
    n = int(load.size)
    running = np.cumsum(load, dtype=np.float64)
    shares = running[-1] * np.arange(1, partitions) / partitions
    inner = np.searchsorted(running, shares, side="left") + 1
    return np.unique(np.concatenate([[0], np.clip(inner, 1, n), [n]]).astype(np.int64))


def split_by_range(codes: np.ndarray, bounds: np.ndarray) -> list[np.ndarray]:
    """Positions of ``codes`` owned by each partition (codes need not be sorted)."""
    owner = np.searchsorted(bounds, codes, side="right") - 1
    order = np.argsort(owner, kind="stable")
    cuts = np.searchsorted(owner[order], np.arange(len(bounds)))
    return [order[cuts[j] : cuts[j + 1]] for j in range(len(bounds) - 1)]


@dataclass(frozen=True)
class Partitioned:
    """One future per partition on ``client``; partition ``j`` owns the codes
    ``bounds[j]`` to ``bounds[j + 1]``."""

    client: Any
    futures: tuple[Any, ...]
    bounds: np.ndarray

    @property
    def partitions(self) -> int:
        return len(self.futures)

    def map(self, function: Callable[..., Any], *args: Any) -> Partitioned:
        """``function(partition, *args)`` on every partition; arguments that are
        :class:`Partitioned` are replaced by their partition of the same number."""
        futures = []
        for j, future in enumerate(self.futures):
            extra = [a.futures[j] if isinstance(a, Partitioned) else a for a in args]
            futures.append(self.client.submit(function, future, *extra, pure=False))
        return Partitioned(self.client, tuple(futures), self.bounds)

    def pieces(self, count: int) -> list[list[Any]]:
        """Each partition's result, a sequence of ``count`` items, as one future per item
        (``[j][i]``: item ``i`` of partition ``j``)."""
        submit = self.client.submit
        return [
            [submit(operator.getitem, future, i, pure=False) for i in range(count)]
            for future in self.futures
        ]

    def gather(self) -> list[Any]:
        """Every partition's value in this process, in partition order."""
        return list(self.client.gather(list(self.futures)))


def fetch(
    owners: Partitioned,
    wanted: list[list[Any]],
    take: Callable[..., Any],
    *args: Any,
) -> list[list[Any]]:
    """Rows each partition needs from each owner: ``[i][j]`` is ``take(owners[j],
    wanted[i][j], *args)``, computed where partition ``j`` lives and moved to ``i``."""
    submit = owners.client.submit
    return [
        [
            submit(take, owner, rows, *args, pure=False)
            for owner, rows in zip(owners.futures, wanted_by_i, strict=True)
        ]
        for wanted_by_i in wanted
    ]
