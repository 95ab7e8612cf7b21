"""One closed time window as a directed weighted graph (sparse adjacency).

A :class:`Snapshot` is the input of the ReFeX feature extraction (Henderson et al.,
"It's who you know: graph mining using recursive structural features", KDD 2011):
every account active in the window is a node, and every ordered pair of accounts that
interacted is an edge carrying the number of events and their summed weight.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
import scipy.sparse as sp

__all__ = ["Snapshot"]


def _as_id_array(values: Any, what: str) -> np.ndarray:
    """Return ``values`` as a 1-D numpy array of str ids (numpy text, or an object array of
    str kept as it is), or raise a clear error."""
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise ValueError(
            f"{what} must be a one-dimensional sequence of account ids, got shape {arr.shape}"
        )
    if arr.dtype.kind == "S":
        return arr.astype(str)
    if arr.dtype.kind != "U":
        if arr.size and not all(isinstance(v, str) for v in arr.tolist()):
            raise ValueError(f"{what} must hold account ids as strings")
        if not arr.size:
            return np.asarray([], dtype=object)
    return arr


def _as_positions(index) -> np.ndarray:
    """Event positions as a flat integer array, without copying one that is already
    integer (a large window's int32 positions stay int32)."""
    positions = np.asarray(index).reshape(-1)
    if positions.dtype.kind in "iu":
        return positions
    if positions.size and not np.array_equal(positions, np.round(positions)):
        raise ValueError("event positions must be whole numbers; intern the ids first")
    return positions.astype(np.int64)


def _check_weights(weight: Any, n_events: int) -> np.ndarray:
    """Return event weights as float64, rejecting NaN, infinite and negative values."""
    if weight is None:
        return np.ones(n_events, dtype=np.float64)
    try:
        w = np.asarray(weight, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"weight must be numbers: {exc}") from None
    if w.ndim != 1 or w.shape[0] != n_events:
        raise ValueError(
            f"weight has {w.size} values but there are {n_events} events; "
            "give one weight per event or none"
        )
    bad = ~np.isfinite(w)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(
            f"weight must be finite: {int(bad.sum())} event(s) have NaN or infinite weight "
            f"(first at index {i}: {w[i]!r}); fix or drop those events"
        )
    neg = w < 0
    if neg.any():
        i = int(np.flatnonzero(neg)[0])
        raise ValueError(
            f"weight must be >= 0: {int(neg.sum())} event(s) have a negative weight "
            f"(first at index {i}: {w[i]!r}); fix or drop those events"
        )
    return w


@dataclass(frozen=True)
class Snapshot:
    """Directed weighted interaction graph of one time window.

    Parameters
    ----------
    nodes : numpy.ndarray
        1-D object array of str account ids; row/column ``i`` of the matrices is
        ``nodes[i]``. Sorted unless an explicit order was given. Not numpy's fixed-width
        text: that takes 4 bytes a character of the longest id for every id (one
        200-character id would make every row 800 bytes).
    counts : scipy.sparse.csr_matrix
        ``n x n`` float64; ``counts[i, j]`` is the number of events ``i -> j``.
    weights : scipy.sparse.csr_matrix
        ``n x n`` float64; ``weights[i, j]`` is the summed event weight ``i -> j``.

    Notes
    -----
    Both matrices share one sparsity pattern (an event of weight 0 still makes an edge),
    have sorted column indices and no explicit duplicates. This is the graph on which
    ReFeX features are computed (Henderson et al., KDD 2011).
    """

    nodes: np.ndarray
    counts: sp.csr_matrix
    weights: sp.csr_matrix

    @classmethod
    def from_events(cls, actor, target, weight=None, *, nodes=None) -> Snapshot:
        """Build a snapshot from parallel event columns.

        Parameters
        ----------
        actor, target : sequence of str
            Equal-length account ids; event ``k`` goes ``actor[k] -> target[k]``.
        weight : sequence of float, optional
            Non-negative finite weight per event; ``None`` counts every event as 1.
        nodes : sequence of str, optional
            Explicit node order. Ids listed here but absent from the events become
            isolated nodes; every event id must be listed.

        Returns
        -------
        Snapshot

        Raises
        ------
        ValueError
            On length mismatch, self-interaction, NaN/infinite/negative weight, an event
            id missing from ``nodes`` or duplicated ``nodes``.
        """
        a = _as_id_array(actor, "actor")
        t = _as_id_array(target, "target")
        if a.shape[0] != t.shape[0]:
            raise ValueError(
                f"actor has {a.shape[0]} ids but target has {t.shape[0]}; every event needs both"
            )
        m = a.shape[0]
        w = _check_weights(weight, m)
        if m:
            self_loop = a == t
            if self_loop.any():
                i = int(np.flatnonzero(self_loop)[0])
                raise ValueError(
                    f"{int(self_loop.sum())} event(s) have actor == target (first at index {i}, "
                    f"account {a[i]!r}); an account cannot interact with itself, drop those events"
                )
        if nodes is None:
            uniq, inverse = np.unique(np.concatenate([a, t]), return_inverse=True)
            node_arr = uniq
            inverse = inverse.reshape(-1)
            rows, cols = inverse[:m], inverse[m:]
        else:
            node_arr = _as_id_array(nodes, "nodes")
            order = np.argsort(node_arr, kind="stable")
            sorted_nodes = node_arr[order]
            if sorted_nodes.size > 1 and (sorted_nodes[1:] == sorted_nodes[:-1]).any():
                raise ValueError("nodes must not list an account id twice")
            rows = cls._lookup(sorted_nodes, order, a, "actor")
            cols = cls._lookup(sorted_nodes, order, t, "target")
        return cls._from_indices(node_arr, rows, cols, w)

    @classmethod
    def from_interned(cls, nodes, actor_index, target_index, weight=None) -> Snapshot:
        """Build a snapshot from events whose account ids were interned already.

        Parameters
        ----------
        nodes : sequence of str
            Sorted, distinct account ids (what :meth:`from_events` would find).
        actor_index, target_index : array of int
            Equal-length positions in ``nodes``; event ``k`` goes
            ``nodes[actor_index[k]] -> nodes[target_index[k]]``.
        weight : sequence of float, optional
            As in :meth:`from_events`.

        Returns
        -------
        Snapshot
            Equal to ``from_events(nodes[actor_index], nodes[target_index], weight)``.

        Raises
        ------
        ValueError
            On unsorted or repeated ``nodes``, an index outside them, a length mismatch,
            self-interaction, or a NaN/infinite/negative weight.
        """
        node_arr = _as_id_array(nodes, "nodes")
        if node_arr.size > 1 and not (node_arr[1:] > node_arr[:-1]).all():
            raise ValueError("nodes must be sorted and distinct; intern the ids with np.unique")
        rows = _as_positions(actor_index)
        cols = _as_positions(target_index)
        if rows.shape != cols.shape:
            raise ValueError(
                f"actor has {rows.size} ids but target has {cols.size}; every event needs both"
            )
        if rows.size and (
            min(rows.min(), cols.min()) < 0 or max(rows.max(), cols.max()) >= node_arr.size
        ):
            raise ValueError("an event index lies outside nodes; index every event's accounts")
        w = _check_weights(weight, rows.size)
        self_loop = rows == cols
        if self_loop.any():
            i = int(np.flatnonzero(self_loop)[0])
            raise ValueError(
                f"{int(self_loop.sum())} event(s) have actor == target (first at index {i}, "
                f"account {node_arr[rows[i]]!r}); an account cannot interact with itself, "
                "drop those events"
            )
        return cls._from_indices(node_arr, rows, cols, w)

    @staticmethod
    def _lookup(
        sorted_nodes: np.ndarray, order: np.ndarray, ids: np.ndarray, what: str
    ) -> np.ndarray:
        """Row index of every id in ``ids`` given ``nodes`` sorted; error when one is missing."""
        if ids.size == 0:
            return np.zeros(0, dtype=np.int64)
        if sorted_nodes.size == 0:
            raise ValueError(
                f"{what} id {ids[0]!r} is not in the given nodes; list every account of the events"
            )
        pos = np.searchsorted(sorted_nodes, ids)
        pos_c = np.minimum(pos, sorted_nodes.size - 1)
        missing = sorted_nodes[pos_c] != ids
        if missing.any():
            i = int(np.flatnonzero(missing)[0])
            raise ValueError(
                f"{what} id {ids[i]!r} (event {i}) is not in the given nodes; "
                "list every account of the events"
            )
        return order[pos_c]

    @classmethod
    def _from_indices(
        cls, nodes: np.ndarray, rows: np.ndarray, cols: np.ndarray, w: np.ndarray
    ) -> Snapshot:
        """Assemble the CSR matrices from integer endpoints (duplicates summed)."""
        n = int(nodes.shape[0])
        idx_dtype = np.int32 if n < 2**31 - 1 else np.int64
        rows = np.asarray(rows, dtype=idx_dtype)
        cols = np.asarray(cols, dtype=idx_dtype)
        # Sum duplicated pairs once on a combined key; both matrices then share the pattern
        # even where a summed weight is 0.
        key = rows.astype(np.int64) * n + cols
        uniq, inverse = np.unique(key, return_inverse=True)
        inverse = inverse.reshape(-1)
        cnt = np.bincount(inverse, minlength=uniq.size).astype(np.float64)
        wsum = np.bincount(inverse, weights=w, minlength=uniq.size).astype(np.float64)
        r = (uniq // max(n, 1)).astype(idx_dtype)
        c = (uniq % max(n, 1)).astype(idx_dtype)
        indptr = np.zeros(n + 1, dtype=idx_dtype)
        if n:
            np.cumsum(np.bincount(r, minlength=n), out=indptr[1:])
        counts = sp.csr_matrix((cnt, c, indptr), shape=(n, n))
        weights = sp.csr_matrix((wsum, c.copy(), indptr.copy()), shape=(n, n))
        counts.has_sorted_indices = True
        weights.has_sorted_indices = True
        return cls(nodes=np.asarray(nodes, dtype=object), counts=counts, weights=weights)

    @property
    def n_nodes(self) -> int:
        """Number of accounts (rows)."""
        return int(self.nodes.shape[0])

    @property
    def n_edges(self) -> int:
        """Number of distinct ordered pairs that interacted."""
        return int(self.counts.nnz)

    def index_of(self, ids: Sequence[str] | np.ndarray) -> np.ndarray:
        """Row index of each id, ``-1`` where the id is not in this snapshot.

        Parameters
        ----------
        ids : sequence of str

        Returns
        -------
        numpy.ndarray
            int64 array, same length as ``ids``.
        """
        q = np.asarray(ids)
        if q.ndim == 0:
            q = q.reshape(1)
        if q.size == 0 or self.n_nodes == 0:
            return np.full(q.shape[0], -1, dtype=np.int64)
        if q.dtype != object:
            q = q.astype(str).astype(object)
        return self._node_index.get_indexer(q).astype(np.int64)

    @cached_property
    def node_keys(self) -> np.ndarray:
        """Each node id's 64-bit key (:func:`rolewatch.engine.pairs.account_keys`), computed
        once per snapshot: the tie counts and the activity counts both look pairs up by it.
        """
        from rolewatch.engine.pairs import account_keys

        return account_keys(self.nodes)

    @cached_property
    def _node_index(self) -> Any:
        """A hash index of the node ids (pandas), built once per snapshot."""
        import pandas as pd

        return pd.Index(self.nodes.astype(object))
