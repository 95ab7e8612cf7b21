"""A window's graph on a Dask cluster, partitioned by account: edges, undirected pairs,
neighbour lists, local counts and triangles (the steps are in
:mod:`rolewatch.scale.graph_steps`; the shuffles in :mod:`rolewatch.scale.partitions`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from rolewatch.scale import graph_steps as steps
from rolewatch.scale.partitions import Partitioned, shuffle

__all__ = ["WindowGraph", "build_graph", "scatter_events", "triangle_table"]


@dataclass(frozen=True)
class WindowGraph:
    """The window's graph, every table partitioned by the account it belongs to.

    ``edges`` (``actor, target, events, weight``) by actor; ``pairs`` (``u, v, code``,
    ``u < v``, code 1: ``u -> v`` only, 2: ``v -> u`` only, 3: both) by ``u``;
    ``neighbours`` (``account, other, out, in``) by account and ``by_other`` the same rows
    by ``other`` (for joining a neighbour's columns); ``local`` the
    :data:`~rolewatch.scale.graph_steps.LOCAL` counts indexed by account.
    """

    edges: Partitioned
    pairs: Partitioned
    neighbours: Partitioned
    by_other: Partitioned
    local: Partitioned


def scatter_events(
    client: Any, actor: np.ndarray, target: np.ndarray, weight: np.ndarray, partitions: int
) -> Partitioned:
    """A window's events sent to the workers in ``partitions`` chunks of rows."""
    bounds = np.linspace(0, len(actor), partitions + 1).astype(np.int64)
    chunks = [
        pd.DataFrame(
            {
                "actor": np.asarray(actor[lo:hi], dtype=object),
                "target": np.asarray(target[lo:hi], dtype=object),
                "weight": np.asarray(weight[lo:hi], dtype=np.float64),
            }
        )
        for lo, hi in zip(bounds[:-1], bounds[1:], strict=True)
    ]
    return Partitioned(client, tuple(client.scatter(chunks)))


def build_graph(events: Partitioned) -> WindowGraph:
    """Aggregate the window's events into :class:`WindowGraph`."""
    edges = shuffle(events, "actor").map(steps.aggregate_edges)
    pairs = shuffle(edges.map(steps.oriented), "u").map(steps.aggregate_pairs)
    neighbours = shuffle(pairs.map(steps.both_ends), "account")
    received = shuffle(edges, "target")
    local = neighbours.map(steps.local_table, edges, received)
    return WindowGraph(edges, pairs, neighbours, shuffle(neighbours, "other"), local)


def triangle_table(graph: WindowGraph) -> Partitioned:
    """Triangles through each account and those whose opposite edge is reciprocated,
    indexed by account (an account in no triangle has no row)."""
    with_u = graph.pairs.map(steps.with_degree, graph.local, "u")
    with_both = shuffle(with_u, "v").map(steps.with_degree, graph.local, "v")
    ranked = shuffle(with_both.map(steps.ranked), "lo")
    wedges = shuffle(ranked.map(steps.wedges), "a")
    triangles = wedges.map(steps.close_wedges, ranked)
    return shuffle(triangles.map(steps.corners), "account").map(steps.sum_by_account)
