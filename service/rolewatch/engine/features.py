"""ReFeX recursive structural features (Henderson et al., KDD 2011).

Henderson, Gallagher, Li, Akoglu, Eliassi-Rad, Tong, Faloutsos, "It's who you know:
graph mining using recursive structural features", KDD 2011. The method:

1. *Base features* per node: local (degrees, strengths, event counts, reciprocity) and
   egonet features (edges inside the egonet and edges leaving it).
2. *Recursive features*: sums and means of existing features over a node's in-, out- and
   all neighbours, computed round after round.
3. *Vertical logarithmic binning* with fraction ``p``: the ``p`` fraction of nodes with
   the lowest values get bin 0, the lowest ``p`` fraction of the rest bin 1, and so on.
4. *Pruning*: features whose binned values agree within ``s`` on every node are joined in
   an agreement graph; of each connected component only the earliest feature is kept.
   Discovery stops when a round keeps no new feature, or after ``max_rounds``.

:meth:`FeatureRecipe.discover` runs this on reference snapshots and freezes the outcome
(kept features and bin edges) so that :meth:`FeatureRecipe.transform` produces exactly the
same columns, binned on the same scale, for every later window.

Definitions used here (``N(v)`` = counterparts of ``v`` ignoring direction; the *egonet*
of ``v`` is ``{v} ∪ N(v)``; "arc" = distinct ordered pair with at least one event):

============================  ==========================================================
``in_degree``                 number of distinct accounts with an arc into ``v``
``out_degree``                number of distinct accounts ``v`` has an arc to
``degree``                    ``|N(v)|``, distinct counterparts in either direction
``in_strength``               summed weight of events into ``v``
``out_strength``              summed weight of events out of ``v``
``in_events``                 number of events into ``v``
``out_events``                number of events out of ``v``
``reciprocity``               share of ``N(v)`` with arcs both ways (0 when isolated)
``ego_edges``                 undirected edges with both ends in the egonet
                              ``= degree(v) + triangles(v)``
``ego_boundary_edges``        undirected edges with exactly one end in the egonet
                              ``= Σ_{u∈N(v)} degree(u) − degree(v) − 2·triangles(v)``
``ego_arcs_within``           arcs with both ends in the egonet
                              ``= in_degree(v) + out_degree(v) + arcs among N(v)``
``ego_arcs_out``              arcs from inside the egonet to outside it
                              ``= Σ_{u∈N(v)} out_degree(u) − in_degree(v) − arcs among N(v)``
``ego_arcs_in``               arcs from outside the egonet into it
                              ``= Σ_{u∈N(v)} in_degree(u) − out_degree(v) − arcs among N(v)``
============================  ==========================================================

Recursive features are named ``op(parent)`` with ``op`` one of ``sum_in``, ``mean_in``
(over in-neighbours, accounts with an arc into ``v``), ``sum_out``, ``mean_out`` (over
out-neighbours) and ``sum_all``, ``mean_all`` (over ``N(v)``); a mean over no neighbour
is 0. Example: ``mean_out(sum_in(out_degree))``.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp

from .snapshot import Snapshot

__all__ = [
    "AGGREGATES",
    "BASE_FEATURES",
    "FeatureRecipe",
    "FeatureTable",
    "bin_edges",
    "apply_bins",
    "bin_dtype",
    "max_bins",
    "prune_agreeing",
    "triangles_per_node",
]

FORMAT = "rolewatch.feature-recipe"
FORMAT_VERSION = 1

LOCAL_FEATURES = (
    "in_degree",
    "out_degree",
    "degree",
    "in_strength",
    "out_strength",
    "in_events",
    "out_events",
    "reciprocity",
)
EGONET_FEATURES = (
    "ego_edges",
    "ego_boundary_edges",
    "ego_arcs_within",
    "ego_arcs_out",
    "ego_arcs_in",
)
BASE_FEATURES = LOCAL_FEATURES + EGONET_FEATURES
AGGREGATES = ("sum_in", "mean_in", "sum_out", "mean_out", "sum_all", "mean_all")
BINNING_MODES = ("frozen", "relative")


# --------------------------------------------------------------------------- kernels


def _binary(m: sp.spmatrix) -> sp.csr_matrix:
    """Pattern of ``m`` as a float64 CSR matrix of ones (explicit entries kept)."""
    m = sp.csr_matrix(m)
    return sp.csr_matrix((np.ones(m.nnz), m.indices, m.indptr), shape=m.shape)


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


def _triangle_parts(
    S: sp.csr_matrix, R: sp.csr_matrix | None, *, max_wedges: int = 4_000_000
) -> tuple[np.ndarray, np.ndarray]:
    """Triangles per node, and triangles whose edge opposite the node lies in ``R``.

    Degree-ordered ("forward") triangle listing: nodes are ranked by ``(degree, id)`` and
    each undirected edge is kept once, pointing to the higher rank (``U``). Every
    triangle then appears exactly once as a node ``a`` with two out-neighbours ``b, c``
    in ``U`` that are joined by an edge of ``U``. The pairs of out-neighbours ("wedges") are generated with
    array arithmetic in chunks and looked up among ``U``'s sorted edge keys. A node points
    to at most ``sqrt(2m)`` higher-ranked nodes, so a hub (highest rank, no out-edges)
    adds no wedges; ``A @ A`` is never formed.
    """
    n = S.shape[0]
    tri = np.zeros(n)
    opposite = np.zeros(n)
    if n == 0 or S.nnz == 0:
        return tri, opposite
    # Relabel nodes by rank: U is then the strict upper triangle, its edge keys are
    # sorted, and the wedge queries of one node come out sorted too (cache-friendly).
    deg = np.diff(S.indptr)
    order = np.lexsort((np.arange(n), deg))
    U = sp.triu(S[order][:, order], k=1, format="csr")
    U.sort_indices()
    keys = _edge_keys(U)
    if R is not None and R.nnz:
        R_ranked = sp.csr_matrix(R)[order][:, order]
        R_ranked.sort_indices()
        reciprocal_by_key = _contains(_edge_keys(R_ranked), keys)[0]
    else:
        reciprocal_by_key = np.zeros(U.nnz, dtype=bool)
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
    Degree-ordered orientation and sparse products (see ``_triangle_parts``); used for the
    egonet features of ReFeX (Henderson et al., KDD 2011).
    """
    A = _binary(adjacency)
    A.setdiag(0)
    A.eliminate_zeros()
    S = _binary(A + A.T)
    S.sort_indices()
    return _triangle_parts(S, None)[0]


