"""Training with compute = "dask": the training windows' features computed on the cluster's
partitions and read at the training sample's rows give the local fit: the same features,
bin edges within 1e-12 relative (sums in another order), the same basis and roles.
Features at the sampled rows are checked against networkx's degrees and neighbour sums.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from rolewatch.config import ConfigError, load_settings
from rolewatch.engine.features.definitions import base_definitions, children_of
from rolewatch.engine.features.discovery import GraphColumns
from rolewatch.engine.features.graph import SnapshotGraph
from rolewatch.pipeline.model import fit_model
from rolewatch.scale.dispatch import DaskMeasure, fit_for
from rolewatch.scale.training import ClusterColumns

from .conftest import sample_settings
from .helpers import assert_same_models
from .test_dask_equivalence import COUNTS


def _assert_same_columns(names, got, expected) -> None:
    """Counts exactly, the others within 1e-9 relative (sums in another order)."""
    for name, ours, theirs in zip(names, got, expected, strict=True):
        if name in COUNTS:
            np.testing.assert_array_equal(ours, theirs, err_msg=name)
        else:
            np.testing.assert_allclose(ours, theirs, rtol=1e-9, atol=0, err_msg=name)


def test_features_at_the_sampled_rows_on_the_cluster_equal_the_local_ones(
    dask_cluster, sample_windows
):
    _, windows = sample_windows
    events = windows[1]
    snapshot = events.snapshot()
    rows = np.sort(np.random.default_rng(5).choice(snapshot.n_nodes, 60, replace=False))
    graph, _chunks = DaskMeasure(dask_cluster, partitions=3).window_graph(snapshot, events)
    assert graph.blocks.partitions == 3
    cluster = ClusterColumns(graph, rows)
    local = GraphColumns(SnapshotGraph(snapshot), rows)
    assert cluster.rows == local.rows == 60
    base = base_definitions()
    got = cluster.at_rows(base)
    _assert_same_columns([d.op for d in base], got, local.at_rows(base))
    # networkx's distinct out- and in-neighbours of the sampled accounts
    directed = nx.DiGraph(zip(events.actor, events.target, strict=True))
    sampled = snapshot.nodes[rows]
    by_name = dict(zip((d.name for d in base), got, strict=True))
    np.testing.assert_array_equal(by_name["out_degree"], [directed.out_degree(u) for u in sampled])
    np.testing.assert_array_equal(by_name["in_degree"], [directed.in_degree(u) for u in sampled])
    # two rounds of aggregates of kept parents, fetched from the partitions owning them
    parents = [d for d in base if d.name in {"out_degree", "in_degree", "degree"}]
    for rnd in (1, 2):
        cluster.keep(parents)
        local.keep(parents)
        candidates = children_of(parents, rnd)
        got = cluster.at_rows(candidates)
        _assert_same_columns([""] * len(candidates), got, local.at_rows(candidates))
        if rnd == 1:
            # the sum of the out-degrees of each sampled account's successors (networkx)
            column = got[[d.name for d in candidates].index("sum_out(out_degree)")]
            expected = [
                sum(directed.out_degree(v) for v in directed.successors(u)) for u in sampled
            ]
            np.testing.assert_array_equal(column, expected)
        parents = candidates[:4]


@pytest.mark.parametrize("sample_accounts", [None, 300], ids=["every-account", "sampled"])
def test_a_model_fitted_on_the_cluster_equals_the_local_fit(
    dask_cluster, sample_windows, tmp_path, sample_accounts
):
    _, windows = sample_windows
    settings = sample_settings(tmp_path / "unused.db", training_sample_accounts=sample_accounts)
    training = windows[: settings.training_windows]
    snapshots = [events.snapshot() for events in training]
    local = fit_model(settings, snapshots)
    measure = DaskMeasure(dask_cluster, partitions=3)
    on_cluster = fit_for(settings, measure, snapshots, training)
    assert on_cluster.recipe.reference == local.recipe.reference
    assert ("sampled_rows" in local.recipe.reference) == (sample_accounts is not None)
    assert len(on_cluster.recipe.features) > len(base_definitions()) // 2
    assert_same_models(
        (on_cluster.recipe.to_dict(), on_cluster.basis.to_dict(), on_cluster.roles),
        (local.recipe.to_dict(), local.basis.to_dict(), local.roles),
    )


def test_relative_binning_is_refused_on_dask(tmp_path):
    # a Dask close bins every window with the frozen edges; relative binning would be
    # silently ignored there
    with pytest.raises(ConfigError, match="binning = frozen"):
        load_settings(database_url="sqlite://", compute="dask", binning="relative")
    assert load_settings(database_url="sqlite://", compute="local", binning="relative")
