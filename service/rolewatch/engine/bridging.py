"""Bridging: ties an account has into communities its own community hardly ever deals with.

A role mixture describes an account's *local* structure, so it misses a courier that keeps
its usual mix of paying in and paying out but starts carrying goods between two parts of
the graph that never traded: what changes is *where* its counterparts sit. Granovetter
(1973, "The strength of weak ties", as recalled) calls such a tie a local bridge, and Burt
(1992, "Structural holes", as recalled) an account that spans a structural hole between
groups with few other ties.

Two steps:

1. Communities. :func:`leiden_communities` (the default) groups each closed window's
   undirected graph by the Leiden algorithm on modularity with a resolution parameter
   (Traag, Waltman & van Eck, "From Louvain to Leiden: guaranteeing well-connected
   communities", Scientific Reports 2019; Reichardt & Bornholdt 2006 for the resolution;
   run by the igraph library), which finds the number of communities itself.
   :func:`community_labels` keeps the earlier regularised spectral clustering with a
   fixed ``k`` (Qin & Rohe, NIPS 2013, as recalled; Amini et al., Ann. Statist. 2013;
   Ng, Jordan & Weiss, NIPS 2002).
2. :func:`bridging_zscore` asks, for every account, how surprising its number of
   counterparts in each *other* community is: each account's home is the community most
   of its counterparts sit in; the chance that a tie from home community ``h`` lands in
   community ``c`` is estimated from everybody else's ties (leave-one-out, smoothed toward
   the communities' overall shares); the account's count is compared with a Poisson law
   of mean ``degree * P(c | h)``, the smallest upper-tail probability is Sidak-corrected
   for the communities it touches and turned into a normal z-score.

The communities come from a *reference* window, the window before (its labels are kept
with its memberships): labelled on the window being judged, a new broker pulls the
counterparts it joins into one community and its ties look ordinary. Counterparts the
reference did not see carry label -1 and are left out.

Pure: arrays in, arrays out; vectorised with scipy.sparse (no loop over nodes).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator, eigsh
from scipy.special import ndtri_exp
from scipy.stats import poisson
from sklearn.cluster import KMeans

__all__ = [
    "DENSE_BELOW",
    "bridging_zscore",
    "community_labels",
    "leiden_communities",
    "undirected_ties",
]

DENSE_BELOW = 200  # below this many nodes a dense eigendecomposition is simpler and exact


def undirected_ties(counts) -> sp.csr_matrix:
    """Symmetric tie strengths ``log(1 + c_ij + c_ji)`` from an n x n event-count matrix.

    The logarithm damps pairs that trade very often, so a community is a group of
    accounts that deal with *many* of each other, not a few heavy pairs (common practice,
    no source). The diagonal is dropped.

    Parameters
    ----------
    counts : sparse matrix, shape (n, n)
        Events ``i -> j`` (a :class:`Snapshot`'s ``counts``).

    Returns
    -------
    scipy.sparse.csr_matrix, shape (n, n)
        Symmetric, zero diagonal.
    """
    M = sp.csr_matrix(counts, dtype=np.float64)
    if M.shape[0] != M.shape[1]:
        raise ValueError(f"counts must be a square n x n matrix, got shape {M.shape}")
    S = _without_diagonal((M + M.T).tocsr())
    np.log1p(S.data, out=S.data)
    return S


def _without_diagonal(S: sp.csr_matrix) -> sp.csr_matrix:
    """``S`` without its diagonal and explicit zeros. A window's graph has no diagonal
    (an event never links an account to itself), and scipy's ``setdiag(0)`` on a matrix
    without one rebuilds it through COO with a slot for every node: a transient copy of
    the whole graph (several times its size, briefly), for nothing."""
    diagonal = S.diagonal()
    if diagonal.any():
        S = (S - sp.diags(diagonal, format="csr")).tocsr()
    S.eliminate_zeros()
    return S


def _leading_eigenvectors(A: sp.csr_matrix, k: int, tau: float) -> np.ndarray:
    """Leading ``k`` eigenvectors of ``D_t^{-1/2} (A + tau/n 11^T) D_t^{-1/2}``."""
    n = A.shape[0]
    degree = np.asarray(A.sum(axis=1)).ravel()
    scale = 1.0 / np.sqrt(degree + tau)
    if n < DENSE_BELOW:
        dense = A.toarray() + tau / n
        _, vectors = np.linalg.eigh(scale[:, None] * dense * scale[None, :])
        return vectors[:, ::-1][:, :k]

    def matvec(x):
        y = scale * np.asarray(x).reshape(-1)
        return scale * (A @ y + (tau / n) * y.sum())

    operator = LinearOperator((n, n), matvec=matvec, dtype=np.float64)
    values, vectors = eigsh(operator, k=k, which="LA", v0=np.ones(n), tol=1e-8)
    return vectors[:, np.argsort(-values, kind="stable")]


def community_labels(ties, n_communities: int, *, seed: int = 0) -> np.ndarray:
    """Split an undirected graph into ``n_communities`` groups (regularised spectral clustering).

    Parameters
    ----------
    ties : sparse or dense array, shape (n, n)
        Symmetric non-negative tie strengths (e.g. :func:`undirected_ties`).
    n_communities : int
        Number of communities ``k`` (>= 1).
    seed : int
        Seed of the k-means initialisation (the result is deterministic for a seed).

    Returns
    -------
    ndarray of int, shape (n,)
        Community of each node, in ``0 .. k-1``. With ``n <= k`` every node gets 0.

    Notes
    -----
    Qin & Rohe (NIPS 2013, as recalled): regularise with ``tau`` = mean degree, take the
    leading ``k`` eigenvectors, scale each row to unit length (Ng, Jordan & Weiss, NIPS
    2002) and run k-means (scikit-learn, 10 starts).
    """
    if n_communities < 1:
        raise ValueError(f"n_communities must be >= 1, got {n_communities}")
    A = sp.csr_matrix(ties, dtype=np.float64)
    n = A.shape[0]
    if n <= n_communities or n_communities == 1:
        return np.zeros(n, dtype=np.int64)
    degree = np.asarray(A.sum(axis=1)).ravel()
    tau = max(float(degree.mean()), 1e-12)
    vectors = _leading_eigenvectors(A, n_communities, tau)
    norms = np.linalg.norm(vectors, axis=1, keepdims=True)
    points = vectors / np.maximum(norms, 1e-12)
    model = KMeans(n_clusters=n_communities, n_init=10, random_state=seed)
    return model.fit_predict(points).astype(np.int64)


def leiden_communities(
    ties, *, resolution: float = 0.2, seed: int = 0, iterations: int = 2
) -> np.ndarray:
    """Communities of an undirected weighted graph by the Leiden algorithm (modularity).

    Parameters
    ----------
    ties : sparse or dense array, shape (n, n)
        Symmetric non-negative tie strengths (e.g. :func:`undirected_ties`).
    resolution : float
        Resolution of the modularity (Reichardt & Bornholdt 2006): below 1 fewer, larger
        communities.
    seed : int
        Seed of the algorithm's random choices (igraph's generator is set for the call and
        restored), so a window always gets the same communities.
    iterations : int
        Leiden iterations (each refines and aggregates once more).

    Returns
    -------
    ndarray of int64, shape (n,)
        Community of each node, ``0 .. k-1``; isolated nodes get communities of their own.

    Notes
    -----
    Traag, Waltman & van Eck (Scientific Reports 2019), as implemented by
    ``igraph.Graph.community_leiden``.
    """
    import random

    import igraph

    A = sp.triu(sp.csr_matrix(ties, dtype=np.float64), k=1).tocoo()
    n = A.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    # Edges and weights go to igraph as numpy arrays: a list of one tuple per edge and one
    # Python float per weight cost the process about 1.2 times as much again at its peak
    # (measured here on 3,000,000 edges: 708 against 586 MB), for the same graph.
    graph = igraph.Graph(n=n)
    graph.add_edges(np.column_stack([A.row, A.col]))
    previous = igraph.set_random_number_generator(random.Random(seed))
    try:
        found = graph.community_leiden(
            objective_function="modularity",
            weights=A.data,
            resolution=resolution,
            n_iterations=iterations,
        )
    finally:
        igraph.set_random_number_generator(previous if previous is not None else random)
    return np.asarray(found.membership, dtype=np.int64)


def bridging_zscore(ties, labels) -> np.ndarray:
    """How surprising each node's ties into other communities are, as a normal z-score.

    Parameters
    ----------
    ties : sparse or dense array, shape (n, n)
        Symmetric tie matrix; only which pairs are tied matters (distinct counterparts).
    labels : array of int, shape (n,)
        Community of each node (:func:`leiden_communities` of a reference window); -1 for
        a node without one, whose ties are left out.

    Returns
    -------
    ndarray, shape (n,)
        Per node, over the communities ``c`` other than its home it has ties into, the
        smallest ``P[X >= o_c]`` with ``X ~ Poisson(d * P(c | home))``, Sidak-corrected
        for how many such communities there are, as ``-Phi^-1(p)`` clipped at 0; 0 for a
        node without ties outside its home, NaN for a node without labelled ties.

    Notes
    -----
    ``o_c`` is the node's number of counterparts in ``c`` and ``d`` its number of
    labelled counterparts. The home is the community holding most of them (ties go to the
    lower label). ``P(c | h) = (T_hc + s_c) / (T_h + 1)`` where ``T_hc`` counts the ties
    from nodes whose home is ``h`` into ``c``, leaving the node's own ties out (so an
    account that is the only link between two communities does not make its own ties look
    ordinary), and ``s_c`` is ``c``'s share of all labelled tie ends (one pseudo-tie
    spread by size). Sparse throughout, so thousands of communities cost no more than a
    few. The tail probability goes to a z-score with ``scipy.special.ndtri_exp`` on its
    logarithm, exact far into the tail. The counting runs over slices of rows of at most
    :data:`SLICE_ENTRIES` ties, so the working arrays stay a few times a slice long rather
    than a dozen times the graph.
    """
    pattern = sp.csr_matrix(ties)
    lab = np.asarray(labels, dtype=np.int64).reshape(-1)
    n = pattern.shape[0]
    if lab.size != n:
        raise ValueError(f"labels need one entry per node ({n}), got {lab.size}")
    if n == 0 or not (lab >= 0).any():
        return np.full(n, np.nan)
    if not pattern.has_canonical_format:
        pattern = pattern.copy()
        pattern.sum_duplicates()
    k = int(lab.max()) + 1
    cells = [_community_cells(pattern, lab, k, rows) for rows in _row_slices(pattern.indptr)]
    if not any(piece.node.size for piece in cells):
        return np.full(n, np.nan)
    home = np.full(n, -1, dtype=np.int64)
    degree = np.zeros(n)
    for piece in cells:
        home[piece.homes_of] = piece.home
        degree[piece.rows] = piece.degree
    return _bridging_tails(cells, home, degree, k)


# Counterpart entries one slice of rows holds at most (a few large working arrays of this
# length instead of a dozen as long as the whole graph; common practice, no source).
SLICE_ENTRIES = 1 << 22


def _row_slices(indptr: np.ndarray, entries: int | None = None) -> list[slice]:
    """Consecutive row ranges holding at most ``entries`` stored entries each (a row with
    more is a range of its own)."""
    entries = SLICE_ENTRIES if entries is None else entries
    n = indptr.size - 1
    slices, start = [], 0
    while start < n:
        stop = int(np.searchsorted(indptr, indptr[start] + entries, side="right")) - 1
        stop = min(max(stop, start + 1), n)
        slices.append(slice(start, stop))
        start = stop
    return slices


@dataclass(frozen=True)
class _Cells:
    """Counterparts per (node, community) of one slice of rows, sorted by node then
    community, with each node's home community and labelled degree."""

    node: np.ndarray
    community: np.ndarray
    count: np.ndarray  # float64
    rows: slice
    degree: np.ndarray  # per row of the slice
    homes_of: np.ndarray  # the slice's nodes with labelled counterparts
    home: np.ndarray  # their home communities


