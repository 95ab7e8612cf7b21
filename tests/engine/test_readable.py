"""Readable measures against networkx's definitions, and readable labels of ReFeX features."""

import math

import networkx as nx
import numpy as np
import pytest

from rolewatch.engine.errors import EngineInputError
from rolewatch.engine.readable import MEASURES, feature_label, readable_measures
from rolewatch.engine.snapshot import Snapshot


def _digraph_snapshot(G: nx.DiGraph) -> tuple[Snapshot, list]:
    """One event per arc, ``count`` events where the arc has that attribute."""
    actor, target = [], []
    for u, v, data in G.edges(data=True):
        for _ in range(int(data.get("count", 1))):
            actor.append(f"m-{u:03d}")
            target.append(f"m-{v:03d}")
    order = sorted(G.nodes())
    return Snapshot.from_events(actor, target, nodes=[f"m-{u:03d}" for u in order]), order


def _random_digraph(seed: int) -> nx.DiGraph:
    rng = np.random.default_rng(seed)
    G = nx.gnm_random_graph(90, 420, seed=seed, directed=True)
    for u, v in G.edges():
        G.edges[u, v]["count"] = int(rng.integers(1, 4))
    G.add_node(90)  # an isolated account
    return G


def _karate_both_ways() -> nx.DiGraph:
    # Zachary's karate club as shipped by networkx, one event each way per tie
    return nx.karate_club_graph().to_directed()


@pytest.mark.parametrize("make", [_karate_both_ways, lambda: _random_digraph(3)])
def test_measures_equal_networkx(make):
    G = make()
    snap, order = _digraph_snapshot(G)
    R = readable_measures(snap.counts)
    col = {name: R.column(name) for name in MEASURES}
    U = nx.Graph(G.to_undirected())
    # Source: networkx DiGraph.out_degree / in_degree (distinct accounts), and the same
    # with weight="count" (events sent / received)
    np.testing.assert_array_equal(col["out_degree"], [G.out_degree(u) for u in order])
    np.testing.assert_array_equal(col["in_degree"], [G.in_degree(u) for u in order])
    sent = [G.out_degree(u, weight="count") for u in order]
    got = [G.in_degree(u, weight="count") for u in order]
    np.testing.assert_array_equal(col["events_out"], sent)
    np.testing.assert_array_equal(col["events_in"], got)
    # Source: networkx.clustering on the undirected view (Watts & Strogatz 1998)
    np.testing.assert_allclose(col["clustering"], [nx.clustering(U, u) for u in order])
    # Source: networkx.effective_size (Burt 1992); networkx gives NaN for an isolated node
    effective = nx.effective_size(U)
    expected = [0.0 if math.isnan(effective[u]) else effective[u] for u in order]
    np.testing.assert_allclose(col["brokerage"], expected)
    # Source: networkx.reciprocity(G, node) = 2 |pred ∩ succ| / (|pred| + |succ|); ours is
    # |pred ∩ succ| / |pred ∪ succ| = x / (2 - x) for networkx's x
    for u, value in zip(order, col["reciprocity"], strict=True):
        if G.degree(u) == 0:
            assert value == 0.0
            continue
        x = nx.reciprocity(G, u)
        assert value == pytest.approx(x / (2 - x))
    share = np.divide(
        sent, np.add(sent, got), out=np.full(len(order), 0.5), where=np.add(sent, got) > 0
    )
    np.testing.assert_allclose(col["sent_share"], share)
    assert np.isnan(col["new_share"]).all()


def test_a_few_rows_give_the_same_values_as_all_rows():
    snap, _ = _digraph_snapshot(_random_digraph(7))
    new = np.arange(snap.n_nodes) % 3
    full = readable_measures(snap.counts, new_counterparts=new)
    rows = np.array([5, 0, 77, 90, 5])
    some = readable_measures(snap.counts, rows=rows, new_counterparts=new)
    np.testing.assert_allclose(some.values, full.values[rows])
    degree = np.asarray(((snap.counts + snap.counts.T) > 0).sum(axis=1)).ravel()[rows]
    expected = np.divide(new[rows], degree, out=np.zeros(len(rows)), where=degree > 0)
    np.testing.assert_allclose(some.column("new_share"), expected)
    assert some.row(1)["out_degree"] == full.values[0, MEASURES.index("out_degree")]


