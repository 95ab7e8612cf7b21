"""The frozen recipe's features and the frozen basis's memberships of a window, computed on
a Dask cluster in partitions by account code range.

Base and egonet features come from :mod:`rolewatch.scale.graph`; the recursive aggregates of
ReFeX (Henderson et al., KDD 2011) are, per round, one fetch of the round's parent columns
from the partitions owning each block's neighbours and one sparse product per (direction,
parent) on the block's adjacency rows (the distributed form of
:meth:`rolewatch.engine.features.graph.SnapshotGraph.aggregate`: a sum over the neighbours,
the mean that sum times ``1 / degree``). Binning with the frozen edges and the memberships
against the frozen basis run per partition with the engine's own functions
(:func:`rolewatch.engine.features.binning.apply_bins`,
:meth:`rolewatch.engine.basis.RoleBasis.memberships`); only their results come back.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from rolewatch.engine.basis import Memberships, RoleBasis
from rolewatch.engine.features.binning import apply_bins, bin_dtype
from rolewatch.engine.features.graph import EGONET_FEATURES
from rolewatch.engine.features.recipe import FeatureRecipe, FeatureTable
from rolewatch.scale.graph import WindowGraph, fetch_columns, with_egonet
from rolewatch.scale.graph_steps import Block, add_columns
from rolewatch.scale.partitions import Partitioned

__all__ = ["feature_table", "measured_table", "split_measured"]

_DEGREE = {"in": "in_degree", "out": "out_degree", "all": "degree"}
Layer = Sequence[tuple[str, str, str, str]]  # name, kind (sum / mean), direction, parent


def _add_round(block: Block, layer: Layer, parents: Sequence[str], *pieces: np.ndarray) -> Block:
    """One round's aggregates from the parents' values at the block's neighbours."""
    fetched = np.asfortranarray(np.concatenate(pieces, axis=0))
    position = {name: k for k, name in enumerate(parents)}
    sums: dict[tuple[str, str], np.ndarray] = {}
    columns = {}
    for name, kind, direction, parent in layer:
        key = (direction, parent)
        if key not in sums:
            sums[key] = block.adjacency_of(direction) @ fetched[:, position[parent]]
        summed = sums[key]
        if kind == "mean":
            degree = block.columns[_DEGREE[direction]]
            inverse = np.divide(1.0, degree, out=np.zeros_like(degree), where=degree > 0)
            summed = summed * inverse
        columns[name] = summed
    return add_columns(block, columns)


def feature_table(graph: WindowGraph, recipe: FeatureRecipe) -> Partitioned:
    """The blocks with the raw values of every recipe feature (and the local counts)."""
    uses_egonet = any(d.parent is None and d.op in EGONET_FEATURES for d in recipe.features)
    blocks = with_egonet(graph) if uses_egonet else graph.blocks
    for rnd in sorted({d.round for d in recipe.features if d.parent is not None}):
        layer = [
            (d.name, *d.op.split("_"), str(d.parent)) for d in recipe.features if d.round == rnd
        ]
        parents = sorted({parent for *_, parent in layer})
        pieces = fetch_columns(graph, blocks, parents)
        client = blocks.client
        blocks = Partitioned(
            client,
            tuple(
                client.submit(_add_round, block, layer, parents, *pieces[i], pure=False)
                for i, block in enumerate(blocks.futures)
            ),
            blocks.bounds,
        )
    return blocks


def _measure_block(block: Block, recipe: FeatureRecipe, basis: RoleBasis) -> tuple:
    """Raw features, frozen bins and memberships of one block, by the engine's own
    functions: ``(raw, binned, mixture, loadings, error)``."""
    raw = np.empty((block.rows, len(recipe.names)), order="F")
    for j, name in enumerate(recipe.names):
        raw[:, j] = block.columns[name]
    n_bins = 1 + max((e.size for e in recipe.feature_edges), default=0)
    binned = np.empty(raw.shape, dtype=bin_dtype(n_bins), order="F")
    for j, edges in enumerate(recipe.feature_edges):
        apply_bins(raw[:, j], edges, out=binned[:, j])
    table = FeatureTable(
        nodes=np.arange(block.lo, block.lo + block.rows),  # codes: the basis reads no id
        names=recipe.names,
        raw=raw,
        binned=binned,
        recipe_version=recipe.version,
    )
    members = basis.memberships(table)
    return raw, binned, members.mixture, members.loadings, members.error


def measured_table(features: Partitioned, recipe: FeatureRecipe, basis: RoleBasis) -> Partitioned:
    """Per partition: raw features, frozen bins, mixtures, loadings and fit error."""
    return features.map(_measure_block, recipe, basis)


def split_measured(
    parts: Sequence[tuple[Any, ...]], nodes: np.ndarray, recipe: FeatureRecipe
) -> tuple[FeatureTable, Memberships]:
    """Gathered :func:`measured_table` parts (in partition order, so in the order of
    ``nodes``) as the engine's types."""
    raw, binned, mixture, loadings, error = (
        np.concatenate([part[k] for part in parts], axis=0) for k in range(5)
    )
    if raw.shape[0] != len(nodes):
        raise RuntimeError(
            f"the Dask close returned {raw.shape[0]} rows for {len(nodes)} accounts; the "
            "close is retried on the next tick"
        )
    table = FeatureTable(
        nodes=nodes,
        names=recipe.names,
        raw=np.asfortranarray(raw),
        binned=np.asfortranarray(binned),
        recipe_version=recipe.version,
    )
    return table, Memberships(loadings=loadings, mixture=mixture, error=error)
