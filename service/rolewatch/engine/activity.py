"""Activity counts and counterparts: the plain numbers an analyst reads beside a role shift.

Everything here is computed with sparse matrix operations on a :class:`Snapshot`; the
previous snapshot is only used to tell which counterparts are new.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

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
    """Events out/in, distinct counterparts and new counterparts for every node."""
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


def top_counterparts(
    snapshot: Snapshot, row: int, previous: Snapshot | None = None, *, top: int = 10
) -> list[dict]:
    """The accounts ``row`` dealt with most in this snapshot, by event count then weight.

    Each entry: ``{"account", "direction" (out|in|both), "events", "weight", "new"}``.
    """
    out_counts = snapshot.counts.getrow(row)
    in_counts = snapshot.counts.getcol(row).T.tocsr()
    out_weights = snapshot.weights.getrow(row)
    in_weights = snapshot.weights.getcol(row).T.tocsr()
    total_counts = (out_counts + in_counts).tocsr()
    if total_counts.nnz == 0:
        return []
    total_weights = (out_weights + in_weights).toarray().ravel()
    columns = total_counts.indices
    counts = total_counts.data
    order = np.lexsort((-total_weights[columns], -counts))[:top]
    previous_ids: set = set()
    if previous is not None and previous.n_nodes:
        account = snapshot.nodes[row]
        prev_row = previous.index_of([account])[0]
        if prev_row >= 0:
            prev_pattern = _undirected_pattern(previous).getrow(prev_row)
            previous_ids = set(previous.nodes[prev_pattern.indices].tolist())
    out_dense = out_counts.toarray().ravel()
    in_dense = in_counts.toarray().ravel()
    result = []
    for position in order:
        column = int(columns[position])
        sends, receives = out_dense[column] > 0, in_dense[column] > 0
        direction = "both" if sends and receives else ("out" if sends else "in")
        account = str(snapshot.nodes[column])
        result.append(
            {
                "account": account,
                "direction": direction,
                "events": int(round(counts[position])),
                "weight": float(total_weights[column]),
                "new": previous is not None and account not in previous_ids,
            }
        )
    return result
