import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
from scipy.stats import norm, poisson
from sklearn.metrics import adjusted_rand_score

from rolewatch.engine.bridging import (
    DENSE_BELOW,
    bridging_zscore,
    community_labels,
    leiden_communities,
    undirected_ties,
)
from rolewatch.engine.scoring import ShiftPolicy, score_window


def _adjacency(graph, nodes=None):
    return sp.csr_matrix(nx.to_scipy_sparse_array(graph, nodelist=nodes, format="csr", dtype=float))


def _planted_truth(graph):
    labels = np.empty(graph.number_of_nodes(), dtype=int)
    for block, members in enumerate(graph.graph["partition"]):
        labels[list(members)] = block
    return labels


@pytest.mark.parametrize("size", [30, 120])  # dense eigensolver below DENSE_BELOW, eigsh above
def test_communities_recover_networkx_planted_partition(size):
    # Reference: networkx planted_partition_graph (Condon & Karp's planted l-partition
    # model) records the blocks it planted; networkx's Louvain (Blondel et al. 2008) must
    # agree with them too, so the graph really has these communities.
    graph = nx.planted_partition_graph(3, size, 0.3, 0.01, seed=7)
    truth = _planted_truth(graph)
    labels = community_labels(_adjacency(graph), 3)
    louvain = np.empty_like(truth)
    for block, members in enumerate(nx.community.louvain_communities(graph, seed=1)):
        louvain[list(members)] = block
    assert (3 * size < DENSE_BELOW) == (size == 30)
    assert adjusted_rand_score(truth, louvain) > 0.95
    assert adjusted_rand_score(truth, labels) > 0.95


def test_communities_of_ring_of_cliques():
    # networkx ring_of_cliques(4, 6): four 6-cliques joined in a ring by single edges;
    # the cliques are the communities (hand-checked: modularity is highest for them).
    graph = nx.ring_of_cliques(4, 6)
    labels = community_labels(_adjacency(graph), 4)
    truth = np.repeat(np.arange(4), 6)
    assert adjusted_rand_score(truth, labels) == 1.0


def test_communities_small_cases():
    assert community_labels(sp.csr_matrix((2, 2)), 3).tolist() == [0, 0]
    assert community_labels(sp.csr_matrix((5, 5)), 1).tolist() == [0] * 5
    with pytest.raises(ValueError, match="n_communities"):
        community_labels(sp.csr_matrix((5, 5)), 0)


def test_undirected_ties_symmetric_log_counts():
    counts = sp.csr_matrix(np.array([[0, 2, 0], [1, 0, 0], [0, 0, 0]], dtype=float))
    ties = undirected_ties(counts).toarray()
    np.testing.assert_allclose(ties, np.log1p(np.array([[0, 3, 0], [3, 0, 0], [0, 0, 0]])))
    with pytest.raises(ValueError, match="square"):
        undirected_ties(sp.csr_matrix((2, 3)))


def test_bridging_zscore_hand_worked():
    # Two 5-cliques a0..a4 (community 0) and b0..b4 (community 1); a0 also ties to b0 and
    # b1. Worked by hand from the definition. Tie ends: 22 in each community, so each
    # community's share s_c is 1/2. Ties by home: home 0 (a0..a4) 20 inside and 2 across,
    # home 1 likewise.
    # a0: 4 counterparts at home (0), 2 in community 1, degree 6. Everybody else's ties from
    #   home 0: 16, none across, so P(1 | 0) = (0 + 1/2) / (16 + 1) and the expected count
    #   6 * 0.5 / 17 = 3/17; P[X >= 2] = 1 - e^(-3/17) (1 + 3/17). One other community
    #   touched: no correction.
    # b0 (and b1): home 1, 4 ties there and 1 to a0, degree 5. Others from home 1: 17 ties,
    #   1 across (b1's or b0's tie to a0): P(0 | 1) = (1 + 1/2) / (17 + 1), expected
    #   5 * 1.5 / 18; P[X >= 1] = 1 - e^(-7.5/18).
    # Normal quantiles from scipy.stats.norm (reference implementation).
    graph = nx.disjoint_union(nx.complete_graph(5), nx.complete_graph(5))
    graph.add_edges_from([(0, 5), (0, 6)])
    labels = np.repeat([0, 1], 5)
    z = bridging_zscore(_adjacency(graph), labels)
    mu_a0 = 3 / 17
    tail_a0 = 1 - np.exp(-mu_a0) * (1 + mu_a0)
    tail_b = 1 - np.exp(-7.5 / 18)
    assert z[0] == pytest.approx(norm.isf(tail_a0), rel=1e-9)
    assert z[5] == pytest.approx(norm.isf(tail_b), rel=1e-9)
    assert z[6] == pytest.approx(z[5])
    np.testing.assert_array_equal(z[[1, 2, 3, 4, 7, 8, 9]], 0.0)


