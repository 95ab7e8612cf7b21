"""ReFeX base, egonet and first recursive features checked against a per-node networkx oracle.

Source of truth: networkx (nx.ego_graph, degrees, nx.triangles) in tests/reference/nx_oracle.py,
and the classic graphs networkx ships.
"""

import sys
from pathlib import Path

import networkx as nx
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from rolewatch.engine import FeatureRecipe, Snapshot
from rolewatch.engine.features import AGGREGATES, BASE_FEATURES, triangles_per_node
from rolewatch.engine.features.definitions import compute_features, parse_feature
from rolewatch.engine.features.graph import SnapshotGraph

sys.path.insert(0, str(Path(__file__).parent))
import nx_oracle  # noqa: E402

# Tolerance 0 in every round: every feature a test compares stays in the recipe.
UNPRUNED = {"tolerance": 0.0, "tolerance_step": 0.0}


def random_directed(seed, n=50, m=260, isolated=4, reciprocal=25):
    rng = np.random.default_rng(seed)
    a, t = rng.integers(0, n, m), rng.integers(0, n, m)
    keep = a != t
    a, t = a[keep], t[keep]
    a, t = np.concatenate([a, t[:reciprocal]]), np.concatenate([t, a[:reciprocal]])
    ids = np.array([f"m{i:03d}" for i in range(n + isolated)])
    return Snapshot.from_events(ids[a], ids[t], rng.gamma(2.0, 5.0, a.size), nodes=ids)


def from_undirected(graph):
    """Each undirected edge becomes two reciprocal arcs carrying its weight (1 if none)."""
    g = nx.convert_node_labels_to_integers(
        graph, ordering="sorted" if _sortable(graph) else "default"
    )
    ids = np.array([f"n{i:03d}" for i in range(g.number_of_nodes())])
    a, t, w = [], [], []
    for u, v, data in g.edges(data=True):
        weight = float(data.get("weight", 1.0))
        a += [u, v]
        t += [v, u]
        w += [weight, weight]
    return Snapshot.from_events(ids[a], ids[t], w, nodes=ids)


def _sortable(graph):
    try:
        sorted(graph.nodes)
        return True
    except TypeError:
        return False


def assert_matches_oracle(snap):
    g = nx_oracle.snapshot_to_digraph(snap)
    ref = nx_oracle.base_features(g)
    ours = SnapshotGraph(snap)
    for name in BASE_FEATURES:
        np.testing.assert_allclose(ours.base(name), ref[name], err_msg=name, atol=1e-9)
    # first recursive round on a few parents, every aggregate, through the evaluation
    # discovery and transform share
    for parent in ("out_degree", "in_strength", "ego_arcs_out", "reciprocity"):
        names = [parent] + [f"{op}({parent})" for op in AGGREGATES]
        got = compute_features(ours, [parse_feature(name) for name in names])
        for j, op in enumerate(AGGREGATES, start=1):
            np.testing.assert_allclose(
                got[:, j], nx_oracle.aggregate(g, ref[parent], op), err_msg=f"{op}({parent})"
            )
    # triangles equal nx.triangles on the undirected view (networkx reference)
    np.testing.assert_array_equal(triangles_per_node(snap.counts), nx_oracle.triangles(g))


@pytest.mark.parametrize("seed", range(6))
def test_random_directed_weighted_graphs(seed):
    # reference: networkx per-node oracle (nx_oracle.py)
    assert_matches_oracle(random_directed(seed))


def test_dense_random_graph_with_many_triangles():
    # reference: networkx per-node oracle; dense enough that most egonets hold triangles
    assert_matches_oracle(random_directed(11, n=25, m=250, isolated=1, reciprocal=80))


@pytest.mark.parametrize(
    "graph",
    [
        pytest.param(nx.karate_club_graph(), id="karate-club-Zachary-1977"),
        pytest.param(nx.florentine_families_graph(), id="florentine-families-Padgett-Ansell-1993"),
        pytest.param(nx.les_miserables_graph(), id="les-miserables-Knuth-1993"),
    ],
)
def test_classic_graphs_shipped_with_networkx(graph):
    # graphs: Zachary 1977, Padgett & Ansell 1993, Knuth 1993, as shipped by networkx
    assert_matches_oracle(from_undirected(graph))


def test_karate_triangle_total():
    # Zachary's karate club has 45 triangles (networkx: sum(nx.triangles(G).values()) / 3)
    snap = from_undirected(nx.karate_club_graph())
    assert (
        triangles_per_node(snap.counts).sum() / 3
        == sum(nx.triangles(nx.karate_club_graph()).values()) / 3
        == 45
    )


def test_structurally_equivalent_karate_nodes_get_identical_features():
    # Zachary 1977 karate club (networkx): nodes 17 and 21 (0-based) both have exactly the
    # neighbours {0, 1}, so every ReFeX feature must agree (weights differ there, so compare
    # on an unweighted copy).
    g = nx.karate_club_graph()
    assert set(g[17]) == set(g[21]) == {0, 1}
    unweighted = nx.Graph(g.edges())
    snap = from_undirected(unweighted)
    table = FeatureRecipe.discover([snap], max_rounds=3, **UNPRUNED).transform(snap)
    i, j = snap.index_of(["n017", "n021"])
    np.testing.assert_array_equal(table.raw[i], table.raw[j])
    np.testing.assert_array_equal(table.binned[i], table.binned[j])


def test_hub_triangles_against_networkx():
    # reference: nx.triangles on a star of 50,000 leaves with three leaf-leaf links
    star = nx.star_graph(50_000)
    star.add_edges_from([(1, 2), (3, 4), (5, 6)])
    snap = from_undirected(star)
    expect = nx.triangles(star)
    got = triangles_per_node(snap.counts)
    assert got[0] == expect[0] == 3
    assert got.sum() == sum(expect.values())


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), perm_seed=st.integers(0, 10_000))
def test_relabelling_permutes_rows_only(seed, perm_seed):
    # invariance (common practice, no source): ReFeX features are structural, so renaming
    # accounts only permutes the rows of the feature table.
    snap = random_directed(seed, n=30, m=120, isolated=2, reciprocal=10)
    recipe = FeatureRecipe.discover([snap], max_rounds=2, **UNPRUNED)
    perm = np.random.default_rng(perm_seed).permutation(snap.n_nodes)
    renamed = np.array([f"x{k:03d}" for k in perm])  # node i is renamed to x{perm[i]}
    coo = snap.counts.tocoo()
    w = snap.weights.tocsr()
    actor, target, weight = [], [], []
    for r, c, cnt in zip(coo.row, coo.col, coo.data, strict=True):
        # keep event multiplicity: cnt events whose weights sum to the original weight
        for _ in range(int(cnt)):
            actor.append(renamed[r])
            target.append(renamed[c])
            weight.append(w[r, c] / cnt)
    other = Snapshot.from_events(actor, target, weight, nodes=renamed[::-1])
    a, b = recipe.transform(snap), recipe.transform(other)
    rows = other.index_of(renamed)
    np.testing.assert_allclose(b.raw[rows], a.raw, rtol=1e-9, atol=1e-9)
    np.testing.assert_array_equal(b.binned[rows], a.binned)
