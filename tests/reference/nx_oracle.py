"""Slow, plain per-node networkx reference for the ReFeX base features.

Every feature is written straight from its definition in rolewatch.engine.features, one
node at a time, using networkx (nx.ego_graph, degrees, nx.triangles) so that the sparse
implementation is checked against an independent, obviously right one.
"""

from __future__ import annotations

import networkx as nx
import numpy as np

BASE = (
    "in_degree",
    "out_degree",
    "degree",
    "in_strength",
    "out_strength",
    "in_events",
    "out_events",
    "reciprocity",
    "ego_edges",
    "ego_boundary_edges",
    "ego_arcs_within",
    "ego_arcs_out",
    "ego_arcs_in",
)


def snapshot_to_digraph(snapshot) -> nx.DiGraph:
    """DiGraph with nodes in snapshot order and edge attributes count/weight."""
    g = nx.DiGraph()
    g.add_nodes_from(range(snapshot.n_nodes))
    c = snapshot.counts.tocoo()
    w = snapshot.weights.tocsr()
    for i, j, cnt in zip(c.row.tolist(), c.col.tolist(), c.data.tolist(), strict=True):
        g.add_edge(i, j, count=cnt, weight=float(w[i, j]))
    return g


def base_features(g: nx.DiGraph) -> dict[str, np.ndarray]:
    """All base features for nodes 0..n-1 of ``g`` computed node by node."""
    n = g.number_of_nodes()
    und = g.to_undirected(as_view=False)
    tri = nx.triangles(und)
    out = {name: np.zeros(n) for name in BASE}
    for v in range(n):
        preds, succs = set(g.predecessors(v)), set(g.successors(v))
        nbrs = preds | succs
        out["in_degree"][v] = len(preds)
        out["out_degree"][v] = len(succs)
        out["degree"][v] = len(nbrs)
        out["in_strength"][v] = sum(g[u][v]["weight"] for u in preds)
        out["out_strength"][v] = sum(g[v][u]["weight"] for u in succs)
        out["in_events"][v] = sum(g[u][v]["count"] for u in preds)
        out["out_events"][v] = sum(g[v][u]["count"] for u in succs)
        out["reciprocity"][v] = len(preds & succs) / len(nbrs) if nbrs else 0.0
        ego = set(nx.ego_graph(und, v, radius=1).nodes)
        inside_und = und.subgraph(ego).number_of_edges()
        # every edge leaving the egonet touches one of its members, so walk their edges
        leaving_und = sum(1 for a in ego for b in und[a] if b not in ego)
        out["ego_edges"][v] = inside_und
        out["ego_boundary_edges"][v] = leaving_und
        out["ego_arcs_within"][v] = g.subgraph(ego).number_of_edges()
        out["ego_arcs_out"][v] = sum(1 for a in ego for b in g.successors(a) if b not in ego)
        out["ego_arcs_in"][v] = sum(1 for b in ego for a in g.predecessors(b) if a not in ego)
        # triangles through v counted by networkx, kept for the triangle check
        assert inside_und == len(nbrs) + tri[v]
    return out


def aggregate(g: nx.DiGraph, values: np.ndarray, op: str) -> np.ndarray:
    """ReFeX sum/mean of ``values`` over in-, out- or all neighbours, node by node."""
    kind, direction = op.split("_")
    res = np.zeros(g.number_of_nodes())
    for v in range(g.number_of_nodes()):
        if direction == "in":
            nb = set(g.predecessors(v))
        elif direction == "out":
            nb = set(g.successors(v))
        else:
            nb = set(g.predecessors(v)) | set(g.successors(v))
        total = sum(values[u] for u in nb)
        res[v] = total if kind == "sum" else (total / len(nb) if nb else 0.0)
    return res


def triangles(g: nx.DiGraph) -> np.ndarray:
    """nx.triangles on the undirected view, in node order."""
    t = nx.triangles(g.to_undirected(as_view=False))
    return np.array([t[v] for v in range(g.number_of_nodes())], dtype=float)
