"""Bridging: ties an account has into communities its own community hardly ever deals with.

A role mixture describes an account's *local* structure, so it misses a courier that keeps
its usual mix of paying in and paying out but starts carrying goods between two parts of
the graph that never traded: what changes is *where* its counterparts sit. Granovetter
(1973, "The strength of weak ties", as recalled) calls such a tie a local bridge, and Burt
(1992, "Structural holes", as recalled) an account that spans a structural hole between
groups with few other ties.

Two steps, both on one window's undirected interaction graph:

1. :func:`community_labels` splits the graph into ``k`` communities by regularised
   spectral clustering: the leading ``k`` eigenvectors of the regularised normalised
   adjacency ``D_t^{-1/2} (A + tau/n 11^T) D_t^{-1/2}`` (Qin & Rohe, NIPS 2013, as
   recalled; Amini et al., Ann. Statist. 2013), rows scaled to unit length and grouped by
   k-means (Ng, Jordan & Weiss, NIPS 2002). The ``tau`` term keeps the eigenvectors of a
   sparse graph from settling on its small dangling pieces.
2. :func:`bridging_zscore` asks, for every account, how surprising its number of
   counterparts in each *other* community is: each account's home is the community most
   of its counterparts sit in; the chance that a tie from home community ``h`` lands in
   community ``c`` is estimated from everybody else's ties (leave-one-out, one pseudo-tie
   per pair); the account's count is compared with a Poisson law of mean
   ``degree * P(c | h)`` and the upper-tail probability turned into a normal z-score.
   Adding ties to an adjacent, busy community barely moves it; a dozen ties into a
   community its home never deals with gives z of 5-10.

Pure: arrays in, arrays out; vectorised with scipy.sparse (no loop over nodes).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import LinearOperator, eigsh
from scipy.special import ndtri_exp
from scipy.stats import poisson
from sklearn.cluster import KMeans

__all__ = ["undirected_ties", "community_labels", "bridging_zscore", "DENSE_BELOW"]

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
    S = (M + M.T).tocsr()
    S.setdiag(0.0)
    S.eliminate_zeros()
    S.data = np.log1p(S.data)
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


def bridging_zscore(ties, labels) -> np.ndarray:
    """How surprising each node's ties into other communities are, as a normal z-score.

    Parameters
    ----------
    ties : sparse or dense array, shape (n, n)
        Symmetric tie matrix; only which pairs are tied matters (distinct counterparts).
    labels : array of int, shape (n,)
        Community of each node (:func:`community_labels`).

    Returns
    -------
    ndarray, shape (n,)
        ``max`` over the communities ``c`` other than the node's home of
        ``-Phi^{-1}(P[X >= o_c])`` with ``X ~ Poisson(d * P(c | home))``, clipped at 0; 0
        for a node without ties outside its home, NaN for a node without ties.

    Notes
    -----
    ``o_c`` is the node's number of counterparts in ``c`` and ``d`` its number of
    counterparts. The home is the community holding most of its counterparts (ties go to
    the lower label). ``P(c | h) = (T_hc + 1) / (T_h + k)`` where ``T_hc`` counts the ties
    from nodes whose home is ``h`` into ``c``, leaving the node's own ties out, so an
    account that is the only link between two communities does not make its own ties look
    ordinary. The tail probability goes to a z-score with ``scipy.special.ndtri_exp`` on
    its logarithm, exact far into the tail.
    """
    pattern = sp.csr_matrix(ties, dtype=np.float64)
    pattern.setdiag(0.0)
    pattern.eliminate_zeros()
    pattern.data[:] = 1.0
    lab = np.asarray(labels, dtype=np.int64).reshape(-1)
    n = pattern.shape[0]
    if lab.size != n:
        raise ValueError(f"labels need one entry per node ({n}), got {lab.size}")
    if n == 0:
        return np.zeros(0)
    k = int(lab.max()) + 1
    coo = pattern.tocoo()
    # per node: counterparts in each community
    by_community = sp.csr_matrix((coo.data, (coo.row, lab[coo.col])), shape=(n, k)).toarray()
    degree = by_community.sum(axis=1)
    home = np.argmax(by_community, axis=1)
    pair_ties = np.zeros((k, k))
    np.add.at(pair_ties, (home[coo.row], lab[coo.col]), 1.0)
    others = pair_ties[home] - by_community  # leave the node's own ties out
    share = (others + 1.0) / (others.sum(axis=1, keepdims=True) + k)
    expected = share * degree[:, None]
    log_tail = poisson.logsf(by_community - 1.0, expected)  # log P[X >= observed]
    outside = by_community > 0
    outside[np.arange(n), home] = False
    log_tail = np.where(outside, log_tail, 0.0)
    z = np.maximum(-ndtri_exp(np.minimum(log_tail.min(axis=1), 0.0)), 0.0)
    return np.where(degree > 0, z, np.nan)