class _Graph:
    """Lazily built sparse views of one snapshot, shared by all feature computations."""

    def __init__(self, snapshot: Snapshot) -> None:
        self.snapshot = snapshot
        self.n = snapshot.n_nodes
        self._cache: dict[str, Any] = {}

    def _get(self, key: str, build):
        if key not in self._cache:
            self._cache[key] = build()
        return self._cache[key]

    @property
    def A(self) -> sp.csr_matrix:
        return self._get("A", lambda: _binary(self.snapshot.counts))

    @property
    def AT(self) -> sp.csr_matrix:
        return self._get("AT", lambda: self.A.T.tocsr())

    @property
    def S(self) -> sp.csr_matrix:
        def build():
            S = _binary(self.A + self.AT)
            S.sort_indices()
            return S

        return self._get("S", build)

    @property
    def R(self) -> sp.csr_matrix:
        return self._get("R", lambda: sp.csr_matrix(self.A.multiply(self.AT)))

    def degree_of(self, direction: str) -> np.ndarray:
        m = {"in": self.AT, "out": self.A, "all": self.S}[direction]
        return self._get(f"deg_{direction}", lambda: np.diff(m.indptr).astype(np.float64))

    def adjacency_of(self, direction: str) -> sp.csr_matrix:
        return {"in": self.AT, "out": self.A, "all": self.S}[direction]

    def triangles(self) -> tuple[np.ndarray, np.ndarray]:
        return self._get("tri", lambda: _triangle_parts(self.S, self.R))

    def base(self, name: str) -> np.ndarray:
        """One base feature column (float64, length n)."""
        return self._get(f"base:{name}", lambda: self._compute_base(name))

    def _compute_base(self, name: str) -> np.ndarray:
        s = self.snapshot
        if name == "in_degree":
            return self.degree_of("in")
        if name == "out_degree":
            return self.degree_of("out")
        if name == "degree":
            return self.degree_of("all")
        if name == "in_strength":
            return np.asarray(s.weights.sum(axis=0), dtype=np.float64).ravel()
        if name == "out_strength":
            return np.asarray(s.weights.sum(axis=1), dtype=np.float64).ravel()
        if name == "in_events":
            return np.asarray(s.counts.sum(axis=0), dtype=np.float64).ravel()
        if name == "out_events":
            return np.asarray(s.counts.sum(axis=1), dtype=np.float64).ravel()
        if name == "reciprocity":
            both = np.diff(self.R.indptr).astype(np.float64)
            return _safe_divide(both, self.degree_of("all"))
        tri, opposite_reciprocal = self.triangles()
        deg, din, dout = self.degree_of("all"), self.degree_of("in"), self.degree_of("out")
        arcs_among = tri + opposite_reciprocal  # each neighbour-neighbour edge holds 1 or 2 arcs
        if name == "ego_edges":
            return deg + tri
        if name == "ego_boundary_edges":
            return self.S @ deg - deg - 2.0 * tri
        if name == "ego_arcs_within":
            return din + dout + arcs_among
        if name == "ego_arcs_out":
            return self.S @ dout - din - arcs_among
        if name == "ego_arcs_in":
            return self.S @ din - dout - arcs_among
        raise KeyError(f"unknown base feature {name!r}")

    def inverse_degree(self, direction: str) -> np.ndarray:
        """``1 / degree`` with 0 for isolated nodes (a mean over no neighbour is 0)."""

        def build():
            deg = self.degree_of(direction)
            return np.divide(1.0, deg, out=np.zeros_like(deg), where=deg > 0)

        return self._get(f"inv_{direction}", build)

    def aggregate_into(self, op: str, column: np.ndarray, out: np.ndarray) -> np.ndarray:
        """One ReFeX aggregate of one contiguous column, written into ``out``.

        One sparse matrix-vector product per column: cheaper than stacking columns into
        a row-major block for a matrix-matrix product and scattering the result back.
        """
        kind, direction = op.split("_")
        if self.n == 0:
            return out
        out[...] = self.adjacency_of(direction) @ column
        if kind == "mean":
            out *= self.inverse_degree(direction)
        return out

    def aggregate(self, op: str, columns: Sequence[np.ndarray]) -> list[np.ndarray]:
        """Apply one ReFeX aggregate to every column; returns new contiguous columns."""
        return [self.aggregate_into(op, np.ascontiguousarray(c), np.empty(self.n)) for c in columns]


