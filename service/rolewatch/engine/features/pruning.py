"""ReFeX pruning of agreeing feature columns (Henderson et al., KDD 2011).

Features whose binned values agree within a tolerance ``s`` on every node are joined in
an agreement graph; of each connected component only the earliest feature is kept.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

__all__ = ["prune_agreeing"]


def prune_agreeing(binned: np.ndarray, tolerance: float = 0.0, *, n_fixed: int = 0) -> np.ndarray:
    """Indices of the columns ReFeX keeps after pruning (Henderson et al., KDD 2011).

    Two columns agree when their binned values differ by at most ``tolerance`` on every
    row. Columns are joined in an agreement graph; of each connected component the
    earliest column is kept. The first ``n_fixed`` columns were kept in earlier rounds:
    they always stay, and any later column agreeing with one of them is dropped.

    Parameters
    ----------
    binned : numpy.ndarray
        rows x features bin indices, columns in generation order.
    tolerance : float
        ``s`` >= 0.
    n_fixed : int
        Leading columns kept in earlier rounds of discovery.

    Returns
    -------
    numpy.ndarray
        Sorted int indices of kept columns (including the fixed ones).
    """
    rows, f = binned.shape
    if f == 0:
        return np.zeros(0, dtype=np.int64)
    integral = binned.dtype.kind in "ui" or np.array_equal(binned, np.round(binned))
    if tolerance < 1.0 and integral:
        # Integer bins within s < 1 agree only when equal: the components are the
        # classes of identical columns, found by sorting the columns as byte strings.
        fits_byte = binned.min(initial=0) >= 0 and binned.max(initial=0) < 256
        cols = np.ascontiguousarray(np.asarray(binned, dtype=np.uint8 if fits_byte else np.int32).T)
        keys = (
            cols.view(np.dtype((np.void, cols.dtype.itemsize * rows))).ravel()
            if rows
            else np.zeros(f, "V1")
        )
        _, label = np.unique(keys, return_inverse=True)
        label = label.reshape(-1)
    else:
        ii, jj = _agreeing_pairs(binned, tolerance)
        # Fixed columns never merge with each other (they were kept before).
        both_fixed = (ii < n_fixed) & (jj < n_fixed)
        ii, jj = ii[~both_fixed], jj[~both_fixed]
        graph = sp.csr_matrix((np.ones(ii.size), (ii, jj)), shape=(f, f))
        _, label = sp.csgraph.connected_components(graph, directed=False)
    first = np.full(label.max() + 1, f, dtype=np.int64)
    np.minimum.at(first, label, np.arange(f))
    keep = np.zeros(f, dtype=bool)
    keep[first] = True
    keep[:n_fixed] = True
    return np.flatnonzero(keep)


def _agreeing_pairs(binned: np.ndarray, tolerance: float) -> tuple[np.ndarray, np.ndarray]:
    """All column pairs ``i < j`` with ``max |b_i - b_j| <= tolerance``.

    Pairs are screened on growing row samples, starting with the rows where the columns
    spread most (a pair that disagrees on a sample disagrees overall), and the survivors
    are verified on every row, in chunks.
    """
    rows, f = binned.shape
    integral = binned.dtype.kind in "ui" or np.array_equal(binned, np.round(binned))
    small = np.abs(binned).max(initial=0) < 2**6  # differences then fit int8 too
    b: np.ndarray = np.asarray(
        binned, dtype=(np.int8 if small else np.int32) if integral else np.float64
    )
    ii, jj = np.triu_indices(f, k=1)
    # rows where the features spread most rule out the most pairs
    spread = (
        np.asarray(b.max(axis=1, initial=0), dtype=np.float64) - b.min(axis=1, initial=0)
        if f
        else np.zeros(rows)
    )
    order = np.argsort(-spread, kind="stable")
    samples = [order[:k] for k in (16, 128, 2048) if k < rows] + [None]
    for sample in samples:
        if ii.size == 0:
            break
        sub = b if sample is None else b[sample]
        ok = np.empty(ii.size, dtype=bool)
        chunk = max(1, 16_000_000 // max(sub.shape[0], 1))
        for lo in range(0, ii.size, chunk):
            sl = slice(lo, lo + chunk)
            diff = np.abs(sub[:, ii[sl]] - sub[:, jj[sl]])
            ok[sl] = diff.max(axis=0, initial=0) <= tolerance
        ii, jj = ii[ok], jj[ok]
    return ii, jj
