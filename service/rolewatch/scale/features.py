"""The frozen recipe's features and the frozen basis's memberships of a window, computed on
a Dask cluster in partitions by account.

Base and egonet features come from :mod:`rolewatch.scale.graph`; the recursive aggregates of
ReFeX (Henderson et al., KDD 2011) are, per round, one local join of the neighbour lists
(partitioned by neighbour) with the previous round's columns, one shuffle of the
contributions to their account and one sum (the distributed form of
:meth:`rolewatch.engine.features.graph.SnapshotGraph.aggregate`: a sum over the neighbours,
the mean that sum times ``1 / degree``). Binning with the frozen edges and the memberships
against the frozen basis run per partition with the engine's own functions
(:func:`rolewatch.engine.features.binning.apply_bins`,
:meth:`rolewatch.engine.basis.RoleBasis.memberships`).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from rolewatch.engine.basis import Memberships, RoleBasis
from rolewatch.engine.features.binning import apply_bins, bin_dtype
from rolewatch.engine.features.graph import EGONET_FEATURES
from rolewatch.engine.features.recipe import FeatureRecipe, FeatureTable
from rolewatch.scale.graph import WindowGraph, triangle_table
from rolewatch.scale.graph_steps import egonet_columns, local_columns, sum_by_account
from rolewatch.scale.partitions import Partitioned, shuffle

__all__ = ["feature_table", "measured_table", "split_measured"]

_DEGREE = {"in": "in_degree", "out": "out_degree", "all": "degree"}
_EGONET_SUMS = [("all", "degree"), ("all", "out_degree"), ("all", "in_degree")]
Wanted = Sequence[tuple[str, str]]


def _sum_name(direction: str, parent: str) -> str:
    """Column of a neighbour sum while it is joined (no feature name looks like it)."""
    return f"nbr_{direction}:{parent}"


def _neighbour_values(part: pd.DataFrame, table: pd.DataFrame, wanted: Wanted) -> pd.DataFrame:
    """Each neighbour row's contribution to the wanted (direction, parent) sums, from the
    parent columns of the neighbours this partition owns."""
    parents = sorted({parent for _, parent in wanted})
    joined = part.join(table[parents], on="other", how="inner")
    columns = {"account": joined["account"].to_numpy()}
    for direction, parent in wanted:
        values = joined[parent].to_numpy(dtype=np.float64)
        if direction != "all":
            values = values * joined[direction].to_numpy()
        columns[_sum_name(direction, parent)] = values
    return pd.DataFrame(columns)


def neighbour_sums(graph: WindowGraph, table: Partitioned, wanted: Wanted) -> Partitioned:
    """``nbr_<direction>:<parent>``: every account's sum of ``parent`` over its in-, out- or
    all neighbours, indexed by account."""
    values = graph.by_other.map(_neighbour_values, table, list(wanted))
    return shuffle(values, "account").map(sum_by_account)


def _join_filled(part: pd.DataFrame, other: pd.DataFrame) -> pd.DataFrame:
    """``part`` with ``other``'s columns (0 for an account ``other`` has no row for)."""
    return part.join(other, how="left").fillna({name: 0.0 for name in other.columns})


def _with_egonet(part: pd.DataFrame, triangles: pd.DataFrame, sums: pd.DataFrame) -> pd.DataFrame:
    joined = _join_filled(_join_filled(part, triangles), sums)
    if "triangles" not in joined:  # a partition whose accounts close no triangle
        joined = joined.assign(triangles=0.0, opposite_mutual=0.0)
    return pd.concat([part, egonet_columns(joined)], axis=1)


def _base_table(graph: WindowGraph, recipe: FeatureRecipe) -> Partitioned:
    """Local base features of every account, with the egonet ones when the recipe uses them."""
    table = graph.local.map(local_columns)
    if not any(d.parent is None and d.op in EGONET_FEATURES for d in recipe.features):
        return table
    triangles = triangle_table(graph)
    sums = neighbour_sums(graph, table, _EGONET_SUMS)
    return table.map(_with_egonet, triangles, sums)


