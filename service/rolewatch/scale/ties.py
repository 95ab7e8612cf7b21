"""A window's tie cells counted on the Dask cluster, partition by partition, against a
known-pair history split by key range across the workers.

The quantities are those of :func:`rolewatch.engine.ties.tie_counts` (each account's
distinct counterparts by direction, known or new to it; its counterparts in either
direction and the new ones among them; the keys of the window's first-seen pairs), computed
without the window's pairs or the whole history in one process:

* each partition's block (:class:`rolewatch.scale.graph_steps.Block`) lists its accounts'
  neighbours once (``all``), so the key of every pair it touches is made where the block
  lives, from its own accounts' keys and its neighbours' keys fetched from their owners
  (:func:`rolewatch.engine.pairs.pair_keys`: the same keys the local engine makes);
* the history is cut into as many contiguous key ranges as there are partitions, each range
  one value on the cluster: a :class:`rolewatch.engine.pairs.KnownPairs` the closing process
  holds is sent cut into ranges of about the same number of keys; a close's history
  (:class:`PairsOnCluster`) is placed in ranges of the key space and kept there for the next
  close, which adds only the windows closed since (:mod:`rolewatch.scale.held_pairs`): an
  :class:`ArchivedPairs` (every earlier window's first-seen pairs in the Parquet outputs) is
  read on the workers, each range from the row groups of every window's file that reach
  into it, so the closing process never holds the history; a
  :class:`rolewatch.scale.stored_pairs.StoredPairs` is read from the store and sent. A
  partition sends each range only the keys that fall in it and gets back which of them are
  known (a binary search there), so no worker holds more of the history than its ranges;
* a pair whose two accounts live in different partitions is looked up by both (each needs
  its own account's cells); the window's new pairs are collected per key range, where
  both copies meet and one is kept, so the ranges' sorted parts laid end to end are the
  local engine's ``new_pairs``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp

from rolewatch.engine.pairs import KnownPairs, PairHistory, pair_keys
from rolewatch.engine.sorting import unique_sorted
from rolewatch.engine.ties import TieCounts
from rolewatch.scale import graph_steps as steps
from rolewatch.scale.graph import WindowGraph
from rolewatch.scale.partitions import Partitioned, fetch
from rolewatch.scale.workers import live_workers

__all__ = [
    "ArchivedPairs",
    "KnownRanges",
    "PairsOnCluster",
    "PendingTies",
    "count_ties",
    "known_ranges",
]


@dataclass(frozen=True)
class KnownRanges:
    """The known-pair history on the cluster: ``chunks[k]`` holds the sorted keys ``starts
    [k - 1] <= key < starts[k]`` (the first range from the lowest key, the last to the
    highest)."""

    chunks: tuple[Any, ...]
    starts: np.ndarray

    @property
    def ranges(self) -> int:
        return len(self.chunks)


def known_ranges(client: Any, known: PairHistory, ranges: int) -> KnownRanges:
    """The history ``known`` on the workers in at most ``ranges`` key ranges: a
    :class:`KnownPairs` is sent cut into ranges of about equal size (an empty history is one
    empty range); a :class:`PairsOnCluster` is placed there (or already is)."""
    if isinstance(known, PairsOnCluster):
        return known.ranges_on(client, ranges)
    if not isinstance(known, KnownPairs):
        raise TypeError(f"cannot send a {type(known).__name__} to the workers")
    keys = known.keys
    count = max(1, min(ranges, keys.size))
    cuts = np.linspace(0, keys.size, count + 1).astype(np.int64)
    # keys are unique, so the cut keys increase and each range starts at its first key
    starts = keys[cuts[1:-1]].astype(np.uint64)
    parts = [keys[lo:hi] for lo, hi in zip(cuts[:-1], cuts[1:], strict=True)]
    return KnownRanges(tuple(client.scatter(parts, hash=False)), starts)


class PairsOnCluster:
    """A known-pair history placed on the cluster in key ranges the first time a close asks
    for it (:meth:`ranges_on`; how is the subclass's :meth:`_place`), so the tie counts and
    the evidence's look-ups (:meth:`contains`) share one placing, and kept there after it for
    the next close, which adds only the windows closed since
    (:mod:`rolewatch.scale.held_pairs`)."""

    def __init__(self, client: Any) -> None:
        self.client = client
        self._ranges: KnownRanges | None = None

    def _place(self, client: Any, count: int) -> KnownRanges:
        raise NotImplementedError

    def _is_empty(self) -> bool:
        raise NotImplementedError

    def ranges_on(self, client: Any, ranges: int) -> KnownRanges:
        """The history on the workers in about ``ranges`` key ranges (the first call's;
        later calls reuse them)."""
        if self._ranges is None:
            self._ranges = self._place(client, max(1, ranges))
        return self._ranges

    def forget_ranges(self) -> None:
        """Drop the ranges placed so far, and those kept for later closes (the next use
        places the history whole again)."""
        from rolewatch.scale.held_pairs import forget_held_pairs

        self._ranges = None
        forget_held_pairs()

    def contains(self, keys) -> np.ndarray:
        """Which of ``keys`` the history holds (looked up on the workers; placed again once
        if the cluster lost the ranges placed before)."""
        from concurrent.futures import CancelledError

        from distributed.comm.core import CommClosedError
        from distributed.scheduler import KilledWorker

        query = np.asarray(keys, dtype=np.uint64).reshape(-1)
        if query.size == 0 or self._is_empty():
            return np.zeros(query.size, dtype=bool)
        try:
            return self._look_up(query)
        except (CancelledError, KilledWorker, CommClosedError):
            self.forget_ranges()
            return self._look_up(query)

    def _look_up(self, query: np.ndarray) -> np.ndarray:
        history = self.ranges_on(self.client, self._default_ranges())
        in_range = np.searchsorted(history.starts, query, side="right")
        found = np.zeros(query.size, dtype=bool)
        asked = [np.flatnonzero(in_range == k) for k in range(history.ranges)]
        answers = self.client.gather(
            [
                self.client.submit(_known_among, history.chunks[k], query[rows], pure=False)
                for k, rows in enumerate(asked)
            ]
        )
        for rows, answer in zip(asked, answers, strict=True):
            found[rows] = answer
        return found

    def new_keys(self, keys) -> np.ndarray:
        """The distinct keys among ``keys`` that the history does not hold, sorted."""
        distinct = unique_sorted(np.asarray(keys, dtype=np.uint64))
        return distinct[~self.contains(distinct)]

    def _default_ranges(self) -> int:
        return max(1, len(live_workers(self.client)))


class ArchivedPairs(PairsOnCluster):
    """A known-pair history the closing process never holds: the first-seen pairs of the
    windows ``window_ends``, kept in the Parquet outputs at ``outputs``
    (:mod:`rolewatch.scale.pair_outputs`), read on the workers one key range each.

    The ranges split the 64-bit key space evenly (pair keys are hashes, so each holds about
    the same share of the history); the first close reads every window's file, a later
    close of the same process only the windows closed since
    (:func:`rolewatch.scale.held_pairs.archived_ranges`).
    """

    def __init__(self, client: Any, outputs: str, window_ends: list[int]) -> None:
        super().__init__(client)
        self.outputs = outputs
        self.window_ends = list(window_ends)

    def _place(self, client: Any, count: int) -> KnownRanges:
        from rolewatch.scale.held_pairs import archived_ranges

        return archived_ranges(client, self.outputs, self.window_ends, count)

    def _is_empty(self) -> bool:
        return not self.window_ends


def _take_keys(keys: np.ndarray, rows: np.ndarray) -> np.ndarray:
    return keys[rows]


@dataclass(frozen=True, eq=False)
class _Queries:
    """A block's pair keys (one per entry of ``block.all``) grouped by key range:
    ``order`` lists the entries range by range, ``cuts[k]:cuts[k + 1]`` of it are range
    ``k``'s."""

    order: np.ndarray
    cuts: np.ndarray

    def __sizeof__(self) -> int:
        return 256 + self.order.nbytes + self.cuts.nbytes


def _pair_queries(
    block: steps.Block, own: np.ndarray, starts: np.ndarray, *fetched: np.ndarray
) -> tuple:
    """``(queries, keys of range 0, keys of range 1, ...)`` for one block."""
    neighbour_keys = np.concatenate(fetched) if fetched else np.zeros(0, dtype=np.uint64)
    entry_row = np.repeat(np.arange(block.rows), np.diff(block.all.indptr))
    keys = pair_keys(own[entry_row], neighbour_keys[block.all.indices])
    in_range = np.searchsorted(starts, keys, side="right")
    order = np.argsort(in_range, kind="stable")
    cuts = np.searchsorted(in_range[order], np.arange(starts.size + 2))
    grouped = keys[order]
    pieces = [grouped[cuts[k] : cuts[k + 1]] for k in range(starts.size + 1)]
    return (_Queries(order, cuts), *pieces)


def _known_among(chunk: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """Which of ``keys`` one range of the history holds."""
    return KnownPairs(chunk).contains(keys)


def _tie_cells(block: steps.Block, queries: _Queries, *known: np.ndarray) -> tuple:
    """``(cells, counterparts, new_counterparts)`` of a block's accounts, from the
    known flags of its entries' keys (one array per range, in the queries' order)."""
    entry_known = np.zeros(block.all.nnz, dtype=bool)
    entry_known[queries.order] = np.concatenate(known) if known else np.zeros(0, dtype=bool)
    shape = block.all.shape
    known_entries = sp.csr_matrix(
        (entry_known.astype(np.int8), block.all.indices, block.all.indptr), shape=shape
    )

    def known_per_row(pattern: sp.csr_matrix) -> np.ndarray:
        ones = sp.csr_matrix(
            (np.ones(pattern.nnz, dtype=np.int8), pattern.indices, pattern.indptr), shape=shape
        )
        return np.asarray(ones.multiply(known_entries).sum(axis=1), dtype=np.int64).ravel()

    out_degree = np.diff(block.out.indptr).astype(np.int64)
    in_degree = np.diff(block.inn.indptr).astype(np.int64)
    counterparts = np.diff(block.all.indptr).astype(np.int64)
    out_known, in_known = known_per_row(block.out), known_per_row(block.inn)
    cells = np.column_stack([out_known, out_degree - out_known, in_known, in_degree - in_known])
    row_of_entry = np.repeat(np.arange(block.rows), np.diff(block.all.indptr))
    known_counterparts = np.bincount(row_of_entry[entry_known], minlength=block.rows)
    return cells, counterparts, counterparts - known_counterparts


def _new_in_range(*pieces: np.ndarray) -> np.ndarray:
    """The distinct unknown keys of one range, sorted: ``pieces`` alternate every block's
    keys in the range and their known flags."""
    unknown = [keys[~flags] for keys, flags in zip(pieces[::2], pieces[1::2], strict=True)]
    if not unknown:
        return np.zeros(0, dtype=np.uint64)
    return unique_sorted(np.concatenate(unknown).astype(np.uint64))


@dataclass(frozen=True)
class PendingTies:
    """Tie cells being counted on the cluster: every partition's cells and every key
    range's new pairs (futures); :meth:`result` gathers them."""

    cells: tuple[Any, ...]
    new_pairs: tuple[Any, ...]
    client: Any

    @property
    def futures(self) -> list[Any]:
        return [*self.cells, *self.new_pairs]

    def result(self) -> TieCounts:
        """The window's :class:`~rolewatch.engine.ties.TieCounts`, in code order."""
        parts = self.client.gather(list(self.cells))
        new_pairs = self.client.gather(list(self.new_pairs))
        return TieCounts(
            cells=np.concatenate([cells for cells, _c, _n in parts]).astype(np.int64),
            counterparts=np.concatenate([c for _cells, c, _n in parts]).astype(np.int64),
            new_counterparts=np.concatenate([n for _cells, _c, n in parts]).astype(np.int64),
            new_pairs=np.concatenate(new_pairs).astype(np.uint64),
        )


def count_ties(graph: WindowGraph, node_keys: np.ndarray, known: PairHistory) -> PendingTies:
    """Start counting the tie cells of the window on ``graph`` (its accounts' keys
    ``node_keys`` in code order) against ``known``; returns at once."""
    blocks = graph.blocks
    client, bounds, p = blocks.client, blocks.bounds, blocks.partitions
    keys = Partitioned(
        client,
        tuple(client.scatter([node_keys[bounds[j] : bounds[j + 1]] for j in range(p)], hash=False)),
        bounds,
    )
    history = known_ranges(client, known, p)
    fetched = fetch(keys, graph.wanted, _take_keys)
    r = history.ranges
    queries = [
        client.submit(
            _pair_queries,
            blocks.futures[i],
            keys.futures[i],
            history.starts,
            *fetched[i],
            pure=False,
        )
        for i in range(p)
    ]
    pieces = Partitioned(client, tuple(queries), bounds).pieces(r + 1)
    flags = [
        [
            client.submit(_known_among, history.chunks[k], pieces[i][k + 1], pure=False)
            for k in range(r)
        ]
        for i in range(p)
    ]
    cells = tuple(
        client.submit(_tie_cells, blocks.futures[i], pieces[i][0], *flags[i], pure=False)
        for i in range(p)
    )
    new_pairs = tuple(
        client.submit(
            _new_in_range,
            *[item for i in range(p) for item in (pieces[i][k + 1], flags[i][k])],
            pure=False,
        )
        for k in range(r)
    )
    return PendingTies(cells, new_pairs, client)
