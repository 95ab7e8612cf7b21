"""Tie-level counts of one window: each account's counterparts by direction and novelty.

A role mixture is scale-free (its rows sum to one), so an account that suddenly writes to
sixty strangers keeps the *shape* of its features and barely moves its mixture. What
changes is at the level of its ties: how many of its counterparts it never dealt with
before, in which direction, and whether they answer. This module counts, per account and
window, its distinct counterparts in four cells:

* ``out_known`` / ``out_new``: accounts it sent to, already known / new to it;
* ``in_known`` / ``in_new``: accounts it received from, already known / new to it;

"new" meaning the pair never interacted, in either direction, in any earlier window of
the account's known history (:class:`rolewatch.engine.pairs.KnownPairs`). A counterpart
it both sent to and received from counts in both directions.

Pure: arrays in, arrays out; vectorised with scipy.sparse.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from rolewatch.engine.pairs import PairHistory, pair_keys
from rolewatch.engine.snapshot import Snapshot

__all__ = ["TIE_CELLS", "TieCounts", "tie_counts"]

TIE_CELLS = ("out_known", "out_new", "in_known", "in_new")


@dataclass(frozen=True)
class TieCounts:
    """One window's tie cells per node, in the snapshot's node order.

    Attributes
    ----------
    cells : ndarray of int64, shape (n, 4)
        Distinct counterparts in the cells of :data:`TIE_CELLS`.
    counterparts : ndarray of int64, shape (n,)
        Distinct counterparts in either direction.
    new_counterparts : ndarray of int64, shape (n,)
        Of those, the ones new to the account over its known history.
    new_pairs : ndarray of uint64
        Keys of the window's pairs that were not known before it, sorted: what the
        known-pair history keeps of this window.
    """

    cells: np.ndarray
    counterparts: np.ndarray
    new_counterparts: np.ndarray
    new_pairs: np.ndarray


def tie_counts(snapshot: Snapshot, known: PairHistory) -> TieCounts:
    """Count every node's counterparts by direction and by novelty against ``known``.

    Parameters
    ----------
    snapshot : Snapshot
        The window.
    known : PairHistory
        Every pair that interacted in an earlier window (:class:`~rolewatch.engine.pairs.
        KnownPairs`; empty: every counterpart is new).

    Returns
    -------
    TieCounts
    """
    n = snapshot.n_nodes
    pattern = snapshot.counts.tocoo()
    node_keys = snapshot.node_keys
    keys = pair_keys(node_keys[pattern.row], node_keys[pattern.col])
    is_known = known.contains(keys)
    cells = np.zeros((n, 4), dtype=np.int64)
    cells[:, 0] = np.bincount(pattern.row[is_known], minlength=n)
    cells[:, 1] = np.bincount(pattern.row[~is_known], minlength=n)
    cells[:, 2] = np.bincount(pattern.col[is_known], minlength=n)
    cells[:, 3] = np.bincount(pattern.col[~is_known], minlength=n)
    # either direction, each counterpart once: the symmetrised pattern, and its known part
    ones = np.ones(len(keys), dtype=np.int8)
    anyway = sp.coo_matrix((ones, (pattern.row, pattern.col)), shape=(n, n)).tocsr()
    anyway = (anyway + anyway.T).tocsr()
    before = sp.coo_matrix(
        (ones[is_known], (pattern.row[is_known], pattern.col[is_known])), shape=(n, n)
    ).tocsr()
    before = (before + before.T).tocsr()
    counterparts = np.diff(anyway.indptr).astype(np.int64)
    new_counterparts = counterparts - np.diff(before.indptr).astype(np.int64)
    return TieCounts(
        cells=cells,
        counterparts=counterparts,
        new_counterparts=new_counterparts,
        new_pairs=known.new_keys(keys),
    )