def test_bridging_zscore_isolated_unlabelled_and_shape_errors():
    z = bridging_zscore(sp.csr_matrix((3, 3)), np.zeros(3, dtype=int))
    assert np.isnan(z).all()
    # counterparts without a reference community are left out: the ends of the path 0-1-2
    # only deal with the unlabelled middle, which sees one tie in each community
    graph = nx.path_graph(3)
    z = bridging_zscore(_adjacency(graph), np.array([0, -1, 1]))
    assert np.isnan(z[[0, 2]]).all() and z[1] == 0.0
    with pytest.raises(ValueError, match="one entry per node"):
        bridging_zscore(sp.csr_matrix((3, 3)), np.zeros(2, dtype=int))


def _bridging_by_definition(graph, labels):
    """The bridging z-score of every node, one node at a time from the definition in
    :func:`bridging_zscore`'s docstring, with networkx neighbours and scipy.stats'
    Poisson and normal laws (reference implementation)."""
    counts = {}
    for v in graph:
        cells = {}
        for u in graph[v]:
            if u != v and labels[u] >= 0:
                cells[labels[u]] = cells.get(labels[u], 0) + 1
        counts[v] = cells
    home = {v: min(c, key=lambda x: (-c[x], x)) for v, c in counts.items() if c}
    ends = sum(sum(c.values()) for c in counts.values())
    share = {}
    for c in counts.values():
        for community, count in c.items():
            share[community] = share.get(community, 0) + count / ends
    z = np.full(graph.number_of_nodes(), np.nan)
    for v, cells in counts.items():
        if not cells:
            continue
        h, degree = home[v], sum(cells.values())
        others = [u for u in home if u != v and home[u] == h]
        from_home = sum(sum(counts[u].values()) for u in others)
        tails = []
        for community, count in cells.items():
            if community == h:
                continue
            into = sum(counts[u].get(community, 0) for u in others)
            expected = degree * (into + share[community]) / (from_home + 1)
            tails.append(poisson.sf(count - 1, expected))
        if not tails:
            z[v] = 0.0
            continue
        p_any = 1 - (1 - min(tails)) ** len(tails)
        z[v] = max(norm.isf(p_any), 0.0)
    return z


@pytest.mark.parametrize("slice_entries", [3, 40, None])
def test_bridging_zscore_matches_the_definition_node_by_node(monkeypatch, slice_entries):
    # Zachary's karate club and Les Misérables (classic graphs networkx ships), labelled
    # by networkx's Louvain with a few nodes left unlabelled; computed in slices of a few
    # rows (the whole graph in one slice when None) and node by node from the definition.
    import rolewatch.engine.bridging as bridging

    if slice_entries is not None:
        monkeypatch.setattr(bridging, "SLICE_ENTRIES", slice_entries)
    for graph in (nx.karate_club_graph(), nx.les_miserables_graph()):
        graph = nx.convert_node_labels_to_integers(graph)
        labels = np.full(graph.number_of_nodes(), -1)
        for community, members in enumerate(nx.community.louvain_communities(graph, seed=2)):
            labels[list(members)] = community
        labels[::9] = -1
        z = bridging_zscore(_adjacency(graph), labels)
        expected = _bridging_by_definition(graph, labels)
        np.testing.assert_array_equal(np.isnan(z), np.isnan(expected))
        np.testing.assert_allclose(z, expected, rtol=1e-9, atol=1e-12)
        assert (z[np.isfinite(z)] > 0).any()


def test_undirected_ties_leave_out_a_diagonal_and_zeros():
    # a self-loop and an explicit zero are no ties (hand-worked)
    counts = sp.csr_matrix(np.array([[4.0, 1.0, 0.0], [0.0, 0.0, 2.0], [0.0, 0.0, 0.0]]))
    counts.data[counts.data == 2.0] = 0.0  # stored, but zero
    ties = undirected_ties(counts)
    assert ties.nnz == 2
    np.testing.assert_allclose(ties.toarray(), np.log1p([[0, 1, 0], [1, 0, 0], [0, 0, 0]]))
    assert undirected_ties(sp.csr_matrix((0, 0))).shape == (0, 0)


def _chain_of_groups(seed: int):
    """Three planted groups in a chain (0-1 and 1-2 trade a little, 0 and 2 never), built
    with networkx's stochastic_block_model."""
    sizes = [80, 80, 80]
    p = [[0.15, 0.01, 0.0], [0.01, 0.15, 0.01], [0.0, 0.01, 0.15]]
    return nx.stochastic_block_model(sizes, p, seed=seed)


