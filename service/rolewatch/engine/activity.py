"""Activity counts and counterparts: the plain numbers an analyst reads beside a role shift.

Everything here is computed with sparse matrix operations on a :class:`Snapshot`. Which
counterparts are new is told by the known-pair history
(:class:`rolewatch.engine.pairs.KnownPairs`) or, without one, by the previous snapshot.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from rolewatch.engine.pairs import KnownPairs, account_keys, pair_keys
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


class Counterparts:
    """Who each account dealt with in a snapshot, ready for many per-account look-ups.

    Transposes and previous-window neighbour patterns are built once, so listing the top
    counterparts of thousands of alerted accounts costs a row slice each.

    Parameters
    ----------
    snapshot : Snapshot
        The current window.
    previous : Snapshot, optional
        The window before, to flag counterparts that are new.
    known : KnownPairs, optional
        The known-pair history; when given, a counterpart is new when the pair never
        interacted in any earlier window (``previous`` is then not needed).
    """

    def __init__(
        self,
        snapshot: Snapshot,
        previous: Snapshot | None = None,
        *,
        known: KnownPairs | None = None,
    ) -> None:
        self.snapshot = snapshot
        self.previous = previous
        self.known = known
        self._keys = account_keys(snapshot.nodes) if known is not None else None
        self._out_counts = snapshot.counts.tocsr()
        self._in_counts = snapshot.counts.T.tocsr()
        self._out_weights = snapshot.weights.tocsr()
        self._in_weights = snapshot.weights.T.tocsr()
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
        counts = (self._out_counts[row] + self._in_counts[row]).tocsr()
        if counts.nnz == 0:
            return []
        columns = counts.indices
        events = counts.data
        weights = _row_values((self._out_weights[row] + self._in_weights[row]).tocsr(), columns)
        order = np.lexsort((-weights, -events))[:top]
        sends = set(self._out_counts[row].indices.tolist())
        receives = set(self._in_counts[row].indices.tolist())
        known = set(self._known[row].indices.tolist()) if self._known is not None else set()
        if self.known is not None and self._keys is not None:
            listed = columns[order]
            seen = self.known.contains(
                pair_keys(self._keys[listed], self._keys[[row] * listed.size])
            )
            known = set(listed[seen].tolist())
        result = []
        for position in order:
            column = int(columns[position])
            out, into = column in sends, column in receives
            result.append(
                {
                    "account": str(self.snapshot.nodes[column]),
                    "direction": "both" if out and into else ("out" if out else "in"),
                    "events": int(round(events[position])),
                    "weight": float(weights[position]),
                    "new": (self.previous is not None or self.known is not None)
                    and column not in known,
                }
            )
        return result


def _row_values(row: sp.csr_matrix, columns: np.ndarray) -> np.ndarray:
    """The entries of a one-row sparse matrix at ``columns`` (0 where none is stored),
    without densifying the row: an alert's look-up stays as cheap as its counterparts."""
    row.sum_duplicates()  # sorted, distinct column indices
    values = np.zeros(columns.size)
    if row.nnz == 0:
        return values
    position = np.minimum(np.searchsorted(row.indices, columns), row.indices.size - 1)
    found = row.indices[position] == columns
    values[found] = row.data[position[found]]
    return values
