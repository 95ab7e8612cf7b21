import networkx as nx
import numpy as np
import pytest

from rolewatch.engine.basis import RoleBasis
from rolewatch.engine.sensemaking import (
    MEASURE_NAMES,
    betweenness,
    clustering_coefficient,
    describe_roles,
    node_measures,
    pagerank,
)
from rolewatch.engine.snapshot import Snapshot


def _undirected_snapshot(G):
    """Snapshot with one event each way per undirected edge (nodes named member-<i>)."""
    actor, target = [], []
    for u, v in G.edges():
        actor += [f"member-{u:03d}", f"member-{v:03d}"]
        target += [f"member-{v:03d}", f"member-{u:03d}"]
    nodes = [f"member-{u:03d}" for u in sorted(G.nodes())]
    return Snapshot.from_events(actor, target, nodes=nodes), sorted(G.nodes())


def _random_digraph(seed=3, n=120, m=600):
    rng = np.random.default_rng(seed)
    a = rng.integers(0, n, m)
    b = rng.integers(0, n, m)
    keep = a != b
    return a[keep], b[keep], n


GRAPHS = {
    "karate": nx.karate_club_graph,  # Zachary 1977, as shipped by networkx
    "random": lambda: nx.gnm_random_graph(80, 240, seed=5),
}


@pytest.mark.parametrize("graph", GRAPHS)
def test_pagerank_and_clustering_equal_networkx(graph):
    # Source: networkx.pagerank and networkx.clustering (oracle), on Zachary's karate
    # club (Zachary 1977) and a G(n, m) random graph.
    G = GRAPHS[graph]()
    snap, order = _undirected_snapshot(G)
    pr = pagerank(snap.counts)
    ref = nx.pagerank(G, weight=None, tol=1e-13, max_iter=10_000)
    np.testing.assert_allclose(pr, [ref[u] for u in order], rtol=1e-8)
    c, t = clustering_coefficient(snap.counts)
    np.testing.assert_allclose(c, [nx.clustering(G)[u] for u in order], atol=1e-12)
    np.testing.assert_array_equal(t, [nx.triangles(G)[u] for u in order])


def test_pagerank_on_weighted_directed_graph_with_dangling_nodes():
    # Source: networkx.pagerank on a DiGraph with event counts as weights.
    a, b, n = _random_digraph()
    ids = [f"member-{i:03d}" for i in range(n)]
    snap = Snapshot.from_events([ids[i] for i in a], [ids[j] for j in b], nodes=ids)
    D = nx.DiGraph()
    D.add_nodes_from(range(n))
    for i, j in zip(a, b, strict=True):
        w = D.get_edge_data(i, j, {"weight": 0})["weight"]
        D.add_edge(int(i), int(j), weight=w + 1)
    ref = nx.pagerank(D, weight="weight", tol=1e-13, max_iter=10_000)
    np.testing.assert_allclose(pagerank(snap.counts), [ref[i] for i in range(n)], rtol=1e-7)


@pytest.mark.parametrize("graph", GRAPHS)
def test_betweenness_with_all_sources_equals_networkx(graph):
    # Source: networkx.betweenness_centrality(normalized=True) (oracle).
    G = GRAPHS[graph]()
    snap, order = _undirected_snapshot(G)
    ref = nx.betweenness_centrality(G, normalized=True)
    np.testing.assert_allclose(
        betweenness(snap.counts, batch=7), [ref[u] for u in order], atol=1e-12
    )


def test_sampled_betweenness_is_an_unbiased_looking_estimate():
    G = nx.connected_watts_strogatz_graph(300, 6, 0.1, seed=1)
    snap, order = _undirected_snapshot(G)
    exact = betweenness(snap.counts)
    est = betweenness(snap.counts, samples=150, seed=0)
    assert np.corrcoef(exact, est)[0, 1] > 0.9
    assert est.sum() == pytest.approx(exact.sum(), rel=0.15)


