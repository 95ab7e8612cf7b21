"""Sparse views of one snapshot, its ReFeX base features and the neighbour aggregate.

Base features of ReFeX (Henderson et al., "It's who you know: graph mining using
recursive structural features", KDD 2011). ``N(v)`` = counterparts of ``v`` ignoring
direction; the *egonet* of ``v`` is ``{v} ∪ N(v)``; "arc" = distinct ordered pair with at
least one event:

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

The recursive features sum or average a column over a node's in-, out- or all
neighbours; :meth:`SnapshotGraph.aggregate` is the one routine that does it, for
discovery and transform alike.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import scipy.sparse as sp

from ..snapshot import Snapshot
from .triangles import binary_pattern, triangle_counts

__all__ = [
    "AGGREGATES",
    "BASE_FEATURES",
    "EGONET_FEATURES",
    "LOCAL_FEATURES",
    "SnapshotGraph",
]

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
"""Recursive operators: ``sum`` or ``mean`` over in-, out- or all neighbours."""

_DEGREES = {"in_degree": "in", "out_degree": "out", "degree": "all"}
# local features that sum a snapshot matrix: (matrix, axis); axis 0 sums into a node
_EVENT_SUMS = {
    "in_strength": ("weights", 0),
    "out_strength": ("weights", 1),
    "in_events": ("counts", 0),
    "out_events": ("counts", 1),
}


class SnapshotGraph:
    """Lazily built sparse views of one snapshot, shared by all its feature columns.

    Each view (binary adjacency, its transpose, the undirected and the reciprocated
    pattern, degrees, triangles, base columns) is built on first use and kept, so a
    recipe without egonet features never runs the triangle kernel.

    Parameters
    ----------
    snapshot : Snapshot
    """

    def __init__(self, snapshot: Snapshot) -> None:
        self.snapshot = snapshot
        self.n = snapshot.n_nodes
        self._cache: dict[str, Any] = {}

    def _get(self, key: str, build: Callable[[], Any]) -> Any:
        if key not in self._cache:
            self._cache[key] = build()
        return self._cache[key]

    @property
    def A(self) -> sp.csr_matrix:
        """Binary directed adjacency: ``A[i, j] = 1`` when ``i`` has an arc to ``j``."""
        return self._get("A", lambda: binary_pattern(self.snapshot.counts))

    @property
    def AT(self) -> sp.csr_matrix:
        """Transpose of :attr:`A` in CSR form (rows list in-neighbours)."""
        return self._get("AT", lambda: self.A.T.tocsr())

    @property
    def S(self) -> sp.csr_matrix:
        """Binary undirected adjacency (``N(v)``), sorted indices."""

        def build() -> sp.csr_matrix:
            S = binary_pattern(self.A + self.AT)
            S.sort_indices()
            return S

        return self._get("S", build)

    @property
    def R(self) -> sp.csr_matrix:
        """Reciprocated pairs: arcs both ways."""
        return self._get("R", lambda: sp.csr_matrix(self.A.multiply(self.AT)))

    def adjacency_of(self, direction: str) -> sp.csr_matrix:
        """Matrix whose row ``v`` lists the ``direction`` neighbours of ``v``.

        Parameters
        ----------
        direction : {"in", "out", "all"}

        Returns
        -------
        scipy.sparse.csr_matrix
            :attr:`AT`, :attr:`A` or :attr:`S`.
        """
        return {"in": self.AT, "out": self.A, "all": self.S}[direction]

    def degree_of(self, direction: str) -> np.ndarray:
        """Number of ``direction`` neighbours of every node (float64)."""
        m = self.adjacency_of(direction)
        return self._get(f"deg_{direction}", lambda: np.diff(m.indptr).astype(np.float64))

    def inverse_degree(self, direction: str) -> np.ndarray:
        """``1 / degree`` with 0 for isolated nodes (a mean over no neighbour is 0)."""

        def build() -> np.ndarray:
            deg = self.degree_of(direction)
            return np.divide(1.0, deg, out=np.zeros_like(deg), where=deg > 0)

        return self._get(f"inv_{direction}", build)

    def triangles(self) -> tuple[np.ndarray, np.ndarray]:
        """Triangles per node and those whose opposite edge is reciprocated."""
        return self._get("tri", lambda: triangle_counts(self.S, self.R))

    def counted_triangles(self) -> np.ndarray | None:
        """Triangles per node if :meth:`triangles` already counted them, else None (no
        counting is started)."""
        counted = self._cache.get("tri")
        return None if counted is None else counted[0]

    def base(self, name: str) -> np.ndarray:
        """One base feature column (see the module table).

        Parameters
        ----------
        name : str
            One of :data:`BASE_FEATURES`.

        Returns
        -------
        numpy.ndarray
            float64, length n; cached, do not modify.

        Raises
        ------
        KeyError
            ``name`` is not in :data:`BASE_FEATURES`.
        """
        return self._get(f"base:{name}", lambda: self._compute_base(name))

    def _compute_base(self, name: str) -> np.ndarray:
        if name in LOCAL_FEATURES:
            return self._local(name)
        if name in EGONET_FEATURES:
            return self._egonet(name)
        raise KeyError(f"unknown base feature {name!r}")

    def _local(self, name: str) -> np.ndarray:
        if name in _DEGREES:
            return self.degree_of(_DEGREES[name])
        if name == "reciprocity":
            both = np.diff(self.R.indptr).astype(np.float64)
            return _safe_divide(both, self.degree_of("all"))
        matrix, axis = _EVENT_SUMS[name]
        summed = getattr(self.snapshot, matrix).sum(axis=axis)
        return np.asarray(summed, dtype=np.float64).ravel()

    def _egonet(self, name: str) -> np.ndarray:
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
        return self.S @ din - dout - arcs_among  # ego_arcs_in

    def aggregate(
        self,
        direction: str,
        column: np.ndarray,
        *,
        sum_out: np.ndarray | None = None,
        mean_out: np.ndarray | None = None,
    ) -> None:
        """Sum and/or mean of ``column`` over the ``direction`` neighbours of every node.

        The one neighbour aggregate of ReFeX (Henderson et al., KDD 2011): discovery and
        transform both call it, so a feature has the same bits whichever computed it.
        The sum ``M @ column`` is one sparse matrix-vector product (cheaper than a product
        with a gathered block of columns); the mean is that sum times ``1 / degree``, so
        a sum and a mean of the same parent share the product.

        Parameters
        ----------
        direction : {"in", "out", "all"}
        column : numpy.ndarray
            Parent values, float64, length n.
        sum_out, mean_out : numpy.ndarray, optional
            Length-n float64 arrays (e.g. columns of a Fortran-ordered table) receiving the
            sum and the mean; at least one must be given.
        """
        target = sum_out if sum_out is not None else mean_out
        if target is None:
            raise ValueError("aggregate needs sum_out, mean_out or both")
        if self.n == 0:
            return
        target[...] = self.adjacency_of(direction) @ column
        if mean_out is not None:
            np.multiply(target, self.inverse_degree(direction), out=mean_out)


def _safe_divide(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    """``num / den`` with 0 where ``den`` is 0 (a share of no neighbour)."""
    den = np.broadcast_to(den, num.shape)
    return np.divide(num, den, out=np.zeros(num.shape, dtype=np.float64), where=den > 0)
