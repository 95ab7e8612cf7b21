"""Tie cells (counterparts by direction and novelty) against networkx."""

from __future__ import annotations

import networkx as nx
import numpy as np

from rolewatch.engine.pairs import KnownPairs
from rolewatch.engine.snapshot import Snapshot
from rolewatch.engine.ties import tie_counts


def _windows(seed: int, count: int = 4, accounts: int = 40, events: int = 120):
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(count):
        actor = rng.integers(0, accounts, events)
        target = (actor + rng.integers(1, accounts, events)) % accounts
        out.append(([f"u{a}" for a in actor], [f"u{b}" for b in target]))
    return out


def test_tie_cells_match_networkx_over_a_history():
    # Reference: networkx. The known history is the undirected union of the earlier
    # windows' graphs; in each window, an account's out-cells are its DiGraph successors
    # split by whether the pair is an edge of that history, its in-cells its predecessors.
    known = KnownPairs.empty()
    history = nx.Graph()
    for actor, target in _windows(3):
        snapshot = Snapshot.from_events(actor, target)
        counts = tie_counts(snapshot, known)
        graph = nx.DiGraph(list(zip(actor, target, strict=True)))
        for row, node in enumerate(snapshot.nodes):
            out = set(graph.successors(node))
            into = set(graph.predecessors(node))
            seen = set(history.neighbors(node)) if node in history else set()
            expected = [len(out & seen), len(out - seen), len(into & seen), len(into - seen)]
            assert counts.cells[row].tolist() == expected
            assert counts.counterparts[row] == len(out | into)
            assert counts.new_counterparts[row] == len((out | into) - seen)
        new_edges = {frozenset(e) for e in graph.to_undirected().edges()} - {
            frozenset(e) for e in history.edges()
        }
        assert len(counts.new_pairs) == len(new_edges)
        known = known.with_keys(counts.new_pairs)
        history.add_edges_from(graph.to_undirected().edges())


def test_a_counterpart_from_several_windows_ago_is_known():
    first = Snapshot.from_events(["a"], ["b"])
    known = KnownPairs.from_parts([tie_counts(first, KnownPairs.empty()).new_pairs])
    # two windows without the pair in between change nothing: the history keeps it
    later = Snapshot.from_events(["b", "c"], ["a", "a"])
    counts = tie_counts(later, known)
    row = {str(n): i for i, n in enumerate(later.nodes)}
    assert counts.cells[row["a"]].tolist() == [0, 0, 1, 1]  # b known, c new
    assert counts.new_counterparts[row["a"]] == 1