def _safe_divide(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """``num / den`` with 0 where ``den`` is 0 (a mean over no neighbour)."""
    den = np.broadcast_to(den, num.shape)
    return np.divide(num, den, out=np.zeros(num.shape, dtype=np.float64), where=den > 0)


# --------------------------------------------------------------------------- binning


RELATIVE_TIE = 1e-9
"""Values within this relative distance of each other count as tied when binning, so that
rounding differences (summation order in sums and means) never move a node across a bin
edge (common practice, no source)."""


def _tie_slack(x: np.ndarray | float) -> np.ndarray | float:
    return RELATIVE_TIE * np.maximum(np.abs(x), 1.0)


def bin_edges(values: np.ndarray, fraction: float = 0.5) -> np.ndarray:
    """Vertical logarithmic bin edges of one feature (Henderson et al., KDD 2011).

    The ``ceil(fraction · r)`` lowest of the ``r`` values not yet binned form the next bin,
    extended to every value tied with its largest member (equal within a relative
    ``1e-9``). The returned edges are the largest value of each bin except the last: a
    value ``x`` gets bin ``#{edges < x}``, so values above the reference maximum stay in
    the top bin.

    Parameters
    ----------
    values : numpy.ndarray
        1-D raw feature values (finite).
    fraction : float
        ``p`` in (0, 1).

    Returns
    -------
    numpy.ndarray
        Increasing float64 edges (empty for a constant or empty column).

    Examples
    --------
    Values 1..8 with p = 0.5 (worked by hand): the lowest 4 (1-4) are bin 0, the lowest
    2 of the remaining 4 (5, 6) bin 1, then 7 is bin 2 and 8 is bin 3; edges [4, 6, 7].
    """
    v = np.sort(np.asarray(values, dtype=np.float64).ravel())
    n = v.size
    cuts: list[float] = []
    start = 0
    while start < n:
        take = max(1, math.ceil(fraction * (n - start)))
        top = v[start + take - 1]
        start = int(np.searchsorted(v, top + _tie_slack(top), side="right"))
        cuts.append(float(v[start - 1]))
    return np.asarray(cuts[:-1], dtype=np.float64)


def bin_dtype(n_bins: int) -> np.dtype:
    """Smallest unsigned integer dtype that holds bin indices ``0 .. n_bins - 1``."""
    for dtype in (np.uint8, np.uint16, np.uint32):
        if n_bins - 1 <= np.iinfo(dtype).max:
            return np.dtype(dtype)
    return np.dtype(np.uint64)


def max_bins(n_values: int, fraction: float) -> int:
    """Upper bound on the bins :func:`bin_edges` makes from ``n_values`` values.

    Each bin takes at least ``ceil(fraction · r)`` of the ``r`` values left, so after
    ``m`` bins at most ``n (1 - fraction)^m`` values remain: at most one after
    ``ceil(log(n) / -log(1 - fraction))`` bins, which fills one more bin; one further bin
    is allowed for floating-point rounding of the logarithms.
    """
    if n_values <= 1:
        return 1
    shrinking = math.log(n_values) / -math.log1p(-fraction)
    return int(min(n_values, math.ceil(shrinking) + 2))


def apply_bins(values: np.ndarray, edges: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """Bin index ``#{edges e : e < x}`` of every value.

    ``x`` within a relative ``1e-9`` of an edge counts as equal to it (stays in that bin).

    Parameters
    ----------
    values : numpy.ndarray
        Raw feature values.
    edges : numpy.ndarray
        Increasing bin edges from :func:`bin_edges`.
    out : numpy.ndarray, optional
        Array shaped like ``values`` (e.g. a column of a feature table) to write the bins
        into; an unsigned integer ``out`` must hold the top index, ``len(edges)``.

    Returns
    -------
    numpy.ndarray
        ``out`` when given, else a new array of :func:`bin_dtype` for ``len(edges) + 1``
        bins.
    """
    edges = np.asarray(edges, dtype=np.float64)
    upper = edges + _tie_slack(edges)
    values = np.asarray(values, dtype=np.float64)
    if out is None:
        out = np.empty(values.shape, dtype=bin_dtype(upper.size + 1))
    elif out.dtype.kind == "u" and upper.size > np.iinfo(out.dtype).max:
        raise ValueError(
            f"{upper.size + 1} bins do not fit in {out.dtype}; use bin_dtype() for out"
        )
    if upper.size > 64:
        out[...] = np.searchsorted(upper, values, side="left")
        return out
    # a few comparisons beat a branchy binary search per value
    counts = (
        out if out.dtype.kind == "u" else np.empty(values.shape, dtype=bin_dtype(upper.size + 1))
    )
    counts[...] = 0
    above = np.empty(values.shape, dtype=bool)
    for edge in upper:
        np.greater(values, edge, out=above)
        counts += above
    if counts is not out:
        out[...] = counts
    return out


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
    b = np.asarray(binned, dtype=(np.int8 if small else np.int32) if integral else np.float64)
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


# --------------------------------------------------------------------------- recipe


@dataclass(frozen=True)
class FeatureTable:
    """ReFeX features of one snapshot, computed by a :class:`FeatureRecipe`.

    Attributes
    ----------
    nodes : numpy.ndarray
        Account ids, same order as the snapshot.
    names : tuple of str
        Column names, the recipe's features in order.
    raw : numpy.ndarray
        n x f float64 unbinned values (shown as evidence).
    binned : numpy.ndarray
        n x f vertical logarithmic bin indices (Henderson et al., KDD 2011), the matrix
        RolX factorises; an unsigned integer dtype (``uint8`` unless a feature has more
        than 256 bins), eight times smaller than float64, so windows of a million events
        stay cheap to transform and to keep.
    recipe_version : str
    """

    nodes: np.ndarray
    names: tuple[str, ...]
    raw: np.ndarray
    binned: np.ndarray
    recipe_version: str

    def column(self, name: str, *, binned: bool = False) -> np.ndarray:
        """One feature column by name."""
        if name not in self.names:
            raise KeyError(f"feature {name!r} is not in this table (recipe {self.recipe_version})")
        j = self.names.index(name)
        return (self.binned if binned else self.raw)[:, j]


@dataclass(frozen=True)
class _Def:
    name: str
    op: str  # a base feature name, or an aggregate
    parent: str | None
    round: int


def _compute(graph: _Graph, defs: Sequence[_Def]) -> np.ndarray:
    """Raw values of ``defs`` on one graph as an n x f Fortran-ordered matrix.

    ``defs`` must hold every ancestor of its recursive features (a recipe always does).
    Features are evaluated round by round, each straight into its output column from
    its parent's column (both contiguous in the Fortran-ordered matrix); a sum and a mean
    over the same neighbours of the same parent share one sparse product
    (:func:`_aggregate_layer`).
    """
    index = {d.name: j for j, d in enumerate(defs)}
    missing = [d.parent for d in defs if d.parent is not None and d.parent not in index]
    if missing:
        raise ValueError(
            f"feature {missing[0]!r} is needed as a parent but is not defined before its children"
        )
    out = np.zeros((graph.n, len(defs)), order="F")
    for rnd in sorted({d.round for d in defs}):
        layer = [d for d in defs if d.round == rnd]
        if rnd == 0:
            for d in layer:
                out[:, index[d.name]] = graph.base(d.op)
            continue
        _aggregate_layer(graph, layer, index, out)
    return out


def _aggregate_layer(
    graph: _Graph, layer: Sequence[_Def], index: dict[str, int], out: np.ndarray
) -> None:
    """Fill the columns of one recursive round of ReFeX (Henderson et al., KDD 2011).

    ``sum_d(p)`` and ``mean_d(p)`` need the same neighbour sum ``M_d @ p``: it is
    computed once per (direction, parent) into the first of their output columns, and the
    mean is that sum scaled by ``1 / degree`` (the same operations, in the same order, as
    :meth:`_Graph.aggregate_into`, so the values are bit for bit the same). One sparse
    matrix-vector product per column is faster than a product with a block of columns
    here, which also needs the columns gathered and scattered.
    """
    if graph.n == 0:
        return
    # (direction, parent column) -> {"sum" / "mean": output column}
    targets: dict[tuple[str, int], dict[str, int]] = {}
    for d in layer:
        kind, direction = d.op.split("_")
        targets.setdefault((direction, index[d.parent]), {})[kind] = index[d.name]
    for (direction, parent), cols in targets.items():
        first = cols.get("sum", cols.get("mean"))
        out[:, first] = graph.adjacency_of(direction) @ out[:, parent]
        if "mean" in cols:
            np.multiply(out[:, first], graph.inverse_degree(direction), out=out[:, cols["mean"]])


def _parse(name: str) -> _Def:
    """Feature definition from its readable name, e.g. ``mean_out(sum_in(degree))``."""
    if name in BASE_FEATURES:
        return _Def(name, name, None, 0)
    op, sep, rest = name.partition("(")
    if not sep or not rest.endswith(")") or op not in AGGREGATES:
        raise ValueError(
            f"unknown feature {name!r}; expected a base feature or op(parent) with op in {AGGREGATES}"
        )
    parent = _parse(rest[:-1])
    return _Def(name, op, parent.name, parent.round + 1)


def _canonical(body: dict) -> str:
    return json.dumps(
        body, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False
    )


def _as_snapshots(snapshots: Snapshot | Iterable[Snapshot]) -> list[Snapshot]:
    if isinstance(snapshots, Snapshot):
        return [snapshots]
    out = list(snapshots)
    if not out:
        raise ValueError("discover needs at least one reference snapshot")
    for s in out:
        if not isinstance(s, Snapshot):
            raise TypeError(f"expected Snapshot objects, got {type(s).__name__}")
    return out


class FeatureRecipe:
    """Frozen ReFeX feature set and binning learnt on reference snapshots.

    Build with :meth:`discover` (Henderson et al., KDD 2011) or :meth:`from_dict`; apply
    with :meth:`transform`. The recipe is immutable, JSON-serialisable and versioned by a
    short sha256 of its canonical JSON body.

    Attributes
    ----------
    names : tuple of str
        Kept features in generation order (base first, then round by round).
    version : str
        12 hex digits of sha256 over the canonical JSON body.
    binning : str
        ``"frozen"`` (apply the reference bin edges) or ``"relative"`` (re-bin each
        snapshot by its own values).
    """

    __slots__ = (
        "_defs",
        "_edges",
        "bin_fraction",
        "tolerance",
        "tolerance_step",
        "binning",
        "max_rounds",
        "reference",
        "version",
    )

    def __init__(
        self,
        defs: Sequence[_Def],
        edges: Sequence[np.ndarray],
        *,
        bin_fraction: float,
        tolerance: float,
        binning: str,
        max_rounds: int,
        reference: dict,
        tolerance_step: float = 0.0,
    ) -> None:
        _check_params(bin_fraction, tolerance, binning, max_rounds)
        _check_params(bin_fraction, tolerance_step, binning, max_rounds)
        object.__setattr__(self, "_defs", tuple(defs))
        object.__setattr__(
            self, "_edges", tuple(np.asarray(e, dtype=np.float64).copy() for e in edges)
        )
        for e in self._edges:
            e.setflags(write=False)
        object.__setattr__(self, "bin_fraction", float(bin_fraction))
        object.__setattr__(self, "tolerance", float(tolerance))
        object.__setattr__(self, "tolerance_step", float(tolerance_step))
        object.__setattr__(self, "binning", binning)
        object.__setattr__(self, "max_rounds", int(max_rounds))
        object.__setattr__(self, "reference", dict(reference))
        digest = hashlib.sha256(_canonical(self._body()).encode()).hexdigest()[:12]
        object.__setattr__(self, "version", digest)

    def __setattr__(self, name, value):
        raise AttributeError("FeatureRecipe is frozen")

    def __repr__(self) -> str:
        return f"FeatureRecipe(version={self.version!r}, features={len(self._defs)}, binning={self.binning!r})"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, FeatureRecipe) and self.to_dict() == other.to_dict()

    def __hash__(self) -> int:
        return hash(self.version)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(d.name for d in self._defs)

    @property
    def edges(self) -> dict[str, np.ndarray]:
        """Frozen bin edges per feature (read-only arrays)."""
        return {d.name: e for d, e in zip(self._defs, self._edges)}

    # ---------------------------------------------------------------- discovery

    @classmethod
    def discover(
        cls,
        snapshots: Snapshot | Iterable[Snapshot],
        *,
        max_rounds: int = 3,
        bin_fraction: float = 0.5,
        tolerance: float = 1.0,
        tolerance_step: float = 1.0,
        binning: str = "frozen",
    ) -> FeatureRecipe:
        """Run ReFeX feature discovery on reference snapshots (Henderson et al., KDD 2011).

        Parameters
        ----------
        snapshots : Snapshot or iterable of Snapshot
            Reference windows; their node rows are pooled for binning and pruning.
        max_rounds : int
            Maximum recursive rounds after the base features (>= 0).
        bin_fraction : float
            ``p`` of vertical logarithmic binning, in (0, 1).
        tolerance : float
            ``s`` of the base round: binned columns differing by at most this on every
            node agree.
        tolerance_step : float
            Added to ``s`` at every recursive round, so round ``r`` prunes with
            ``tolerance + r * tolerance_step``. ReFeX raises the tolerance as the rounds go
            (Henderson et al., KDD 2011, as recalled); without it every round multiplies the
            kept features by about the number of aggregates (six here) and a three-round
            recipe keeps thousands of near-duplicate columns.
        binning : {"frozen", "relative"}
            How :meth:`transform` bins later snapshots.

        Returns
        -------
        FeatureRecipe
        """
        _check_params(bin_fraction, tolerance, binning, max_rounds)
        _check_params(bin_fraction, tolerance_step, binning, max_rounds)
        snaps = _as_snapshots(snapshots)
        graphs = [_Graph(s) for s in snaps]

        kept_defs: list[_Def] = []
        kept_edges: list[np.ndarray] = []
        kept_bin = np.zeros((sum(g.n for g in graphs), 0), dtype=np.uint8)
        # raw columns of the features kept in the previous round, per snapshot
        frontier: list[dict[str, np.ndarray]] = [{} for _ in graphs]
        candidates = [_Def(name, name, None, 0) for name in BASE_FEATURES]
        rounds_run = 0
        for rnd in range(max_rounds + 1):
            cand_bin, cand_edges = cls._bin_candidates(graphs, candidates, frontier, bin_fraction)
            n_fixed = len(kept_defs)
            round_tolerance = tolerance + rnd * tolerance_step
            keep = prune_agreeing(np.hstack([kept_bin, cand_bin]), round_tolerance, n_fixed=n_fixed)
            new = [int(j) - n_fixed for j in keep if j >= n_fixed]
            rounds_run = rnd
            if not new:
                break
            new_defs = [candidates[j] for j in new]
            kept_defs.extend(new_defs)
            kept_edges.extend(cand_edges[j] for j in new)
            kept_bin = np.hstack([kept_bin, cand_bin[:, new]])
            if rnd == max_rounds:
                break
            frontier = [
                dict(
                    zip((d.name for d in new_defs), cls._candidate_values(g, new_defs, frontier[k]))
                )
                for k, g in enumerate(graphs)
            ]
            candidates = [
                _Def(f"{op}({d.name})", op, d.name, rnd + 1) for d in new_defs for op in AGGREGATES
            ]
        reference = {
            "snapshots": len(snaps),
            "rows": int(sum(s.n_nodes for s in snaps)),
            "rounds": rounds_run,
        }
        return cls(
            kept_defs,
            kept_edges,
            bin_fraction=bin_fraction,
            tolerance=tolerance,
            binning=binning,
            max_rounds=max_rounds,
            reference=reference,
            tolerance_step=tolerance_step,
        )

    @classmethod
    def _bin_candidates(
        cls,
        graphs: Sequence[_Graph],
        candidates: Sequence[_Def],
        frontier: Sequence[dict[str, np.ndarray]],
        bin_fraction: float,
        chunk: int = 64,
    ) -> tuple[np.ndarray, list[np.ndarray]]:
        """Binned candidate columns pooled over the reference graphs, and their edges.

        Candidates are computed in chunks so that only a few raw float columns are alive
        at once; bins are kept in the smallest unsigned dtype that holds them (:func:`bin_dtype`).
        """
        rows = sum(g.n for g in graphs)
        out = np.zeros((rows, len(candidates)), dtype=bin_dtype(max_bins(rows, bin_fraction)))
        edges: list[np.ndarray] = []
        for lo in range(0, len(candidates), chunk):
            part = candidates[lo : lo + chunk]
            per_graph = [cls._candidate_values(g, part, frontier[k]) for k, g in enumerate(graphs)]
            for j in range(len(part)):
                pooled = (
                    np.concatenate([cols[j] for cols in per_graph])
                    if len(graphs) > 1
                    else per_graph[0][j]
                )
                e = bin_edges(pooled, bin_fraction)
                edges.append(e)
                out[:, lo + j] = apply_bins(pooled, e)
        return out, edges

    @staticmethod
    def _candidate_values(
        graph: _Graph, candidates: Sequence[_Def], parents: dict[str, np.ndarray]
    ) -> list[np.ndarray]:
        """Raw candidate columns on one graph, aggregating already computed parents."""
        out: list[np.ndarray | None] = [None] * len(candidates)
        by_op: dict[str, list[int]] = {}
        for j, d in enumerate(candidates):
            if d.parent is None:
                out[j] = graph.base(d.op)
            else:
                by_op.setdefault(d.op, []).append(j)
        for op, idx in by_op.items():
            cols = graph.aggregate(op, [parents[candidates[j].parent] for j in idx])
            for j, col in zip(idx, cols):
                out[j] = col
        return out  # type: ignore[return-value]

    # ---------------------------------------------------------------- transform

    def transform(self, snapshot: Snapshot, *, binning: str | None = None) -> FeatureTable:
        """Compute exactly this recipe's features on ``snapshot``.

        Only the recipe's features (and their parents) are computed; egonet kernels run
        only when an egonet feature is needed.

        Parameters
        ----------
        snapshot : Snapshot
        binning : {"frozen", "relative"}, optional
            Overrides the recipe's mode for this call.

        Returns
        -------
        FeatureTable
        """
        if not isinstance(snapshot, Snapshot):
            raise TypeError(f"transform expects a Snapshot, got {type(snapshot).__name__}")
        mode = self.binning if binning is None else binning
        if mode not in BINNING_MODES:
            raise ValueError(f"binning must be one of {BINNING_MODES}, got {mode!r}")
        raw = _compute(_Graph(snapshot), self._defs)
        if mode == "frozen":
            edges = self._edges
        else:
            edges = [bin_edges(raw[:, j], self.bin_fraction) for j in range(raw.shape[1])]
        n_bins = 1 + max((e.size for e in edges), default=0)
        binned = np.empty(raw.shape, dtype=bin_dtype(n_bins), order="F")
        for j, e in enumerate(edges):
            apply_bins(raw[:, j], e, out=binned[:, j])
        return FeatureTable(
            nodes=snapshot.nodes,
            names=self.names,
            raw=raw,
            binned=binned,
            recipe_version=self.version,
        )

    # ---------------------------------------------------------------- serialisation

    def _body(self) -> dict:
        return {
            "format": FORMAT,
            "format_version": FORMAT_VERSION,
            "bin_fraction": self.bin_fraction,
            "tolerance": self.tolerance,
            "tolerance_step": self.tolerance_step,
            "binning": self.binning,
            "max_rounds": self.max_rounds,
            "reference": self.reference,
            "features": [
                {
                    "name": d.name,
                    "op": d.op,
                    "parent": d.parent,
                    "round": d.round,
                    "edges": e.tolist(),
                }
                for d, e in zip(self._defs, self._edges)
            ],
        }

    def to_dict(self) -> dict:
        """Plain JSON-serialisable dict (the body plus ``version``)."""
        body = self._body()
        body["version"] = self.version
        return body

    @classmethod
    def from_dict(cls, d: dict) -> FeatureRecipe:
        """Rebuild a recipe from :meth:`to_dict` output; checks format and version.

        Raises
        ------
        ValueError
            When the dict is not a feature recipe, names an unknown feature, or its
            ``version`` does not match its content.
        """
        if not isinstance(d, dict) or d.get("format") != FORMAT:
            raise ValueError(f"not a feature recipe: expected format {FORMAT!r}")
        if d.get("format_version") != FORMAT_VERSION:
            raise ValueError(
                f"unsupported feature recipe format_version {d.get('format_version')!r}"
            )
        defs, edges = [], []
        seen: set[str] = set()
        for f in d["features"]:
            parsed = _parse(f["name"])
            if parsed.op != f["op"] or parsed.parent != f["parent"]:
                raise ValueError(f"feature {f['name']!r} does not match its op/parent")
            if parsed.parent is not None and parsed.parent not in seen:
                raise ValueError(f"feature {f['name']!r} comes before its parent {parsed.parent!r}")
            seen.add(parsed.name)
            defs.append(parsed)
            e = np.asarray(f["edges"], dtype=np.float64)
            if (
                e.ndim != 1
                or (e.size > 1 and np.any(np.diff(e) <= 0))
                or not np.all(np.isfinite(e))
            ):
                raise ValueError(f"feature {f['name']!r} has invalid bin edges")
            edges.append(e)
        recipe = cls(
            defs,
            edges,
            bin_fraction=d["bin_fraction"],
            tolerance=d["tolerance"],
            binning=d["binning"],
            max_rounds=d["max_rounds"],
            reference=d.get("reference", {}),
            tolerance_step=d.get("tolerance_step", 0.0),
        )
        if "version" in d and d["version"] != recipe.version:
            raise ValueError(
                f"feature recipe version {d['version']!r} does not match its content ({recipe.version!r}); "
                "the recipe was edited or corrupted"
            )
        return recipe


def _check_params(bin_fraction: float, tolerance: float, binning: str, max_rounds: int) -> None:
    if not (0.0 < float(bin_fraction) < 1.0):
        raise ValueError(f"bin_fraction must be between 0 and 1 (exclusive), got {bin_fraction!r}")
    if not (float(tolerance) >= 0.0) or not math.isfinite(float(tolerance)):
        raise ValueError(f"tolerance must be a finite number >= 0, got {tolerance!r}")
    if binning not in BINNING_MODES:
        raise ValueError(f"binning must be one of {BINNING_MODES}, got {binning!r}")
    if int(max_rounds) != max_rounds or max_rounds < 0:
        raise ValueError(f"max_rounds must be an integer >= 0, got {max_rounds!r}")