def _community_cells(pattern: sp.csr_matrix, lab: np.ndarray, k: int, rows: slice) -> _Cells:
    """:class:`_Cells` of the rows ``rows``: the diagonal, explicit zeros and unlabelled
    counterparts left out. The home is the community holding most counterparts, the lower
    label on a tie."""
    lo, hi = pattern.indptr[rows.start], pattern.indptr[rows.stop]
    node = np.repeat(
        np.arange(rows.start, rows.stop, dtype=np.int64),
        np.diff(pattern.indptr[rows.start : rows.stop + 1]),
    )
    col = pattern.indices[lo:hi]
    keep = (col != node) & (pattern.data[lo:hi] != 0)
    keep &= lab[col] >= 0
    key = node[keep] * k + lab[col[keep]]
    del node, col, keep
    cells, count = np.unique(key, return_counts=True)
    del key
    cell_node, cell_comm = cells // k, cells % k
    starts = np.flatnonzero(np.diff(cell_node, prepend=-1))
    most = np.maximum.reduceat(count, starts) if starts.size else count
    # cells are sorted by community within a node: the first cell at the node's maximum is
    # the lowest community among the tied ones
    at_most = np.flatnonzero(count == np.repeat(most, np.diff(np.r_[starts, count.size])))
    first = at_most[np.diff(cell_node[at_most], prepend=-1) != 0]
    degree = np.bincount(cell_node - rows.start, weights=count, minlength=rows.stop - rows.start)
    return _Cells(
        node=cell_node,
        community=cell_comm,
        count=count.astype(np.float64),
        rows=rows,
        degree=degree,
        homes_of=cell_node[first],
        home=cell_comm[first],
    )


