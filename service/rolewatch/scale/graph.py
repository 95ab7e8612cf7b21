"""A window's graph on a Dask cluster, partitioned by account code ranges: each partition's
adjacency rows, local counts, neighbour sums and triangles (the steps are in
:mod:`rolewatch.scale.graph_steps`; the row exchange in :mod:`rolewatch.scale.partitions`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from rolewatch.scale import graph_steps as steps
from rolewatch.scale.partitions import Partitioned, balanced_bounds, fetch

__all__ = [
    "TRIANGLES",
    "WindowGraph",
    "build_graph",
    "fetch_columns",
    "scatter_events",
    "egonet_table",
    "triangle_table",
]

_DEGREES = ("degree", "out_degree", "in_degree")
TRIANGLES = "triangles"  # a block column beside the features, not one of them


@dataclass(frozen=True)
class WindowGraph:
    """The window's blocks (:class:`~rolewatch.scale.graph_steps.Block`, one per
    partition), their base features (``base``: one dict of float64 columns per
    partition), ``n`` accounts in all, ``wanted[i][j]``: the rows partition ``i`` needs
    from partition ``j`` (futures), and when asked for, each partition's out-arcs."""

    blocks: Partitioned
    base: Partitioned
    n: int
    wanted: list[list[Any]]
    out_arcs: Partitioned | None = None


def scatter_events(
    client: Any,
    actor: np.ndarray,
    target: np.ndarray,
    weight: np.ndarray,
    n: int,
    partitions: int,
) -> tuple[Partitioned, int]:
    """A window's events (account codes ``0 <= code < n``) sent to the workers in one
    chunk per partition, with the code bounds of at most ``partitions`` partitions, each
    about the same share of accounts plus events sent and received (an account's adjacency
    row costs by its events, and one account's row is never split)."""
    load = np.bincount(actor, minlength=n) + np.bincount(target, minlength=n) + 1
    bounds = balanced_bounds(load, max(1, min(partitions, n)))
    p = len(bounds) - 1
    cuts = np.linspace(0, len(actor), p + 1).astype(np.int64)
    chunks = [
        (
            np.asarray(actor[lo:hi], dtype=steps.EVENT_DTYPE),
            np.asarray(target[lo:hi], dtype=steps.EVENT_DTYPE),
            np.asarray(weight[lo:hi], dtype=np.float64),
        )
        for lo, hi in zip(cuts[:-1], cuts[1:], strict=True)
    ]
    return Partitioned(client, tuple(client.scatter(chunks)), bounds), n


def build_graph(events: tuple[Partitioned, int], *, out_arcs: bool = False) -> WindowGraph:
    """Route the events' chunks (any number of them) to their accounts' partitions and
    build the blocks; with ``out_arcs`` also each partition's summed out-arcs (the rows of
    the window's snapshot it owns, :func:`rolewatch.scale.graph_steps.out_arcs`)."""
    chunks, n = events
    client, bounds = chunks.client, chunks.bounds
    p = len(bounds) - 1
    routed = chunks.map(steps.route_events, bounds).pieces(p)

    def per_partition(step: Any) -> tuple[Any, ...]:
        return tuple(
            client.submit(
                step,
                int(bounds[j]),
                int(bounds[j + 1]),
                n,
                *[routed[i][j] for i in range(chunks.partitions)],
                pure=False,
            )
            for j in range(p)
        )

    built = Partitioned(client, per_partition(steps.build_block), bounds).pieces(2)
    arcs = Partitioned(client, per_partition(steps.out_arcs), bounds) if out_arcs else None
    blocks = Partitioned(client, tuple(item[0] for item in built), bounds)
    base = Partitioned(client, tuple(item[1] for item in built), bounds)
    wanted = blocks.map(steps.need_parts, bounds).pieces(p)
    return WindowGraph(blocks, base, n, wanted, arcs)


def fetch_columns(graph: WindowGraph, owners: Partitioned, names: Sequence[str]) -> list:
    """``[i][j]``: the values of ``names`` partition ``i``'s neighbours hold in partition
    ``j`` (``owners``: the blocks, or one dict of feature columns per partition)."""
    return fetch(owners, graph.wanted, steps.take_columns, list(names))


def _counted(graph: WindowGraph) -> list[list[Any]]:
    """``[i]``: partition ``i``'s triangle counts for every partition, then its neighbour
    sums of the degrees."""
    client, blocks, p = graph.blocks.client, graph.blocks, graph.blocks.partitions
    degrees = fetch_columns(graph, blocks, _DEGREES)
    oriented = Partitioned(
        client,
        tuple(
            client.submit(steps.orient, blocks.futures[i], *degrees[i], pure=False)
            for i in range(p)
        ),
        blocks.bounds,
    )
    arcs = fetch(oriented, graph.wanted, steps.take_upper)
    counted = Partitioned(
        client,
        tuple(
            client.submit(
                steps.count_triangles,
                oriented.futures[i],
                graph.n,
                blocks.bounds,
                *arcs[i],
                pure=False,
            )
            for i in range(p)
        ),
        blocks.bounds,
    )
    return counted.pieces(p + 1)


def _triangles_of(block: steps.Block, *pieces: tuple) -> tuple[np.ndarray, np.ndarray]:
    return steps.triangle_sums(block.rows, pieces)


def _on_triangle_counts(graph: WindowGraph, step: Any, *, with_sums: bool) -> Partitioned:
    """``step(block, [neighbour sums,] *counts)`` on every partition, fed the triangle
    counts every partition sent it (and, ``with_sums``, its neighbour sums of the
    degrees)."""
    counted, p = _counted(graph), graph.blocks.partitions
    client = graph.blocks.client
    return Partitioned(
        client,
        tuple(
            client.submit(
                step,
                graph.blocks.futures[j],
                *([counted[j][p]] if with_sums else []),
                *[counted[i][j] for i in range(p)],
                pure=False,
            )
            for j in range(p)
        ),
        graph.blocks.bounds,
    )


def triangle_table(graph: WindowGraph) -> Partitioned:
    """Per partition: triangles through each of its accounts and those whose opposite
    edge is reciprocated (two arrays in code order)."""
    return _on_triangle_counts(graph, _triangles_of, with_sums=False)


def _egonet(block: steps.Block, sums: tuple, *pieces: tuple) -> dict[str, np.ndarray]:
    tri, opposite = steps.triangle_sums(block.rows, pieces)
    return {**steps.egonet_columns(block.columns, sums, tri, opposite), TRIANGLES: tri}


def egonet_table(graph: WindowGraph) -> Partitioned:
    """Per partition, the ReFeX egonet features of its accounts and their triangles as
    the column :data:`TRIANGLES` (the evidence's clustering reads them): one dict of
    float64 columns."""
    return _on_triangle_counts(graph, _egonet, with_sums=True)
