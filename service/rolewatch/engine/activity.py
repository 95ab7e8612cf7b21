"""Activity counts and counterparts: the plain numbers an analyst reads beside a role shift.

Everything here is computed with sparse matrix operations on a :class:`Snapshot`. Which
counterparts are new is told by the known-pair history
(:class:`rolewatch.engine.pairs.KnownPairs`) or, without one, by the previous snapshot.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from rolewatch.engine.pairs import PairHistory, pair_keys
from rolewatch.engine.snapshot import Snapshot


@dataclass(frozen=True)
class Activity:
    """Per-node counts for one snapshot, in the snapshot's node order.

    Attributes
    ----------
    events_out, events_in : ndarray of int
        Events the account sent / received.
    counterparts : ndarray of int
        Distinct accounts it interacted with, in either direction.
    new_counterparts : ndarray of int
        Counterparts it had no interaction with in the previous snapshot (all of them when
        no previous snapshot is given).
    """

    events_out: np.ndarray
    events_in: np.ndarray
    counterparts: np.ndarray
    new_counterparts: np.ndarray

    @property
    def events(self) -> np.ndarray:
        """Events the account sent or received (the activity that sets its stratum)."""
        return self.events_out + self.events_in


def _undirected_pattern(snapshot: Snapshot) -> sp.csr_matrix:
    pattern = (snapshot.counts != 0).astype(np.int8)
    both = (pattern + pattern.T).tocsr()
    both.data[:] = 1
    return both


def _pattern_in_node_space(previous: Snapshot, current: Snapshot) -> sp.csr_matrix:
    """The previous snapshot's undirected ties, re-indexed onto ``current``'s nodes."""
    mapping = current.index_of(previous.nodes)
    prev = _undirected_pattern(previous).tocoo()
    rows, cols = mapping[prev.row], mapping[prev.col]
    keep = (rows >= 0) & (cols >= 0)
    n = current.n_nodes
    return sp.csr_matrix(
        (np.ones(int(keep.sum()), dtype=np.int8), (rows[keep], cols[keep])), shape=(n, n)
    )


def activity_counts(snapshot: Snapshot, previous: Snapshot | None = None) -> Activity:
    """Events out/in, distinct counterparts and new counterparts for every node.

    Parameters
    ----------
    snapshot : Snapshot
        The current window.
    previous : Snapshot, optional
        The window before; without it every counterpart counts as new.

    Returns
    -------
    Activity
        In ``snapshot``'s node order.
    """
    events_out = np.asarray(snapshot.counts.sum(axis=1)).ravel().round().astype(np.int64)
    events_in = np.asarray(snapshot.counts.sum(axis=0)).ravel().round().astype(np.int64)
    current = _undirected_pattern(snapshot)
    counterparts = np.diff(current.indptr).astype(np.int64)
    if previous is None or previous.n_nodes == 0:
        new = counterparts.copy()
    else:
        known = current.multiply(_pattern_in_node_space(previous, snapshot)).tocsr()
        known.eliminate_zeros()
        new = counterparts - np.diff(known.indptr)
    return Activity(events_out, events_in, counterparts, new)


# Counterpart entries (out and in) of the accounts one listing sorts at once: the top
# counterparts of thousands of busy alerted accounts are listed in groups this large
# (common practice, no source).
TOP_GROUP_ENTRIES = 1 << 21


class Counterparts:
    """Who each account dealt with in a snapshot, ready for many per-account look-ups.

    The previous window's neighbour pattern is built once; each listing takes its accounts'
    rows of the window's counts and weights, and their columns (one pass over the matrix),
    so listing the top counterparts of thousands of alerted accounts costs a few slices and
    never a transposed copy of the whole window's graph.

    Parameters
    ----------
    snapshot : Snapshot
        The current window.
    previous : Snapshot, optional
        The window before, to flag counterparts that are new.
    known : PairHistory, optional
        The known-pair history; when given, a counterpart is new when the pair never
        interacted in any earlier window (``previous`` is then not needed).
    """

    def __init__(
        self,
        snapshot: Snapshot,
        previous: Snapshot | None = None,
        *,
        known: PairHistory | None = None,
    ) -> None:
        self.snapshot = snapshot
        self.previous = previous
        self.known = known
        self._keys = snapshot.node_keys if known is not None else None
        self._counts = snapshot.counts.tocsr()
        self._weights = snapshot.weights.tocsr()
        self._in_degree: np.ndarray | None = None  # stored entries per column, when needed
        self._known = (
            _pattern_in_node_space(previous, snapshot).tocsr()
            if previous is not None and previous.n_nodes
            else None
        )

    def top(self, row: int, *, top: int = 10) -> list[dict]:
        """The accounts ``row`` dealt with most, by event count then weight.

        Parameters
        ----------
        row : int
            The account's row in the snapshot.
        top : int
            Most counterparts listed.

        Returns
        -------
        list of dict
            ``{"account", "direction" (out|in|both), "events", "weight", "new"}`` per
            counterpart, most events first, then most weight; ``new`` means no
            interaction with that account in any earlier window of the known history (or,
            without one, in the previous snapshot).
        """
        return self.top_of(np.array([row]), top=top)[0]

    def top_of(self, rows: np.ndarray, *, top: int = 10) -> list[list[dict]]:
        """:meth:`top` for many rows at once: one slice of each matrix and one sort per group
        of rows holding at most :data:`TOP_GROUP_ENTRIES` counterpart entries, so the
        evidence of a thousand alerts costs a few array operations.

        Parameters
        ----------
        rows : array of int
            Rows of the snapshot.
        top : int
            Most counterparts listed per row.

        Returns
        -------
        list of list of dict
            One list per row, in ``rows`` order, as :meth:`top` returns it.
        """
        rows = np.asarray(rows, dtype=np.int64).reshape(-1)
        if rows.size == 0:
            return []
        groups = self._groups_of(rows)
        if len(groups) > 1:
            return [listed for group in groups for listed in self._top_of(group, top)]
        return self._top_of(rows, top)

    def _groups_of(self, rows: np.ndarray) -> list[np.ndarray]:
        """``rows`` in consecutive groups of at most :data:`TOP_GROUP_ENTRIES` counterpart
        entries (out and in), so the listing's sort and look-ups stay that long."""
        out_degree = np.diff(self._counts.indptr)[rows]
        if out_degree.sum() * 2 <= TOP_GROUP_ENTRIES:
            return [rows]  # in-degrees are not counted for a small listing
        if self._in_degree is None:
            self._in_degree = np.bincount(self._counts.indices, minlength=self.snapshot.n_nodes)
        entries = np.cumsum(out_degree + self._in_degree[rows])
        group = entries // TOP_GROUP_ENTRIES
        cuts = np.flatnonzero(np.diff(group)) + 1
        return np.split(rows, cuts)

    def _top_of(self, rows: np.ndarray, top: int) -> list[list[dict]]:
        """:meth:`top_of` of one group of rows."""
        out_counts, in_counts = self._counts[rows], self._counts[:, rows].T.tocsr()
        counts = (out_counts + in_counts).tocsr()
        counts.sum_duplicates()
        owner = np.repeat(np.arange(rows.size), np.diff(counts.indptr))
        columns, events = counts.indices, counts.data
        n = self.snapshot.n_nodes
        cell = owner * n + columns  # sorted: rows in order, columns sorted in each row
        weights = _values_at(self._weights[rows] + self._weights[:, rows].T, n, cell)
        order = np.lexsort((-weights, -events, owner))
        starts = np.searchsorted(owner[order], np.arange(rows.size))
        rank = np.arange(order.size) - starts[owner[order]]
        listed = order[rank < top]
        sends = _values_at(out_counts, n, cell[listed], pattern=True)
        receives = _values_at(in_counts, n, cell[listed], pattern=True)
        new = self._new_flags(rows, owner[listed], columns[listed], cell[listed])
        result: list[list[dict]] = [[] for _ in range(rows.size)]
        nodes = self.snapshot.nodes
        for at, out, into, is_new in zip(
            listed.tolist(), sends.tolist(), receives.tolist(), new.tolist(), strict=True
        ):
            result[int(owner[at])].append(
                {
                    "account": str(nodes[columns[at]]),
                    "direction": "both" if out and into else ("out" if out else "in"),
                    "events": int(round(events[at])),
                    "weight": float(weights[at]),
                    "new": is_new,
                }
            )
        return result

    def _new_flags(
        self, rows: np.ndarray, owner: np.ndarray, column: np.ndarray, cell: np.ndarray
    ) -> np.ndarray:
        """Whether each listed pair (``rows[owner]``, ``column``; ``cell`` its flat place in
        the row block) is new: never seen in the known history, or (without one) absent
        from the previous snapshot; all False without either."""
        if self.known is not None and self._keys is not None:
            return ~self.known.contains(pair_keys(self._keys[column], self._keys[rows[owner]]))
        if self.previous is None:
            return np.zeros(owner.size, dtype=bool)
        if self._known is None:
            return np.ones(owner.size, dtype=bool)
        n = self.snapshot.n_nodes
        return ~_values_at(self._known[rows], n, cell, pattern=True)


def _values_at(
    block: sp.spmatrix, n: int, cells: np.ndarray, *, pattern: bool = False
) -> np.ndarray:
    """Entries of a row block at flat ``row * n + column`` cells (0 where none is stored),
    without densifying it; with ``pattern``, whether an entry is stored at all."""
    block = sp.csr_matrix(block)
    block.sum_duplicates()  # sorted, distinct column indices
    stored = np.repeat(np.arange(block.shape[0]), np.diff(block.indptr)) * n + block.indices
    found = np.zeros(cells.size, dtype=bool)
    values = np.zeros(cells.size)
    if stored.size:
        position = np.minimum(np.searchsorted(stored, cells), stored.size - 1)
        found = stored[position] == cells
        values[found] = block.data[position[found]]
    return found if pattern else values
