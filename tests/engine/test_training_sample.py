"""Training on a sample of accounts: which accounts, and what is learnt from them.

The sample is consistent sampling by hashed id (Broder, "On the resemblance and containment
of documents", Compression and Complexity of Sequences 1997): an account is in or out of it
in every window alike. The features of sampled accounts still come from the whole graph,
checked against networkx's degrees on the Les Misérables co-appearance graph (Knuth, The
Stanford GraphBase 1993, shipped as ``networkx.les_miserables_graph``).
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from rolewatch.config import load_settings
from rolewatch.engine import FeatureRecipe, Snapshot
from rolewatch.engine.features import apply_bins, bin_edges
from rolewatch.engine.features.discovery import GraphColumns
from rolewatch.engine.features.graph import SnapshotGraph
from rolewatch.engine.rowkeys import account_sample
from rolewatch.pipeline.model import fit_basis, fit_model

UNPRUNED = {"tolerance": 0.0, "tolerance_step": 0.0}


def les_miserables_snapshot() -> tuple[Snapshot, nx.Graph]:
    """Each co-appearance as two events, one each way, weighted by its count."""
    graph = nx.les_miserables_graph()
    actor, target, weight = [], [], []
    for u, v, w in graph.edges(data="weight"):
        actor += [u, v]
        target += [v, u]
        weight += [w, w]
    return Snapshot.from_events(np.array(actor), np.array(target), np.array(weight, float)), graph


def windows_with_overlap() -> list[np.ndarray]:
    return [
        np.array([f"member-{i:04d}" for i in range(0, 600)]),
        np.array([f"member-{i:04d}" for i in range(300, 900)]),
    ]


def test_no_sample_when_the_windows_hold_few_enough_accounts():
    nodes = windows_with_overlap()
    assert account_sample(nodes, None) is None
    assert account_sample(nodes, 900) is None  # 900 distinct accounts
    assert account_sample(nodes, 899) is not None


def test_sample_holds_exactly_size_accounts_in_or_out_in_every_window():
    nodes = windows_with_overlap()
    rows = account_sample(nodes, 250, seed=7)
    assert rows is not None
    picked = [set(ids[r]) for ids, r in zip(nodes, rows, strict=True)]
    assert len(picked[0] | picked[1]) == 250
    shared = set(nodes[0]) & set(nodes[1])
    # consistent sampling (Broder 1997): an account seen in both windows is picked in both
    # or in neither
    assert picked[0] & shared == picked[1] & shared
    for r in rows:
        assert np.all(np.diff(r) > 0)


def test_sample_depends_on_the_seed_and_repeats_with_it():
    nodes = windows_with_overlap()
    first = account_sample(nodes, 100, seed=1)
    again = account_sample(nodes, 100, seed=1)
    other = account_sample(nodes, 100, seed=2)
    assert all(np.array_equal(a, b) for a, b in zip(first, again, strict=True))
    assert not all(np.array_equal(a, b) for a, b in zip(first, other, strict=True))


def test_sample_follows_accounts_not_positions():
    """Dropping accounts outside the sample leaves the sample as it was (Broder 1997)."""
    ids = np.array([f"member-{i:04d}" for i in range(1000)])
    rows = account_sample([ids], 100, seed=3)[0]
    kept = np.union1d(rows, np.arange(0, 1000, 2))  # the sample plus every other account
    again = account_sample([ids[kept]], 100, seed=3)[0]
    assert set(ids[kept][again]) == set(ids[rows])


def test_sample_of_zero_accounts_is_refused():
    with pytest.raises(ValueError, match="at least one account"):
        account_sample(windows_with_overlap(), 0)


def test_recipe_bins_are_learnt_on_the_sample_from_features_of_the_whole_graph():
    snapshot, graph = les_miserables_snapshot()
    rows = account_sample([snapshot.nodes], 40, seed=0)
    assert rows is not None and rows[0].size == 40
    recipe = FeatureRecipe.discover(snapshot, max_rounds=1, rows=rows, **UNPRUNED)
    assert recipe.reference["rows"] == 77 and recipe.reference["sampled_rows"] == 40
    table = recipe.transform(snapshot).take(rows[0])
    # the sampled accounts' degrees are their degrees in the whole graph (networkx); with
    # one event each way, in-, out- and undirected degree agree and pruning keeps the first
    degree = dict(graph.degree())
    expected = [degree[name] for name in table.nodes]
    kept = next(name for name in recipe.names if name.endswith("degree"))
    np.testing.assert_array_equal(table.column(kept), expected)
    # every frozen edge is the vertical log binning of the sampled rows only
    for j, name in enumerate(recipe.names):
        np.testing.assert_array_equal(recipe.edges[name], bin_edges(table.raw[:, j], 0.5))
        np.testing.assert_array_equal(
            table.binned[:, j], apply_bins(table.raw[:, j], recipe.edges[name])
        )


def test_discovery_on_all_rows_equals_discovery_without_a_sample():
    snapshot, _ = les_miserables_snapshot()
    whole = FeatureRecipe.discover(snapshot, max_rounds=2)
    every_row = FeatureRecipe.discover(snapshot, max_rounds=2, rows=[np.arange(77)])
    assert every_row.names == whole.names
    for a, b in zip(every_row.feature_edges, whole.feature_edges, strict=True):
        np.testing.assert_array_equal(a, b)


def test_fit_model_fits_on_the_sample_and_measures_every_account():
    snapshot, _ = les_miserables_snapshot()
    sampled = load_settings(
        database_url="sqlite://", training_sample_accounts=100, roles=3, feature_rounds=1
    )
    whole = load_settings(
        database_url="sqlite://", training_sample_accounts=None, roles=3, feature_rounds=1
    )
    # 77 accounts, fewer than the sample: the same model as training on all of them
    assert fit_model(sampled, [snapshot]).recipe == fit_model(whole, [snapshot]).recipe
    small = load_settings(
        database_url="sqlite://", training_sample_accounts=40, roles=3, feature_rounds=1
    )
    model = fit_model(small, [snapshot])
    assert model.recipe.reference["sampled_rows"] == 40
    assert model.basis.summary["rows"] == 40
    memberships = model.basis.memberships(model.recipe.transform(snapshot))
    assert memberships.mixture.shape == (77, 3)


def test_discoverys_bins_of_the_sampled_rows_are_the_recipes_bins_at_those_rows():
    # fit_model fits the basis on these bins instead of computing the recipe again
    snapshot, graph = les_miserables_snapshot()
    rows = account_sample([snapshot.nodes], 40, seed=3)
    assert rows is not None
    recipe, binned = FeatureRecipe.discover_on(
        [GraphColumns(SnapshotGraph(snapshot), rows[0])],
        accounts=snapshot.n_nodes,
        sampled=True,
        max_rounds=2,
    )
    assert recipe == FeatureRecipe.discover(snapshot, max_rounds=2, rows=rows)
    assert max(d.round for d in recipe.features) >= 1
    table = recipe.transform(snapshot).take(rows[0])
    assert binned.shape == table.binned.shape
    np.testing.assert_array_equal(binned, table.binned)
    # a sampled account's mean over its in-neighbours of their in-degree comes from the
    # whole graph: with one event each way, networkx's neighbours and degrees of the
    # undirected Les Misérables graph
    assert "mean_in(in_degree)" in recipe.names
    degree = dict(graph.degree())
    means = [np.mean([degree[v] for v in graph[u]]) for u in table.nodes]
    np.testing.assert_allclose(table.column("mean_in(in_degree)"), means, rtol=1e-12)


def test_fit_model_fits_the_basis_on_each_windows_sampled_rows():
    # two windows: Les Misérables, and its co-appearances of weight at least 2
    snapshot, graph = les_miserables_snapshot()
    heavy = [(u, v) for u, v, w in graph.edges(data="weight") if w >= 2]
    actor = np.array([u for u, v in heavy] + [v for u, v in heavy])
    target = np.array([v for u, v in heavy] + [u for u, v in heavy])
    second = Snapshot.from_events(actor, target)
    snapshots = [snapshot, second]
    settings = load_settings(
        database_url="sqlite://", training_sample_accounts=50, roles=3, feature_rounds=1
    )
    rows = account_sample([s.nodes for s in snapshots], 50, settings.seed)
    assert rows is not None and all(
        0 < r.size < s.n_nodes for r, s in zip(rows, snapshots, strict=True)
    )
    model = fit_model(settings, snapshots)
    # the basis a fit on the recipe's whole tables, taken at the sampled rows, gives
    tables = [model.recipe.transform(s).take(r) for s, r in zip(snapshots, rows, strict=True)]
    expected = fit_basis(settings, tables)
    assert model.basis.to_dict() == expected.to_dict()