def test_rows_next_to_a_hub_count_triangles_like_networkx():
    """Many rows beside a hub: over a million two-step paths, so the listing of every node
    counts their triangles; the clustering must still be networkx's."""
    G = nx.star_graph(1500).to_directed()  # hub 0, leaves 1..1500
    for leaf in range(1, 1000, 2):  # close pairs of the first 1,000 leaves into triangles
        G.add_edge(leaf, leaf + 1)
        G.add_edge(leaf + 1, leaf)
    snap, _ = _digraph_snapshot(G)
    rows = np.arange(1, 1501)
    measured = readable_measures(snap.counts, rows=rows).column("clustering")
    clustering = nx.clustering(G.to_undirected())
    expected = [clustering[int(snap.nodes[r][2:])] for r in rows]
    assert 0 < sum(expected) < len(rows)
    np.testing.assert_allclose(measured, expected)


def test_rows_outside_the_window_are_refused():
    snap, _ = _digraph_snapshot(_random_digraph(1))
    with pytest.raises(EngineInputError, match="node indices"):
        readable_measures(snap.counts, rows=np.array([snap.n_nodes]))


@pytest.mark.parametrize(
    ("name", "label"),
    [
        ("out_degree", "accounts it writes to"),
        ("mean_out(degree)", "average counterparts of the accounts it writes to"),
        ("sum_in(out_events)", "total events sent of the accounts writing to it"),
        (
            "mean_out(sum_in(degree))",
            "average, over the accounts it writes to, of the total counterparts of the "
            "accounts writing to them",
        ),
        ("not_a_feature", "not_a_feature"),
    ],
)
def test_feature_labels_are_words_not_formulas(name, label):
    assert feature_label(name) == label


def test_no_label_of_a_deep_feature_holds_a_formula():
    ops = ["sum_in", "mean_in", "sum_out", "mean_out", "sum_all", "mean_all"]
    for outer in ops:
        for inner in ops:
            text = feature_label(f"{outer}({inner}(in_degree))")
            assert "(" not in text and "_" not in text, text


def test_triangles_counted_by_the_features_give_networkx_clustering():
    # Source: networkx.triangles / networkx.clustering on the undirected view of Zachary's
    # karate club (as networkx ships it); the triangles come from a recipe whose egonet
    # features counted them, as a window close passes them on.
    from rolewatch.engine.features import FeatureRecipe

    G = _karate_both_ways()
    snap, order = _digraph_snapshot(G)
    table = FeatureRecipe.discover(snap).transform(snap)
    assert table.triangles is not None
    U = nx.Graph(G.to_undirected())
    np.testing.assert_array_equal(table.triangles, [nx.triangles(U, u) for u in order])
    rows = np.array([0, 33, 16])
    reused = readable_measures(snap.counts, rows=rows, triangles=table.triangles)
    np.testing.assert_allclose(
        reused.column("clustering"), [nx.clustering(U, order[r]) for r in rows]
    )
    np.testing.assert_array_equal(reused.values, readable_measures(snap.counts, rows=rows).values)


@pytest.mark.parametrize("rows", [None, np.array([0, 33, 2, 8])])
def test_self_ties_are_ignored_and_the_counts_are_left_as_they_are(rows):
    # Zachary's karate club (networkx) with a self-loop on every member: tie measures are
    # networkx's on the graph without them (nx.selfloop_edges removed); the events count
    # them. The counts matrix, its indices unsorted in each row (valid CSR), must come back
    # untouched (scipy's setdiag sorts index arrays in place that a pattern shares with it).
    import scipy.sparse as sp

    from rolewatch.engine.features.triangles import triangles_per_node

    G = nx.karate_club_graph().to_directed()
    looped = G.copy()
    looped.add_edges_from((u, u) for u in G)
    ordered = sp.csr_matrix(nx.to_scipy_sparse_array(looped, nodelist=sorted(G), weight=None))
    # each row's entries in descending column order: valid CSR, just not sorted
    reverse = np.concatenate(
        [
            np.arange(hi - 1, lo - 1, -1)
            for lo, hi in zip(ordered.indptr[:-1], ordered.indptr[1:], strict=True)
        ]
    )
    counts = sp.csr_matrix(
        (ordered.data[reverse], ordered.indices[reverse], ordered.indptr), shape=ordered.shape
    )
    before = (counts.data.copy(), counts.indices.copy(), counts.indptr.copy())
    measured = readable_measures(counts, rows=rows)
    picked = np.arange(G.number_of_nodes()) if rows is None else rows
    np.testing.assert_array_equal(measured.column("out_degree"), [G.out_degree(u) for u in picked])
    U = nx.Graph(G.to_undirected())
    np.testing.assert_allclose(measured.column("clustering"), [nx.clustering(U, u) for u in picked])
    np.testing.assert_array_equal(
        measured.column("events_out"), [G.out_degree(u) + 1 for u in picked]
    )
    triangles = triangles_per_node(counts)
    np.testing.assert_array_equal(triangles, [nx.triangles(U, u) for u in sorted(G)])
    for kept, now in zip(before, (counts.data, counts.indices, counts.indptr), strict=True):
        np.testing.assert_array_equal(kept, now)
