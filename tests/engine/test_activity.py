"""Activity counts and counterparts against plain networkx computations (networkx as the
reference implementation; the random graphs are generated here)."""

import networkx as nx
import numpy as np
import pytest

from rolewatch.engine.activity import Counterparts, activity_counts
from rolewatch.engine.pairs import KnownPairs, account_keys, pair_keys
from rolewatch.engine.snapshot import Snapshot


def _random_events(seed: int, n: int = 40, m: int = 300):
    rng = np.random.default_rng(seed)
    actor = rng.integers(0, n, m)
    target = rng.integers(0, n, m)
    keep = actor != target
    ids = np.array([f"a{i:02d}" for i in range(n)], dtype=object)
    weight = rng.uniform(0.5, 9.0, int(keep.sum())).round(2)
    return ids[actor[keep]], ids[target[keep]], weight


def _multigraph(actor, target, weight):
    graph = nx.MultiDiGraph()
    for a, t, w in zip(actor, target, weight, strict=True):
        graph.add_edge(a, t, weight=w)
    return graph


def test_counts_equal_networkx_degrees_and_neighbourhoods():
    actor, target, weight = _random_events(1)
    previous_actor, previous_target, previous_weight = _random_events(2)
    snapshot = Snapshot.from_events(actor, target, weight)
    previous = Snapshot.from_events(previous_actor, previous_target, previous_weight)
    activity = activity_counts(snapshot, previous)
    graph = _multigraph(actor, target, weight)
    before = nx.Graph(_multigraph(previous_actor, previous_target, previous_weight))
    undirected = nx.Graph(graph)
    for row, node in enumerate(snapshot.nodes):
        # out_degree/in_degree of a multigraph count events (networkx MultiDiGraph)
        assert activity.events_out[row] == graph.out_degree(node)
        assert activity.events_in[row] == graph.in_degree(node)
        neighbours = set(undirected.neighbors(node))
        assert activity.counterparts[row] == len(neighbours)
        known = set(before.neighbors(node)) if node in before else set()
        assert activity.new_counterparts[row] == len(neighbours - known)


def test_top_counterparts_rank_by_events_then_weight_and_flag_new_ones():
    actor, target, weight = _random_events(3)
    previous = Snapshot.from_events(*_random_events(4))
    snapshot = Snapshot.from_events(actor, target, weight)
    graph = _multigraph(actor, target, weight)
    before = nx.Graph(_multigraph(*_random_events(4)))
    index = Counterparts(snapshot, previous)
    for row, node in enumerate(snapshot.nodes[:10]):
        listed = index.top(row, top=50)
        expected = {}
        for a, t, data in graph.edges(data=True):
            if node in (a, t):
                other = t if a == node else a
                events, total = expected.get(other, (0, 0.0))
                expected[other] = (events + 1, total + data["weight"])
        assert {entry["account"] for entry in listed} == set(expected)
        for entry in listed:
            events, total = expected[entry["account"]]
            assert entry["events"] == events
            assert np.isclose(entry["weight"], total)
            sends = graph.has_edge(node, entry["account"])
            receives = graph.has_edge(entry["account"], node)
            assert entry["direction"] == (
                "both" if sends and receives else "out" if sends else "in"
            )
            assert entry["new"] == (
                not (node in before and before.has_edge(node, entry["account"]))
            )
        ranks = [(-entry["events"], -entry["weight"]) for entry in listed]
        assert ranks == sorted(ranks)


@pytest.mark.parametrize("group_entries", [None, 1, 40])
def test_top_of_many_rows_keeps_each_rows_leaders_and_flags_pairs_unseen_in_the_history(
    monkeypatch, group_entries
):
    # networkx as the reference: counterparts, events and weights from the multigraph; the
    # known history is every pair of two earlier random windows. The rows listed at once,
    # one at a time, and in groups of about 40 counterpart entries.
    if group_entries is not None:
        import rolewatch.engine.activity as activity

        monkeypatch.setattr(activity, "TOP_GROUP_ENTRIES", group_entries)
    actor, target, weight = _random_events(5)
    snapshot = Snapshot.from_events(actor, target, weight)
    graph = _multigraph(actor, target, weight)
    history = nx.Graph()
    for seed in (6, 7):
        history.add_edges_from(nx.Graph(_multigraph(*_random_events(seed))).edges)
    keys = [pair_keys(account_keys([a]), account_keys([b])) for a, b in history.edges]
    index = Counterparts(snapshot, known=KnownPairs.from_parts(keys))
    rows = np.array([7, 0, 31, 12, 3])
    listed_per_row = index.top_of(rows, top=3)
    assert len(listed_per_row) == rows.size
    for row, listed in zip(rows, listed_per_row, strict=True):
        node = snapshot.nodes[row]
        expected = {}
        for a, t, data in graph.edges(data=True):
            if node in (a, t):
                other = t if a == node else a
                events, total = expected.get(other, (0, 0.0))
                expected[other] = (events + 1, total + data["weight"])
        ranked = sorted(expected.items(), key=lambda item: (-item[1][0], -item[1][1]))
        assert [entry["account"] for entry in listed] == [other for other, _ in ranked[:3]]
        for entry in listed:
            assert entry["events"] == expected[entry["account"]][0]
            assert np.isclose(entry["weight"], expected[entry["account"]][1])
            assert entry["new"] == (not history.has_edge(node, entry["account"]))