def test_node_measures_on_a_small_marketplace():
    # member-a pays b, c, d (one way); b and c pay each other; d pays a back.
    snap = Snapshot.from_events(
        ["member-a", "member-a", "member-a", "member-b", "member-c", "member-d", "member-a"],
        ["member-b", "member-c", "member-d", "member-c", "member-b", "member-a", "member-b"],
        nodes=["member-a", "member-b", "member-c", "member-d", "member-e"],
    )
    names, X = node_measures(snap)
    assert names == MEASURE_NAMES and X.shape == (5, len(names))
    col = {m: X[:, j] for j, m in enumerate(names)}
    np.testing.assert_array_equal(col["degree"], [3, 2, 2, 1, 0])
    np.testing.assert_array_equal(col["out_degree"], [3, 1, 1, 1, 0])
    np.testing.assert_allclose(col["reciprocity"], [1 / 3, 1 / 2, 1 / 2, 1, 0])
    np.testing.assert_allclose(col["out_share"], [4 / 5, 1 / 4, 1 / 3, 1 / 2, 0.5])
    # egonet of a: nodes a,b,c,d; edges ab ac ad bc -> 4 of 6
    assert col["egonet_density"][0] == pytest.approx(4 / 6)
    assert col["clustering"][0] == pytest.approx(1 / 3)
    assert np.isfinite(X).all()


def _star_and_circle_snapshot():
    """Senders paying many strangers, collectors paid by many, and reciprocal circles."""
    actor, target = [], []
    for s in range(6):  # one-way senders, each paying 12 distinct members
        for t in range(12):
            actor.append(f"sender-{s}")
            target.append(f"buyer-{(s * 7 + t) % 40}")
    for c in range(4):  # collectors: 10 members pay each
        for t in range(10):
            actor.append(f"buyer-{(c * 11 + t) % 40}")
            target.append(f"collector-{c}")
    for g in range(8):  # circles of 5 members all paying each other
        group = [f"circle-{g}-{i}" for i in range(5)]
        for u in group:
            for v in group:
                if u != v:
                    actor.append(u)
                    target.append(v)
    return Snapshot.from_events(actor, target)


def test_describe_roles_names_planted_structures():
    snap = _star_and_circle_snapshot()
    names, X = node_measures(snap)
    nodes = np.asarray(snap.nodes).astype(str)
    kinds = np.array([n.split("-")[0] for n in nodes])
    order = ["sender", "collector", "circle", "buyer"]
    # one pure role per planted kind: profiles over three indicator-like features
    V = np.column_stack([(kinds == k).astype(float) for k in order])
    basis = RoleBasis(
        F=np.eye(4), role_ids=(0, 1, 2, 3), feature_names=tuple(order), recipe_version=None
    )
    m = basis.memberships(V)
    roles = describe_roles(basis, m, names, X)
    by_id = {r.role_id: r for r in roles}
    assert by_id[0].name == "one-way sender"
    assert by_id[1].name == "collector"
    assert by_id[2].name == "reciprocal circle member"
    assert "mostly sends" in by_id[0].description
    assert len({r.name for r in roles}) == 4
    assert all(v >= 0 for r in roles for v in r.measure_affinity.values())
    assert by_id[2].profile == {"sender": 0.0, "collector": 0.0, "circle": 1.0, "buyer": 0.0}


def test_duplicate_names_are_disambiguated():
    snap = _star_and_circle_snapshot()
    names, X = node_measures(snap)
    kinds = np.array([n.split("-")[0] for n in np.asarray(snap.nodes).astype(str)])
    # two roles split the circle members between them -> same archetype twice
    circle = (kinds == "circle").astype(float)
    half = circle * (np.arange(len(kinds)) % 2)
    V = np.column_stack(
        [
            (kinds == "sender").astype(float),
            circle - half,
            half,
            (kinds == "buyer") + (kinds == "collector"),
        ]
    )
    basis = RoleBasis(
        F=np.eye(4), role_ids=(0, 1, 2, 3), feature_names=("a", "b", "c", "d"), recipe_version=None
    )
    roles = describe_roles(basis, basis.memberships(V), names, X)
    assert len({r.name for r in roles}) == 4


def test_describe_roles_rejects_misaligned_measures():
    basis = RoleBasis(F=np.eye(3), role_ids=(0, 1, 2), feature_names="abc", recipe_version=None)
    with pytest.raises(ValueError, match="one row per membership row"):
        describe_roles(basis, np.full((5, 3), 1 / 3), MEASURE_NAMES, np.zeros((4, 10)))
