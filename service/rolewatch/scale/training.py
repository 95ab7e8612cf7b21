"""The training windows' features computed on a Dask cluster, read at the training sample's
rows: ReFeX discovery (Henderson et al., KDD 2011) and the basis fit of a ``compute =
"dask"`` close, without the closing process computing a whole window's features.

Every candidate feature of a discovery round is computed for every account of the window's
graph, partitioned by account code range as for a close (:mod:`rolewatch.scale.graph`),
with the same neighbour aggregate (:func:`rolewatch.scale.features.aggregate_columns`); each
partition sends back only the values of its sampled accounts. The features a round keeps
are computed once more, whole, and stay on the workers as the next round's parents. The
bins, the pruning and the basis fit see the sample only, as in
:meth:`rolewatch.engine.features.FeatureRecipe.discover`, and the basis is fitted on
discovery's own bins of the sampled rows: the closing process holds the sample's rows (at
most ``training_sample_accounts`` in all), never a window's feature table.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from rolewatch.engine.features.definitions import FeatureDef
from rolewatch.engine.features.discovery import GraphColumns, ReferenceColumns
from rolewatch.engine.features.graph import EGONET_FEATURES, SnapshotGraph
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.loading import ClosingEvents
from rolewatch.scale.dispatch import DaskMeasure
from rolewatch.scale.features import (
    Columns,
    Layer,
    aggregate_columns,
    fetch_parents,
    parent_group,
)
from rolewatch.scale.graph import WindowGraph, egonet_table
from rolewatch.scale.graph_steps import Block
from rolewatch.scale.partitions import Partitioned, split_by_range

__all__ = ["ClusterColumns", "ClusterTraining"]


def _rows_of(columns: Columns, names: Sequence[str], rows: np.ndarray) -> np.ndarray:
    """``names``' values at ``rows`` of one partition (rows x names)."""
    out = np.empty((rows.size, len(names)))
    for j, name in enumerate(names):
        out[:, j] = columns[name][rows]
    return out


def _aggregates_at(
    block: Block,
    layer: Layer,
    sources: Sequence[Sequence[str]],
    rows: np.ndarray,
    *pieces: np.ndarray,
) -> np.ndarray:
    """One group of aggregates on one partition, only its sampled ``rows`` sent back."""
    columns = aggregate_columns(block, layer, sources, *pieces)
    return _rows_of(columns, [entry[0] for entry in layer], rows)


def _kind_and_direction(d: FeatureDef) -> tuple[str, str]:
    kind, direction = d.op.split("_")
    return kind, direction


def _need_size(block: Block) -> int:
    return int(block.need.size)


def _merged(*tables: Columns) -> Columns:
    return {name: values for table in tables for name, values in table.items()}