def test_leiden_recovers_networkx_planted_partition():
    # Reference: networkx planted_partition_graph (Condon & Karp's planted l-partition
    # model) records the blocks it planted; scikit-learn's adjusted Rand index compares.
    graph = nx.planted_partition_graph(4, 60, 0.3, 0.01, seed=7)
    truth = _planted_truth(graph)
    labels = leiden_communities(_adjacency(graph), resolution=1.0)
    assert adjusted_rand_score(truth, labels) > 0.95
    again = leiden_communities(_adjacency(graph), resolution=1.0)
    np.testing.assert_array_equal(labels, again)  # seeded: the same every time
    # networkx ring_of_cliques(4, 6): the cliques are the communities
    ring = leiden_communities(_adjacency(nx.ring_of_cliques(4, 6)), resolution=1.0)
    assert adjusted_rand_score(np.repeat(np.arange(4), 6), ring) == 1.0
    assert leiden_communities(sp.csr_matrix((0, 0))).size == 0


def test_leiden_gives_what_igraph_gives_from_python_lists():
    # Reference: igraph's community_leiden called with its edges and weights as Python lists
    # (the forms its documentation shows), on networkx's weighted Les Miserables
    # co-appearance graph: the arrays handed to igraph make the same graph and weights.
    import random

    import igraph

    graph = nx.les_miserables_graph()
    A = _adjacency(graph)  # its "weight" attribute: co-appearances
    upper = sp.triu(A, k=1).tocoo()
    reference = igraph.Graph(
        n=A.shape[0], edges=list(zip(upper.row.tolist(), upper.col.tolist(), strict=True))
    )
    previous = igraph.set_random_number_generator(random.Random(0))
    try:
        expected = reference.community_leiden(
            objective_function="modularity",
            weights=upper.data.tolist(),
            resolution=0.5,
            n_iterations=2,
        ).membership
    finally:
        igraph.set_random_number_generator(previous if previous is not None else random)
    labels = leiden_communities(A, resolution=0.5, seed=0)
    np.testing.assert_array_equal(labels, expected)
    assert len(set(expected)) > 1


def test_a_new_broker_stands_out_against_the_window_before():
    # The groups of the window before (reference communities, found by Leiden there) are
    # used to judge this window, in which one extra node ties to ten members of group 0
    # and ten of group 2, which never deal with each other: a local bridge across a
    # structural hole (Granovetter 1973; Burt 1992; both as recalled).
    before = _chain_of_groups(3)
    reference = leiden_communities(_adjacency(before), resolution=0.5)
    assert adjusted_rand_score(_planted_truth(before), reference) > 0.9
    now = _chain_of_groups(4)
    bridge = now.number_of_nodes()
    now.add_edges_from((bridge, j) for j in list(range(10)) + list(range(160, 170)))
    labels = np.append(reference, -1)  # the broker's own label does not matter
    z = bridging_zscore(_adjacency(now), labels)
    assert np.nanargmax(z) == bridge and z[bridge] > 5
    assert np.sort(z[np.isfinite(z)])[-2] < 4


def _case(n=60):
    rng = np.random.default_rng(1)
    cur = rng.dirichlet(np.ones(3), n)
    base = cur.copy()
    act = rng.integers(1, 40, n).astype(float)
    return cur, base, act


F = np.eye(3)


def test_stratified_score_takes_the_larger_of_shift_and_bridging_rise():
    cur, base, act = _case()
    policy = ShiftPolicy(calibration="stratified")
    plain = score_window(cur, base, act, act, np.zeros(len(act)), F, policy)
    before = np.zeros(len(act))
    now = before.copy()
    now[5] = 7.5
    now[6] = 2.0
    out = score_window(
        cur,
        base,
        act,
        act,
        np.zeros(len(act)),
        F,
        policy,
        current_bridging=now,
        baseline_bridging=before,
    )
    assert out.score[5] == pytest.approx(7.5) and out.alert[5]
    assert out.score[6] == pytest.approx(max(plain.score[6], 2.0))
    np.testing.assert_allclose(np.delete(out.score, [5, 6]), np.delete(plain.score, [5, 6]))


def test_policy_bridge_resolution():
    assert ShiftPolicy().bridge_resolution > 0
    assert ShiftPolicy(bridge_resolution=0).bridge_resolution == 0
    with pytest.raises(ValueError, match="bridge_resolution"):
        ShiftPolicy(bridge_resolution=-1)
