"""Triangles per node, the kernel behind the ReFeX egonet features.

The egonet features of ReFeX (Henderson et al., "It's who you know: graph mining using
recursive structural features", KDD 2011) count the edges inside and around each node's
egonet; both follow from the number of triangles through the node (see
:mod:`rolewatch.engine.features.graph`). The triangles are listed once each with the
degree-ordered ("forward") orientation of Schank & Wagner ("Finding, counting and listing
all triangles in large graphs", 2005), so a hub adds no work and ``A @ A`` is never formed.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

__all__ = ["binary_pattern", "off_diagonal_pattern", "triangle_counts", "triangles_per_node"]


def binary_pattern(m: sp.spmatrix) -> sp.csr_matrix:
    """Sparsity pattern of ``m`` as a float64 CSR matrix of ones.

    Parameters
    ----------
    m : scipy.sparse matrix

    Returns
    -------
    scipy.sparse.csr_matrix
        Ones at every stored entry of ``m`` (explicit zeros kept as ones).
    """
    m = sp.csr_matrix(m)
    return sp.csr_matrix((np.ones(m.nnz), m.indices, m.indptr), shape=m.shape)


def off_diagonal_pattern(m: sp.spmatrix, nodes: np.ndarray | None = None) -> sp.csr_matrix:
    """:func:`binary_pattern` of ``m`` without each node's entry for itself.

    Parameters
    ----------
    m : scipy.sparse matrix, shape (r, n)
    nodes : array of int, shape (r,), optional
        The node row ``s`` of ``m`` belongs to (row ``s`` itself when None: a square
        matrix's diagonal).

    Returns
    -------
    scipy.sparse.csr_matrix
        Ones at every stored off-diagonal entry (duplicates once, explicit zeros kept).
        ``m`` is never changed: scipy's ``setdiag`` on a pattern sharing ``m``'s index
        arrays can sort or merge them in place, and on a matrix without a diagonal it
        rebuilds the whole matrix through COO.
    """
    block = sp.csr_matrix(m)
    if not block.has_canonical_format:
        block = block.copy()
        block.sum_duplicates()
    rows = np.repeat(np.arange(block.shape[0]), np.diff(block.indptr))
    owner = rows if nodes is None else np.asarray(nodes)[rows]
    keep = block.indices != owner
    per_row = np.bincount(rows[keep], minlength=block.shape[0])
    indptr = np.concatenate([[0], np.cumsum(per_row)]).astype(block.indptr.dtype)
    return sp.csr_matrix((np.ones(per_row.sum()), block.indices[keep], indptr), shape=block.shape)


def _edge_keys(m: sp.csr_matrix) -> np.ndarray:
    """``row * n + col`` of every stored entry, increasing for a CSR matrix with sorted indices."""
    n = m.shape[0]
    rows = np.repeat(np.arange(n, dtype=np.int64), np.diff(m.indptr))
    return rows * n + m.indices


def _contains(sorted_keys: np.ndarray, query: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Membership of ``query`` in ``sorted_keys``: (hit mask, position where hit)."""
    if sorted_keys.size == 0:
        return np.zeros(query.shape, dtype=bool), np.zeros(query.shape, dtype=np.int64)
    pos = np.searchsorted(sorted_keys, query)
    np.minimum(pos, sorted_keys.size - 1, out=pos)
    return sorted_keys[pos] == query, pos


def _ranked_upper(S: sp.csr_matrix) -> tuple[np.ndarray, sp.csr_matrix]:
    """Node order by ``(degree, id)`` and ``S`` relabelled by it, kept upper-triangular.

    In rank labels every undirected edge appears once, pointing to the higher rank; its
    edge keys are sorted, and so are the wedge queries of one node (cache-friendly).
    """
    n = S.shape[0]
    deg = np.diff(S.indptr)
    order = np.lexsort((np.arange(n), deg))
    U = sp.triu(S[order][:, order], k=1, format="csr")
    U.sort_indices()
    return order, U


def _reciprocal_mask(R: sp.csr_matrix | None, order: np.ndarray, keys: np.ndarray) -> np.ndarray:
    """For each edge key of the ranked ``U``, whether the edge is in ``R`` (rank labels)."""
    if R is None or not R.nnz:
        return np.zeros(keys.size, dtype=bool)
    R_ranked = sp.csr_matrix(R)[order][:, order]
    R_ranked.sort_indices()
    return _contains(_edge_keys(R_ranked), keys)[0]


def triangle_counts(
    S: sp.csr_matrix, R: sp.csr_matrix | None, *, max_wedges: int = 4_000_000
) -> tuple[np.ndarray, np.ndarray]:
    """Triangles per node, and triangles whose edge opposite the node lies in ``R``.

    Parameters
    ----------
    S : scipy.sparse.csr_matrix
        Symmetric 0/1 adjacency without diagonal, sorted indices.
    R : scipy.sparse.csr_matrix or None
        Symmetric 0/1 matrix of the reciprocated pairs (arcs both ways), or None.
    max_wedges : int
        Wedges generated at once; bounds the memory of one chunk.

    Returns
    -------
    triangles, opposite_in_R : numpy.ndarray
        float64 per node of ``S``.

    Notes
    -----
    Degree-ordered ("forward") triangle listing (Schank & Wagner, 2005): nodes are
    ranked by ``(degree, id)`` and each undirected edge is kept once, pointing to the
    higher rank (``U``). Every triangle then appears exactly once as a node ``a`` with two
    out-neighbours ``b, c`` in ``U`` that are joined by an edge of ``U``. The pairs of
    out-neighbours ("wedges") are generated with array arithmetic in chunks and looked up
    among ``U``'s sorted edge keys. A node points to at most ``sqrt(2m)`` higher-ranked
    nodes, so a hub (highest rank, no out-edges) adds no wedges; ``A @ A`` is never formed.
    """
    n = S.shape[0]
    tri = np.zeros(n)
    opposite = np.zeros(n)
    if n == 0 or S.nnz == 0:
        return tri, opposite
    order, U = _ranked_upper(S)
    keys = _edge_keys(U)
    reciprocal_by_key = _reciprocal_mask(R, order, keys)
    heads = U.indices.astype(np.int64)
    owner = np.repeat(np.arange(n, dtype=np.int64), np.diff(U.indptr))  # a of every edge position
    positions = np.arange(U.nnz, dtype=np.int64)
    later = U.indptr[owner + 1] - positions - 1  # partners after each position in a's row
    cum = np.concatenate([[0], np.cumsum(later)])
    lo = 0
    while lo < U.nnz:
        hi = int(np.searchsorted(cum, cum[lo] + max_wedges, side="right")) - 1
        hi = min(max(hi, lo + 1), U.nnz)
        counts = later[lo:hi]
        total = int(cum[hi] - cum[lo])
        if total:
            first = np.repeat(positions[lo:hi], counts)
            # second = first + 1 + rank of the wedge within its first position
            second = np.arange(total, dtype=np.int64)
            second += np.repeat(positions[lo:hi] + 1 - (cum[lo:hi] - cum[lo]), counts)
            query = heads[first] * n
            query += heads[second]
            hit, pos = _contains(keys, query)  # b < c: both come later in a's sorted row
            first, second, pos = first[hit], second[hit], pos[hit]
            a, b, c = owner[first], heads[first], heads[second]
            tri += np.bincount(a, minlength=n)
            tri += np.bincount(b, minlength=n)
            tri += np.bincount(c, minlength=n)
            opposite += np.bincount(a, weights=reciprocal_by_key[pos], minlength=n)
            opposite += np.bincount(b, weights=reciprocal_by_key[second], minlength=n)
            opposite += np.bincount(c, weights=reciprocal_by_key[first], minlength=n)
        lo = hi
    # back from rank labels to snapshot rows: the node of rank r is order[r]
    tri_rows, opposite_rows = np.empty(n), np.empty(n)
    tri_rows[order] = tri
    opposite_rows[order] = opposite
    return tri_rows, opposite_rows


def triangles_per_node(adjacency: sp.spmatrix) -> np.ndarray:
    """Number of triangles through each node of the undirected view of ``adjacency``.

    Parameters
    ----------
    adjacency : scipy.sparse matrix
        Square; any non-zero ``(i, j)`` or ``(j, i)`` makes ``i`` and ``j`` neighbours.
        The diagonal is ignored.

    Returns
    -------
    numpy.ndarray
        float64 counts, same as ``networkx.triangles`` on the undirected simple graph.

    Notes
    -----
    Degree-ordered listing of :func:`triangle_counts` (Schank & Wagner, 2005); used for
    the egonet features of ReFeX (Henderson et al., KDD 2011).
    """
    A = off_diagonal_pattern(adjacency)
    S = binary_pattern(A + A.T)
    S.sort_indices()
    return triangle_counts(S, None)[0]
