"""Sense-making: relate roles to familiar graph measures and name them.

RolX (Henderson et al., "RolX: structural role extraction & mining in large graphs",
KDD 2012, section on sense-making) explains roles by fitting familiar node measures
(degree, PageRank, clustering, betweenness, ...) on the node-role memberships with a
non-negative fit, so each role gets a non-negative affinity to each measure.  This
module computes the measures with sparse matrix operations (no per-node Python loops,
no networkx), fits the affinities and turns them into a short plain description and a
default name per role.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from itertools import pairwise
from typing import Any

import numpy as np
import scipy.sparse as sp

from .errors import EngineInputError
from .nnls import nnls_rows

__all__ = [
    "MEASURE_NAMES",
    "RoleDescription",
    "node_measures",
    "pagerank",
    "clustering_coefficient",
    "betweenness",
    "describe_roles",
]

MEASURE_NAMES = (
    "degree",
    "out_degree",
    "in_degree",
    "weighted_degree",
    "pagerank",
    "clustering",
    "betweenness",
    "reciprocity",
    "egonet_density",
    "out_share",
)

#: Above this many nodes, betweenness is estimated from a sample of sources by default.
EXACT_BETWEENNESS_MAX_NODES = 1000
#: Sources sampled by default on larger graphs (Brandes & Pich 2007 pivot estimate).
DEFAULT_BETWEENNESS_SAMPLES = 64


# ---------------------------------------------------------------------------
# measures
# ---------------------------------------------------------------------------


def _binary(M: sp.spmatrix) -> sp.csr_matrix:
    B = sp.csr_matrix(M, dtype=np.float64, copy=True)
    B.setdiag(0)
    B.eliminate_zeros()
    B.data[:] = 1.0
    return B


def pagerank(
    adjacency: sp.spmatrix, *, alpha: float = 0.85, tol: float = 1e-12, max_iter: int = 1000
) -> np.ndarray:
    """PageRank by power iteration on a weighted directed sparse adjacency.

    Row i of ``adjacency`` holds i's out-links with their weights.  Dangling nodes
    spread their rank uniformly and teleportation is uniform, the convention of Page,
    Brin, Motwani & Winograd (1999) as implemented by ``networkx.pagerank``.

    Parameters
    ----------
    adjacency : sparse matrix, shape (n, n)
    alpha : float
        Damping factor (probability of following a link).
    tol : float
        Stop when the L1 change of the scores is below ``n * tol``.
    max_iter : int
        Most power iterations.

    Returns
    -------
    ndarray, shape (n,)
        Scores summing to 1.
    """
    A = sp.csr_matrix(adjacency, dtype=np.float64)
    n = A.shape[0]
    if n == 0:
        return np.zeros(0)
    out = np.asarray(A.sum(axis=1)).ravel()
    inv = np.divide(1.0, out, out=np.zeros(n), where=out > 0)
    P = sp.diags(inv) @ A  # row-stochastic where out > 0
    PT = P.T.tocsr()
    dangling = out <= 0
    x = np.full(n, 1.0 / n)
    for _ in range(max_iter):
        prev = x
        x = alpha * (PT @ prev + prev[dangling].sum() / n) + (1.0 - alpha) / n
        if np.abs(x - prev).sum() < n * tol:
            break
    return x / x.sum()


def _oriented_triangles(
    A: sp.csr_matrix, degree: np.ndarray, block_work: int = 4_000_000
) -> np.ndarray:
    """Triangles through each node of a symmetric 0/1 adjacency.

    Edges are oriented from lower to higher (degree, index) rank, so each triangle
    c < a < b appears exactly once and every node has at most sqrt(2m) higher-ranked
    neighbours (the degree-ordering trick; Schank & Wagner, "Finding, counting and
    listing all triangles in large graphs", 2005).  With U the oriented adjacency,
    ``(U @ U) * U`` counts, per edge c -> b, the triangles in which c is lowest and b
    highest, and ``(U.T @ U) * U`` counts, per edge a -> b, those in which a is the
    middle node.  Both products only expand pairs of higher-ranked neighbours, and they
    are formed a block of rows at a time (about ``block_work`` expanded entries per
    block) so memory stays bounded; A @ A is never formed.
    """
    n = A.shape[0]
    rank = np.empty(n, dtype=np.int64)
    rank[np.lexsort((np.arange(n), degree))] = np.arange(n)
    C = A.tocoo()
    keep = rank[C.row] < rank[C.col]
    U = sp.csr_matrix((np.ones(int(keep.sum())), (C.row[keep], C.col[keep])), shape=(n, n))
    UT = U.T.tocsr()
    out_deg = np.diff(U.indptr).astype(np.float64)
    t = np.zeros(n)
    for left, mask_rows_of, add_cols in ((U, U, True), (UT, U, False)):
        # expanded entries of row r of left @ U: sum of out-degrees of r's neighbours
        work = left @ out_deg
        bounds = np.searchsorted(
            np.cumsum(work), np.arange(1, int(work.sum() // block_work) + 1) * block_work
        )
        edges = np.unique(np.r_[0, bounds, n].clip(0, n))
        for lo, hi in pairwise(edges):
            block = (left[lo:hi] @ U).multiply(mask_rows_of[lo:hi]).tocsr()
            t[lo:hi] += np.asarray(block.sum(axis=1)).ravel()
            if add_cols:
                t += np.asarray(block.sum(axis=0)).ravel()
    return t


def clustering_coefficient(adjacency: sp.spmatrix) -> tuple[np.ndarray, np.ndarray]:
    """Local clustering coefficient of the undirected, unweighted graph.

    ``c_i = 2 t_i / (d_i (d_i - 1))`` with t_i triangles through i and d_i its number
    of distinct neighbours (Watts & Strogatz 1998); 0 when d_i < 2, as in
    ``networkx.clustering``.  Direction and weights are ignored.

    Parameters
    ----------
    adjacency : sparse matrix, shape (n, n)

    Returns
    -------
    clustering, triangles : ndarray, shape (n,)
    """
    A = _binary(adjacency)
    A = _binary(A + A.T)
    d = np.asarray(A.sum(axis=1)).ravel()
    t = _oriented_triangles(A, d)
    denom = d * (d - 1)
    c = np.divide(2.0 * t, denom, out=np.zeros_like(t, dtype=float), where=denom > 0)
    return c, t


def betweenness(
    adjacency: sp.spmatrix, *, samples: int | None = None, seed: int = 0, batch: int | None = None
) -> np.ndarray:
    """Normalised shortest-path betweenness of the undirected, unweighted graph.

    Brandes' accumulation (Brandes, "A faster algorithm for betweenness centrality",
    J. Math. Sociol. 2001), run for a batch of sources at once: breadth-first levels
    and path counts come from sparse-matrix times dense-block products, and the
    dependencies are accumulated level by level in reverse, so the Python loop runs
    over BFS levels, never over nodes.  With ``samples`` < n the sources are a uniform
    random sample and the sum is scaled by n / samples (Brandes & Pich, "Centrality
    estimation in large networks", 2007).  Normalised like
    ``networkx.betweenness_centrality(normalized=True)``: divided by (n-1)(n-2).

    Parameters
    ----------
    adjacency : sparse matrix, shape (n, n)
        Direction and weights are ignored.
    samples : int, optional
        Number of source nodes; None or >= n means all (exact).
    seed : int
        Seed of the source sample.
    batch : int, optional
        Sources per block (memory is about 4 * batch * n * 8 bytes); chosen
        automatically when None.

    Returns
    -------
    ndarray, shape (n,)
    """
    A = _binary(adjacency)
    A = _binary(A + A.T)
    n = A.shape[0]
    if n <= 2:
        return np.zeros(n)
    if samples is None or samples >= n:
        sources = np.arange(n)
    else:
        if samples < 1:
            raise EngineInputError(f"betweenness samples must be at least 1, got {samples}")
        sources = np.sort(np.random.default_rng(seed).choice(n, size=int(samples), replace=False))
    if batch is None:
        batch = int(max(1, min(len(sources), 4_000_000 // max(n, 1))))
    total = np.zeros(n)
    for start in range(0, len(sources), batch):
        src = sources[start : start + batch]
        s = len(src)
        cols = np.arange(s)
        # node-major blocks (n x s, C order) keep the sparse-times-dense products fast
        dist = np.full((n, s), -1, dtype=np.int32)
        sigma = np.zeros((n, s))
        dist[src, cols] = 0
        sigma[src, cols] = 1.0
        frontier = sigma.copy()
        depth = 0
        while True:
            reach = A @ frontier  # path counts into the next level
            new = (reach > 0) & (dist < 0)
            if not new.any():
                break
            depth += 1
            dist[new] = depth
            sigma[new] = reach[new]
            frontier = np.where(new, reach, 0.0)
        delta = np.zeros((n, s))
        safe_sigma = np.where(sigma > 0, sigma, 1.0)
        for level in range(depth, 0, -1):
            coeff = np.where(dist == level, (1.0 + delta) / safe_sigma, 0.0)
            pulled = A @ coeff
            parent = dist == level - 1
            delta[parent] += sigma[parent] * pulled[parent]
        delta[src, cols] = 0.0
        total += delta.sum(axis=1)
    return total * (n / len(sources)) / ((n - 1) * (n - 2))


def node_measures(
    snapshot: Any, *, betweenness_samples: int | None = None, seed: int = 0
) -> tuple[tuple[str, ...], np.ndarray]:
    """Familiar measures per node of one snapshot, for sense-making.

    Parameters
    ----------
    snapshot : Snapshot
        Anything with ``counts`` and ``weights`` (n x n sparse, row = actor).
    betweenness_samples : int, optional
        Sources for betweenness; None means exact up to
        :data:`EXACT_BETWEENNESS_MAX_NODES` nodes and
        :data:`DEFAULT_BETWEENNESS_SAMPLES` sampled sources above.
    seed : int
        Seed of the betweenness source sample.

    Returns
    -------
    names : tuple of str
        :data:`MEASURE_NAMES`: ``degree`` (distinct counterparts), ``out_degree``,
        ``in_degree``, ``weighted_degree`` (summed weight in and out), ``pagerank``
        (on event counts), ``clustering`` (undirected), ``betweenness`` (undirected,
        normalised), ``reciprocity`` (share of counterparts with ties both ways),
        ``egonet_density`` (edges among the node and its neighbours over the possible
        ones, undirected), ``out_share`` (events sent / events sent and received; 0.5
        when none).
    values : ndarray, shape (n, len(names))

    Notes
    -----
    These are the kinds of measures RolX relates roles to (Henderson et al., KDD 2012,
    sense-making).
    """
    counts = sp.csr_matrix(snapshot.counts, dtype=np.float64)
    weights = sp.csr_matrix(snapshot.weights, dtype=np.float64)
    n = counts.shape[0]
    D = _binary(counts)
    out_deg = np.asarray(D.sum(axis=1)).ravel()
    in_deg = np.asarray(D.sum(axis=0)).ravel()
    mutual = np.asarray(D.multiply(D.T).sum(axis=1)).ravel()
    U = _binary(D + D.T)
    deg = np.asarray(U.sum(axis=1)).ravel()
    wdeg = np.asarray(weights.sum(axis=1)).ravel() + np.asarray(weights.sum(axis=0)).ravel()
    ev_out = np.asarray(counts.sum(axis=1)).ravel()
    ev_in = np.asarray(counts.sum(axis=0)).ravel()
    pr = pagerank(counts)
    clus, tri = clustering_coefficient(U)
    if betweenness_samples is None and n > EXACT_BETWEENNESS_MAX_NODES:
        betweenness_samples = DEFAULT_BETWEENNESS_SAMPLES
    btw = betweenness(U, samples=betweenness_samples, seed=seed)
    recip = np.divide(mutual, deg, out=np.zeros(n), where=deg > 0)
    possible = deg * (deg + 1) / 2.0
    ego = np.divide(deg + tri, possible, out=np.zeros(n), where=deg > 0)
    events = ev_out + ev_in
    out_share = np.divide(ev_out, events, out=np.full(n, 0.5), where=events > 0)
    values = np.column_stack([deg, out_deg, in_deg, wdeg, pr, clus, btw, recip, ego, out_share])
    return MEASURE_NAMES, values


# ---------------------------------------------------------------------------
# role descriptions
# ---------------------------------------------------------------------------


@dataclass(frozen=True)
class RoleDescription:
    """What a role looks like in familiar terms.

    Attributes
    ----------
    role_id : int
    name : str
        Default name, unique within the basis (renameable by users).
    description : str
        Short plain description, e.g. "ties out to many accounts, few reciprocated
        ties, low clustering".
    measure_affinity : dict
        Non-negative affinity of the role to each (scaled) measure: the value a node
        wholly in this role is expected to have, on a 0-1 scale per measure.
    profile : dict
        The role's profile (row of F) by feature name.
    """

    role_id: int
    name: str
    description: str
    measure_affinity: dict
    profile: dict


_COUNT_LIKE = {"degree", "out_degree", "in_degree", "weighted_degree", "pagerank", "betweenness"}

_PHRASES = {
    "degree": ("many counterparts", "few counterparts"),
    "out_degree": ("ties out to many accounts", "few ties out"),
    "in_degree": ("ties in from many accounts", "few ties in"),
    "weighted_degree": ("heavy volume", "light volume"),
    "pagerank": ("central in the flow", "peripheral in the flow"),
    "clustering": ("tight-knit neighbourhood", "low clustering"),
    "betweenness": ("sits between otherwise separate groups", "rarely between others"),
    "reciprocity": ("mostly reciprocated ties", "few reciprocated ties"),
    "egonet_density": ("dense neighbourhood", "sparse neighbourhood"),
    "out_share": ("mostly sends", "mostly receives"),
}

#: Contrast at or above which a measure reads "high" (1.5x the mean) / at or below "low" (half).
_HIGH, _LOW = 0.2, -1.0 / 3.0
#: Every condition of an archetype must reach this contrast for the name to apply.
_ARCHETYPE_MIN = 0.15

# Archetype name -> {measure: +1 wants high, -1 wants low}, in priority order (flow
# direction first: it is what reviewers look at first).  Our own words.
_ARCHETYPES = {
    "one-way sender": {"out_share": 1, "out_degree": 1, "reciprocity": -1},
    "collector": {"out_share": -1, "in_degree": 1},
    "reciprocal circle member": {"reciprocity": 1, "clustering": 1},
    "broker between groups": {"betweenness": 1, "clustering": -1},
    "busy hub": {"degree": 1, "weighted_degree": 1},
    "quiet participant": {"degree": -1, "weighted_degree": -1},
}


def _scaled_measures(names: Sequence[str], values: np.ndarray) -> np.ndarray:
    """Scale measures to [0, 1]: log1p for count-like ones, then divide by the maximum."""
    X = np.array(values, dtype=np.float64, copy=True)
    n = X.shape[0]
    for j, name in enumerate(names):
        col = X[:, j]
        if name == "pagerank":
            col = col * n  # 1 = uniform share
        if name in _COUNT_LIKE or col.max(initial=0) > 1:
            col = np.log1p(np.maximum(col, 0))
        X[:, j] = col
    top = np.nanmax(np.abs(X), axis=0) if n else np.ones(X.shape[1])
    return np.divide(X, top, out=np.zeros_like(X), where=top > 0)


def _levels(names: Sequence[str], affinity: np.ndarray, mean: np.ndarray) -> np.ndarray:
    """Contrast of each role's affinity with the population mean, in [-1, 1].

    ``(a - mean) / (a + mean)``: 0 at the mean, +0.2 at 1.5x the mean, -1/3 at half of
    it, -1 when the role has none of the measure.  ``out_share`` is compared with the
    balanced value 0.5 instead: ``2 (a - 0.5)``.
    """
    m = mean[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.divide(
            affinity - m, affinity + m, out=np.zeros_like(affinity), where=(affinity + m) > 1e-12
        )
    for j, name in enumerate(names):
        if name == "out_share":
            c[:, j] = 2.0 * (affinity[:, j] - 0.5)
    return np.clip(c, -1.0, 1.0)


def describe_roles(
    basis: Any,
    memberships: Any,
    measure_names: Sequence[str],
    measures: np.ndarray,
    *,
    max_phrases: int = 3,
) -> list[RoleDescription]:
    """Describe and name each role of ``basis`` from familiar node measures.

    Fits the scaled measures on the role mixtures, ``measures ~ mixture @ E`` with
    ``E >= 0`` (one non-negative least-squares problem per measure), as the RolX
    sense-making step does (Henderson et al., KDD 2012).  Row r of E is role r's
    affinity to each measure.  A role's description lists its most distinctive
    measures (affinity at least 1.5x or at most 0.5x the population mean); its name is
    the first of a few structural archetypes, in priority order, whose conditions all
    hold ("one-way sender", "collector",
    "broker between groups", "reciprocal circle member", "busy hub", "quiet
    participant"; "mixed participant" otherwise), made unique within the basis.

    Parameters
    ----------
    basis : RoleBasis
    memberships : Memberships or ndarray, shape (n, k)
        Mixtures of the nodes the measures were computed on (same row order).
    measure_names : sequence of str
    measures : ndarray, shape (n, m)

    Returns
    -------
    list of RoleDescription, in the basis's role order
    """
    mix = np.asarray(getattr(memberships, "mixture", memberships), dtype=np.float64)
    X = np.asarray(measures, dtype=np.float64)
    names = tuple(measure_names)
    k = basis.F.shape[0]
    if mix.ndim != 2 or mix.shape[1] != k:
        raise EngineInputError(f"memberships must be an n x {k} mixture array, got {mix.shape}")
    if X.shape != (mix.shape[0], len(names)):
        raise EngineInputError(
            f"measures must be {mix.shape[0]} x {len(names)} (one row per membership row, one "
            f"column per measure name), got {X.shape}"
        )
    ok = np.isfinite(mix).all(axis=1) & np.isfinite(X).all(axis=1)
    mix, X = mix[ok], X[ok]
    S = _scaled_measures(names, X)
    E = nnls_rows(mix.T, S.T).T if mix.shape[0] else np.zeros((k, len(names)))
    mean = S.mean(axis=0) if S.shape[0] else np.zeros(len(names))
    lr = _levels(names, E, mean)
    descriptions = [_describe(names, lr[r], max_phrases) for r in range(k)]
    chosen = _names(names, lr)
    out = []
    for r in range(k):
        out.append(
            RoleDescription(
                role_id=int(basis.role_ids[r]),
                name=chosen[r],
                description=descriptions[r],
                measure_affinity={m: float(E[r, j]) for j, m in enumerate(names)},
                profile={f: float(v) for f, v in zip(basis.feature_names, basis.F[r], strict=True)},
            )
        )
    return out


def _notable(names: Sequence[str], lr_row: np.ndarray) -> list[tuple[float, str]]:
    found = []
    for j, m in enumerate(names):
        if m not in _PHRASES:
            continue
        high, low = (0.4, -0.4) if m == "out_share" else (_HIGH, _LOW)
        if lr_row[j] >= high:
            found.append((abs(lr_row[j]) + (0.01 if m == "out_share" else 0), _PHRASES[m][0]))
        elif lr_row[j] <= low:
            found.append((abs(lr_row[j]) + (0.01 if m == "out_share" else 0), _PHRASES[m][1]))
    found.sort(key=lambda x: -x[0])
    return found


def _describe(names: Sequence[str], lr_row: np.ndarray, max_phrases: int) -> str:
    found = _notable(names, lr_row)
    if not found:
        return "close to the population average on every measure"
    return ", ".join(p for _, p in found[:max_phrases])


def _names(names: Sequence[str], lr: np.ndarray) -> list[str]:
    """First archetype (in priority order) whose every condition holds clearly."""
    index = {m: j for j, m in enumerate(names)}
    k = lr.shape[0]
    best, scores = [], []
    for r in range(k):
        top, top_score = "mixed participant", 0.0
        for arch, wants in _ARCHETYPES.items():
            if not all(m in index for m in wants):
                continue
            score = min(sign * lr[r, index[m]] for m, sign in wants.items())
            if score >= _ARCHETYPE_MIN:
                top, top_score = arch, float(score)
                break
        best.append(top)
        scores.append(top_score)
    final = list(best)
    for name in set(best):
        holders = [r for r in range(k) if best[r] == name]
        if len(holders) < 2:
            continue
        holders.sort(key=lambda r: -scores[r])
        for r in holders[1:]:
            extra = next((p for _, p in _notable(names, lr[r]) if p not in name), None)
            final[r] = f"{name}, {extra}" if extra else name
    seen: dict[str, int] = {}
    for r in range(k):
        seen[final[r]] = seen.get(final[r], 0) + 1
        if seen[final[r]] > 1:
            final[r] = f"{final[r]} ({seen[final[r]]})"
    return final