def _bridging_tails(
    cells: list[_Cells], home: np.ndarray, degree: np.ndarray, k: int
) -> np.ndarray:
    """Poisson tails of every (node, other community) cell, combined per node: the totals
    by (home, community) over every slice first, then each slice's tails against them."""
    n = home.size
    pair_keys, pair_sums = [], []
    home_total = np.zeros(k)
    community_total = np.zeros(k)
    for piece in cells:
        pair_key = home[piece.node] * k + piece.community
        keys, index = np.unique(pair_key, return_inverse=True)
        pair_keys.append(keys)
        pair_sums.append(np.bincount(index, weights=piece.count))
        home_total += np.bincount(home[piece.node], weights=piece.count, minlength=k)
        community_total += np.bincount(piece.community, weights=piece.count, minlength=k)
    # counts are whole numbers: their float64 sums are exact in any order
    keys, index = np.unique(np.concatenate(pair_keys), return_inverse=True)
    pair_total = np.bincount(index, weights=np.concatenate(pair_sums))
    share = community_total / community_total.sum()
    touched = np.zeros(n)
    smallest = np.zeros(n)
    for piece in cells:
        node, community, count = piece.node, piece.community, piece.count
        node_home = home[node]
        others = pair_total[np.searchsorted(keys, node_home * k + community)] - count
        others_home = home_total[node_home] - degree[node]  # leave the node's own ties out
        expected = degree[node] * (others + share[community]) / (others_home + 1.0)
        outside = community != node_home
        log_tail = np.where(outside, poisson.logsf(count - 1.0, expected), 0.0)
        touched += np.bincount(node, weights=outside.astype(np.float64), minlength=n)
        np.minimum.at(smallest, node, log_tail)
    # Sidak over the communities touched: 1 - (1 - p)**m, as m p far in the tail
    with np.errstate(divide="ignore", invalid="ignore"):
        exact = np.log(-np.expm1(touched * np.log1p(-np.exp(smallest))))
    corrected = np.where(smallest < -30.0, np.log(np.maximum(touched, 1)) + smallest, exact)
    corrected = np.where(touched > 0, corrected, 0.0)
    z = np.maximum(-ndtri_exp(np.clip(corrected, -1e5, 0.0)), 0.0)
    return np.where(degree > 0, z, np.nan)