class ClusterColumns:
    """:class:`~rolewatch.engine.features.discovery.ReferenceColumns` of one window whose
    graph is on the cluster.

    Parameters
    ----------
    graph : WindowGraph
        The window's graph (its blocks built or building).
    rows : numpy.ndarray
        The sampled account codes, ascending.
    """

    def __init__(self, graph: WindowGraph, rows: np.ndarray) -> None:
        self.graph = graph
        self.client = graph.blocks.client
        self.size = int(rows.size)
        bounds = graph.blocks.bounds
        # each partition's sampled rows, local to it; rows ascend, so partition order is
        # the rows' order
        self.local = [
            np.asarray(rows[part] - bounds[j], dtype=np.int64)
            for j, part in enumerate(split_by_range(rows, bounds))
        ]
        self.local_futures = tuple(self.client.scatter(self.local, hash=False))
        self._with_egonet: Partitioned | None = None
        self._need: int | None = None
        self.parents: dict[str, Partitioned] = {}

    @property
    def rows(self) -> int:
        return self.size

    def _base_columns(self, defs: Sequence[FeatureDef]) -> Partitioned:
        """Each partition's base columns, with the egonet features when ``defs`` ask for
        one (counted once): one dict of float64 columns per partition."""
        if not any(d.op in EGONET_FEATURES for d in defs):
            return self.graph.base
        if self._with_egonet is None:
            self._with_egonet = self.graph.base.map(_merged, egonet_table(self.graph))
        return self._with_egonet

    def _gathered(self, futures: Sequence[Any], width: int) -> np.ndarray:
        parts = self.client.gather(list(futures))
        return np.concatenate(parts, axis=0) if parts else np.empty((0, width))

    def _layer_groups(self, defs: Sequence[FeatureDef]) -> list[tuple[Layer, list[str]]]:
        """``defs`` (aggregates of the kept parents) in groups whose parents' fetched
        values stay within :data:`rolewatch.scale.features.FETCH_BYTES` a partition."""
        if self._need is None:
            sizes = self.client.gather(
                [self.client.submit(_need_size, b) for b in self.graph.blocks.futures]
            )
            self._need = max(sizes, default=0)
        layer = [(d.name, *_kind_and_direction(d), str(d.parent)) for d in defs]
        parents = list(dict.fromkeys(str(d.parent) for d in defs))
        size = parent_group(self._need)
        groups: list[tuple[Layer, list[str]]] = []
        for g in range(0, len(parents), size):
            group = parents[g : g + size]
            groups.append(([entry for entry in layer if entry[3] in group], group))
        return groups

    def _submit_aggregates(self, part: Layer, group: list[str], at_rows: bool) -> list[Any]:
        """One task per partition computing ``part`` from the parents in ``group``: only
        the sampled rows (``at_rows``) or the whole columns."""
        fetched, names = fetch_parents(self.graph, self.parents, group)
        tasks = []
        for i, block in enumerate(self.graph.blocks.futures):
            pieces = [piece for per_source in fetched for piece in per_source[i]]
            if at_rows:
                tasks.append(
                    self.client.submit(
                        _aggregates_at,
                        block,
                        part,
                        names,
                        self.local_futures[i],
                        *pieces,
                        pure=False,
                    )
                )
            else:
                tasks.append(
                    self.client.submit(aggregate_columns, block, part, names, *pieces, pure=False)
                )
        return tasks

    def at_rows(self, defs: Sequence[FeatureDef]) -> list[np.ndarray]:
        values: dict[str, np.ndarray] = {}
        base = [d.name for d in defs if d.parent is None]
        if base:
            first = self._base_columns(defs)
            tasks = [
                self.client.submit(_rows_of, columns, base, rows, pure=False)
                for columns, rows in zip(first.futures, self.local_futures, strict=True)
            ]
            block = self._gathered(tasks, len(base))
            values.update({name: block[:, j] for j, name in enumerate(base)})
        recursive = [d for d in defs if d.parent is not None]
        for part, group in self._layer_groups(recursive) if recursive else []:
            block = self._gathered(self._submit_aggregates(part, group, True), len(part))
            values.update({entry[0]: block[:, j] for j, entry in enumerate(part)})
        return [np.ascontiguousarray(values[d.name]) for d in defs]

    def keep(self, defs: Sequence[FeatureDef]) -> None:
        if all(d.parent is None for d in defs):
            first = self._base_columns(defs)
            self.parents = {d.name: first for d in defs}
            return
        kept: dict[str, Partitioned] = {}
        bounds = self.graph.blocks.bounds
        for part, group in self._layer_groups(defs):
            table = Partitioned(
                self.client, tuple(self._submit_aggregates(part, group, False)), bounds
            )
            kept.update({entry[0]: table for entry in part})
        self.parents = kept
        self._with_egonet = None  # base columns are parents of the first round only


class ClusterTraining:
    """The training windows' features on the cluster of ``measure``
    (:class:`rolewatch.pipeline.model.TrainingFeatures`): each window's graph is built
    there from its events as a close builds it, and let go when discovery ends.

    Parameters
    ----------
    measure : DaskMeasure
    windows : sequence of (Snapshot, events)
        Each training window's snapshot (its accounts' codes) and events.
    """

    def __init__(
        self, measure: DaskMeasure, windows: Sequence[tuple[Snapshot, ClosingEvents]]
    ) -> None:
        self.measure = measure
        self.windows = list(windows)
        self.graphs: list[WindowGraph] = []

    def cancel(self) -> None:
        """Free the windows' graphs on the workers now (after a failed fit, whose
        traceback would keep them until collected)."""
        futures = [f for g in self.graphs for f in (*g.blocks.futures, *g.base.futures)]
        self.measure.client.cancel(futures)

    def references(self, rows: Sequence[np.ndarray | None]) -> list[ReferenceColumns]:
        return [
            self._reference(snapshot, events, picked)
            for (snapshot, events), picked in zip(self.windows, rows, strict=True)
        ]

    def _reference(
        self, snapshot: Snapshot, events: ClosingEvents, picked: np.ndarray | None
    ) -> ReferenceColumns:
        if snapshot.n_nodes == 0:
            return GraphColumns(SnapshotGraph(snapshot))
        graph, chunks = self.measure.window_graph(snapshot, events)
        self.graphs.append(graph)
        try:
            self.measure.wait_built([*graph.blocks.futures, *graph.base.futures], chunks)
        except BaseException:
            self.measure.client.cancel(chunks)  # the events too, not only the graphs
            raise
        del chunks  # the blocks hold the events now
        rows = np.arange(snapshot.n_nodes) if picked is None else np.asarray(picked)
        return ClusterColumns(graph, rows)
