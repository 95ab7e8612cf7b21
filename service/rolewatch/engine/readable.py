"""Readable measures: what an analyst reads about an account, computed per window.

Roles are found on ReFeX features (Henderson et al., "It's who you know: graph mining using
recursive structural features", KDD 2011), which are good for the factorisation but hard to
read past the first round. Roles and alerts are therefore *described* through familiar,
named measures of one window, the way the RolX sense-making step relates roles to
well-known node measures (Henderson et al., "RolX: structural role extraction & mining in
large graphs", KDD 2012):

==================  ===============================================================
``events_out``      events the account sent (out-strength in event counts)
``events_in``       events it received (in-strength in event counts)
``out_degree``      distinct accounts it sent to
``in_degree``       distinct accounts it received from
``sent_share``      events sent / events sent and received (0.5 when none)
``reciprocity``     share of its counterparts with ties both ways
``clustering``      share of its counterpart pairs that deal with each other (local
                    clustering, Watts & Strogatz 1998; undirected, unweighted)
``brokerage``       counterparts that do not deal with each other: Burt's effective size
                    ``d - 2 t / d`` (Burt, "Structural holes", 1992; Borgatti, "Structural
                    holes: unpacking Burt's redundancy measures", Connections 1997)
``new_share``       share of its counterparts it had no tie with before (NaN when the
                    history is not given)
==================  ===============================================================

Brokerage stands for betweenness in the description of roles: an account whose
counterparts do not know each other sits on the shortest paths between them (Everett &
Borgatti, "Ego network betweenness", Social Networks 2005, show ego-network and whole-graph
betweenness agree closely), and it costs only the triangle counts the clustering needs.

:func:`feature_label` turns a recursive ReFeX feature name into words.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from .errors import EngineInputError
from .features.triangles import binary_pattern, off_diagonal_pattern, triangles_per_node

__all__ = [
    "MEASURES",
    "MEASURE_LABELS",
    "SHARE_MEASURES",
    "ReadableMeasures",
    "feature_label",
    "readable_measures",
]

MEASURES = (
    "events_out",
    "events_in",
    "out_degree",
    "in_degree",
    "sent_share",
    "reciprocity",
    "clustering",
    "brokerage",
    "new_share",
)

#: What each measure means, in words a reviewer reads beside its value.
MEASURE_LABELS = {
    "events_out": "events sent",
    "events_in": "events received",
    "out_degree": "accounts it sends to",
    "in_degree": "accounts it receives from",
    "sent_share": "share of its events that it sends",
    "reciprocity": "share of counterparts it deals with both ways",
    "clustering": "share of its counterpart pairs that deal with each other",
    "brokerage": "counterparts that do not deal with each other",
    "new_share": "share of counterparts it had not dealt with before",
}

#: Measures that are shares in [0, 1]; the others are counts.
SHARE_MEASURES = frozenset({"sent_share", "reciprocity", "clustering", "new_share"})


@dataclass(frozen=True)
class ReadableMeasures:
    """Readable measures of some accounts of one window.

    Attributes
    ----------
    rows : ndarray of int, shape (r,)
        The snapshot rows (nodes) measured.
    values : ndarray, shape (r, len(MEASURES))
        One column per name of :data:`MEASURES`.
    """

    rows: np.ndarray
    values: np.ndarray

    def column(self, name: str) -> np.ndarray:
        """The values of one measure, in ``rows`` order."""
        return self.values[:, MEASURES.index(name)]

    def row(self, position: int) -> dict[str, float]:
        """The measures of the ``position``-th measured account by name."""
        return {name: float(v) for name, v in zip(MEASURES, self.values[position], strict=True)}


def _blocks_of(C: sp.csr_matrix, nodes: np.ndarray | None) -> tuple[sp.spmatrix, sp.spmatrix]:
    """The events out of and into ``nodes`` (all when None), one row per node: rows of ``C``
    and of its transpose, taken from ``C`` without transposing the whole matrix."""
    if nodes is None:
        return C, C.T
    return C[nodes], C[:, nodes].T


def _ties_of(C: sp.csr_matrix, nodes: np.ndarray | None) -> tuple[sp.csr_matrix, sp.csr_matrix]:
    """The out- and in-ties (0/1, no self-ties) of ``nodes`` (all when None), one row each."""
    sent, received = _blocks_of(C, nodes)
    return off_diagonal_pattern(sent, nodes), off_diagonal_pattern(received, nodes)


def _triangles_around(C: sp.csr_matrix, U: sp.csr_matrix, rows: np.ndarray) -> np.ndarray:
    """Triangles through each of ``rows`` (``U``: their undirected 0/1 tie rows).

    ``U @ N``, with ``N`` the undirected tie rows of their counterparts (built here from
    ``C``, not for the whole graph), masked by ``U`` counts each triangle twice per row:
    one entry per two-step path from ``rows``. When those paths outnumber the matrix's own
    entries (many rows, or rows next to hubs) the degree-ordered listing of every node
    (Schank & Wagner 2005) is cheaper and is used instead.
    """
    around = np.unique(U.indices)
    out, into = _ties_of(C, around)
    near = binary_pattern(out + into)
    to_near = U[:, around]
    paths = float((to_near @ np.diff(near.indptr).astype(np.float64)).sum())
    if paths > max(C.nnz, 1 << 20):
        return triangles_per_node(C)[rows]
    two_steps = (to_near @ near).multiply(U)
    return np.asarray(two_steps.sum(axis=1)).ravel() / 2.0


def readable_measures(
    counts: sp.spmatrix,
    *,
    rows: np.ndarray | None = None,
    new_counterparts: np.ndarray | None = None,
    triangles: np.ndarray | None = None,
) -> ReadableMeasures:
    """The :data:`MEASURES` of every node (or of ``rows``) of one window.

    Parameters
    ----------
    counts : sparse matrix, shape (n, n)
        Events from row account to column account (a snapshot's ``counts``); the diagonal
        is ignored for the tie measures.
    rows : array of int, optional
        Nodes to measure; all when None. Degrees and event counts are sums over the whole
        matrix either way; triangles are counted only around ``rows``.
    new_counterparts : array, shape (n,), optional
        Counterparts of each node it had no tie with before (e.g.
        :attr:`rolewatch.engine.activity.Activity.new_counterparts`); ``new_share`` is NaN
        without it.
    triangles : array, shape (n,), optional
        Triangles through every node of the undirected view, already counted (e.g.
        :attr:`rolewatch.engine.features.FeatureTable.triangles`); counted here when None.

    Returns
    -------
    ReadableMeasures

    Notes
    -----
    Degree, reciprocity and clustering follow networkx's definitions
    (``DiGraph.out_degree``, ``networkx.reciprocity`` per node, ``networkx.clustering`` on
    the undirected view) and brokerage ``networkx.effective_size`` on the undirected view;
    the tests compare with them.
    """
    C = sp.csr_matrix(counts, dtype=np.float64)
    n = C.shape[0]
    if C.shape != (n, n):
        raise EngineInputError(f"counts must be a square matrix, got shape {C.shape}")
    picked = np.arange(n) if rows is None else np.asarray(rows, dtype=np.int64)
    if picked.size and (picked.min() < 0 or picked.max() >= n):
        raise EngineInputError(f"rows must be node indices in [0, {n}), got {picked.min()}…")
    # only the measured rows' own ties are read: a few alerted accounts of a large window
    # would otherwise cost several copies of the whole graph
    nodes = None if rows is None else picked
    sent, received = _blocks_of(C, nodes)
    out, into = off_diagonal_pattern(sent, nodes), off_diagonal_pattern(received, nodes)
    U = binary_pattern(out + into)
    out_deg = np.diff(out.indptr).astype(np.float64)
    in_deg = np.diff(into.indptr).astype(np.float64)
    deg = np.diff(U.indptr).astype(np.float64)
    mutual = np.asarray(out.multiply(into).sum(axis=1)).ravel()
    ev_out = np.asarray(sent.sum(axis=1)).ravel()
    ev_in = (
        np.asarray(C.sum(axis=0)).ravel()
        if rows is None
        else np.asarray(received.sum(axis=1)).ravel()
    )
    if triangles is not None:
        tri = np.asarray(triangles, dtype=np.float64)[picked]
    elif rows is None:
        tri = triangles_per_node(U)
    else:
        tri = _triangles_around(C, U, picked)
    pairs = deg * (deg - 1)
    events = ev_out + ev_in
    if new_counterparts is None:
        new_share = np.full(len(picked), np.nan)
    else:
        new = np.asarray(new_counterparts, dtype=np.float64)[picked]
        new_share = np.divide(new, deg, out=np.zeros(len(picked)), where=deg > 0)
    values = np.column_stack(
        [
            ev_out,
            ev_in,
            out_deg,
            in_deg,
            np.divide(ev_out, events, out=np.full(len(picked), 0.5), where=events > 0),
            np.divide(mutual, deg, out=np.zeros(len(picked)), where=deg > 0),
            np.divide(2.0 * tri, pairs, out=np.zeros(len(picked)), where=pairs > 0),
            np.divide(deg * deg - 2.0 * tri, deg, out=np.zeros(len(picked)), where=deg > 0),
            new_share,
        ]
    )
    return ReadableMeasures(rows=picked, values=values)


# --- recursive feature labels ---------------------------------------------------------------

_BASE_LABELS = {
    "in_degree": "accounts writing to {obj}",
    "out_degree": "accounts {subj} {writes} to",
    "degree": "counterparts",
    "in_strength": "amount received",
    "out_strength": "amount sent",
    "in_events": "events received",
    "out_events": "events sent",
    "reciprocity": "share of two-way counterparts",
    "ego_edges": "ties within {its} circle",
    "ego_boundary_edges": "ties leaving {its} circle",
    "ego_arcs_within": "arcs within {its} circle",
    "ego_arcs_out": "arcs out of {its} circle",
    "ego_arcs_in": "arcs into {its} circle",
}
_KIND = {"sum": "total", "mean": "average"}
_OVER = {
    "in": "accounts writing to {obj}",
    "out": "accounts {subj} {writes} to",
    "all": "counterparts",
}
_SINGULAR = {"obj": "it", "subj": "it", "writes": "writes", "its": "its"}
_PLURAL = {"obj": "them", "subj": "they", "writes": "write", "its": "their"}


def feature_label(name: str) -> str:
    """A ReFeX feature name in words, never a nested formula.

    ``mean_out(degree)`` reads "average counterparts of the accounts it writes to";
    ``mean_out(sum_in(degree))`` reads "average, over the accounts it writes to, of the
    total counterparts of the accounts writing to them".

    Parameters
    ----------
    name : str
        A base feature or ``op(parent)``, ``op`` in sum/mean × in/out/all
        (:mod:`rolewatch.engine.features.definitions`). Unknown names come back unchanged.

    Returns
    -------
    str
    """
    return _label(name, _SINGULAR)


def _label(name: str, words: dict[str, str]) -> str:
    if name in _BASE_LABELS:
        return _BASE_LABELS[name].format(**words)
    op, sep, rest = name.partition("(")
    kind, _, direction = op.partition("_")
    if not sep or not rest.endswith(")") or kind not in _KIND or direction not in _OVER:
        return name
    parent = rest[:-1]
    over = _OVER[direction].format(**words)
    if parent in _BASE_LABELS:
        return f"{_KIND[kind]} {_BASE_LABELS[parent].format(**_PLURAL)} of the {over}"
    return f"{_KIND[kind]}, over the {over}, of the {_label(parent, _PLURAL)}"