def _add_round(
    part: pd.DataFrame, sums: pd.DataFrame, layer: Sequence[tuple[str, str, str, str]]
) -> pd.DataFrame:
    """One round's aggregates (name, kind, direction, parent) from the neighbour sums."""
    joined = _join_filled(part[[]], sums)
    columns = {}
    for name, kind, direction, parent in layer:
        summed = joined[_sum_name(direction, parent)].to_numpy()
        if kind == "mean":
            degree = part[_DEGREE[direction]].to_numpy()
            inverse = np.divide(1.0, degree, out=np.zeros_like(degree), where=degree > 0)
            summed = summed * inverse
        columns[name] = summed
    return pd.concat([part, pd.DataFrame(columns, index=part.index)], axis=1)


def feature_table(graph: WindowGraph, recipe: FeatureRecipe) -> Partitioned:
    """Raw values of every recipe feature (and the local counts), one row per account."""
    table = _base_table(graph, recipe)
    for rnd in sorted({d.round for d in recipe.features if d.parent is not None}):
        layer = [d for d in recipe.features if d.round == rnd]
        parsed = [(d.name, *d.op.split("_"), str(d.parent)) for d in layer]
        wanted = sorted({(direction, parent) for _, _, direction, parent in parsed})
        table = table.map(_add_round, neighbour_sums(graph, table, wanted), parsed)
    return table


def _measure_part(part: pd.DataFrame, recipe: FeatureRecipe, basis: RoleBasis) -> pd.DataFrame:
    """Frozen bins and memberships of one partition, by the engine's own functions."""
    raw = np.asfortranarray(part[list(recipe.names)].to_numpy(dtype=np.float64))
    n_bins = 1 + max((e.size for e in recipe.feature_edges), default=0)
    binned = np.empty(raw.shape, dtype=bin_dtype(n_bins), order="F")
    for j, edges in enumerate(recipe.feature_edges):
        apply_bins(raw[:, j], edges, out=binned[:, j])
    table = FeatureTable(
        nodes=part.index.to_numpy(),
        names=recipe.names,
        raw=raw,
        binned=binned,
        recipe_version=recipe.version,
    )
    members = basis.memberships(table)
    columns: dict[str, np.ndarray] = {}
    for j, name in enumerate(recipe.names):
        columns[name] = raw[:, j]
        columns[f"bin:{name}"] = binned[:, j].astype(np.int64)
    for r in range(basis.n_roles):
        columns[f"mixture:{r}"] = members.mixture[:, r]
        columns[f"loading:{r}"] = members.loadings[:, r]
    columns["error"] = members.error
    return pd.DataFrame(columns, index=part.index)


def measured_table(features: Partitioned, recipe: FeatureRecipe, basis: RoleBasis) -> Partitioned:
    """Raw features, frozen bins, mixtures, loadings and fit error per account."""
    return features.map(_measure_part, recipe, basis)


def split_measured(
    frame: pd.DataFrame, nodes: np.ndarray, recipe: FeatureRecipe, basis: RoleBasis
) -> tuple[FeatureTable, Memberships]:
    """A gathered :func:`measured_table` in the order of ``nodes``, as the engine's types."""
    lost = ~pd.Index(nodes).isin(frame.index)
    if lost.any():
        raise RuntimeError(
            f"the Dask close returned no row for account {nodes[lost][0]!r}; the close is "
            "retried on the next tick"
        )
    frame = frame.reindex(pd.Index(nodes))
    names = list(recipe.names)
    n_bins = 1 + max((e.size for e in recipe.feature_edges), default=0)
    k = basis.n_roles
    table = FeatureTable(
        nodes=nodes,
        names=recipe.names,
        raw=np.asfortranarray(frame[names].to_numpy(dtype=np.float64)),
        binned=np.asfortranarray(
            frame[[f"bin:{name}" for name in names]].to_numpy().astype(bin_dtype(n_bins))
        ),
        recipe_version=recipe.version,
    )
    members = Memberships(
        loadings=frame[[f"loading:{r}" for r in range(k)]].to_numpy(dtype=np.float64),
        mixture=frame[[f"mixture:{r}" for r in range(k)]].to_numpy(dtype=np.float64),
        error=frame["error"].to_numpy(dtype=np.float64),
    )
    return table, members
