"""Snapshot construction: sums, node order, and rejection of bad events."""

import numpy as np
import pytest

from rolewatch.engine import Snapshot


def test_duplicates_are_summed_and_nodes_sorted():
    s = Snapshot.from_events(["b", "a", "b", "c"], ["a", "b", "a", "a"], [1.0, 2.0, 3.5, 0.0])
    assert s.nodes.tolist() == ["a", "b", "c"]
    assert s.n_nodes == 3 and s.n_edges == 3
    # b -> a twice: 2 events, weight 1 + 3.5
    assert s.counts[1, 0] == 2 and s.weights[1, 0] == 4.5
    assert s.counts[0, 1] == 1 and s.weights[0, 1] == 2.0
    # an event of weight 0 still makes an edge
    assert s.counts[2, 0] == 1 and s.weights[2, 0] == 0.0
    assert s.counts.dtype == np.float64 and s.weights.dtype == np.float64
    assert (s.counts.indices == s.weights.indices).all()


def test_default_weight_is_one_per_event():
    s = Snapshot.from_events(["a", "a"], ["b", "b"])
    assert s.weights[0, 1] == 2 and s.counts[0, 1] == 2


def test_explicit_node_order_with_isolated_nodes():
    s = Snapshot.from_events(["x"], ["y"], nodes=["z", "y", "x", "w"])
    assert s.nodes.tolist() == ["z", "y", "x", "w"]
    assert s.counts.shape == (4, 4)
    assert s.counts[2, 1] == 1 and s.counts.nnz == 1
    assert s.index_of(["w", "x", "nobody"]).tolist() == [3, 2, -1]


def test_empty_snapshot():
    s = Snapshot.from_events([], [])
    assert s.n_nodes == 0 and s.n_edges == 0 and s.counts.shape == (0, 0)
    assert s.index_of(["a"]).tolist() == [-1]
    isolated = Snapshot.from_events([], [], nodes=["a", "b"])
    assert isolated.n_nodes == 2 and isolated.n_edges == 0


@pytest.mark.parametrize(
    "actor,target,weight,message",
    [
        (["a", "b"], ["b", "b"], None, "actor == target"),
        (["a"], ["b"], [float("nan")], "finite"),
        (["a"], ["b"], [float("inf")], "finite"),
        (["a"], ["b"], [-1.0], ">= 0"),
        (["a", "b"], ["b"], None, "actor has 2 ids but target has 1"),
        (["a"], ["b"], [1.0, 2.0], "one weight per event"),
    ],
)
def test_bad_events_are_rejected_with_a_clear_message(actor, target, weight, message):
    with pytest.raises(ValueError, match=message):
        Snapshot.from_events(actor, target, weight)


def test_event_outside_explicit_nodes_and_duplicate_nodes():
    with pytest.raises(ValueError, match="not in the given nodes"):
        Snapshot.from_events(["a"], ["b"], nodes=["a"])
    with pytest.raises(ValueError, match="twice"):
        Snapshot.from_events(["a"], ["b"], nodes=["a", "b", "a"])


def test_matches_a_plain_dictionary_count():
    # independent check: a dict accumulation over the same random events
    # (common practice, no source)
    rng = np.random.default_rng(3)
    ids = np.array([f"m{i}" for i in range(30)])
    a, t = rng.integers(0, 30, 500), rng.integers(0, 30, 500)
    keep = a != t
    a, t, w = ids[a[keep]], ids[t[keep]], rng.random(keep.sum())
    s = Snapshot.from_events(a, t, w)
    expect_c, expect_w = {}, {}
    for x, y, z in zip(a.tolist(), t.tolist(), w.tolist(), strict=True):
        expect_c[(x, y)] = expect_c.get((x, y), 0) + 1
        expect_w[(x, y)] = expect_w.get((x, y), 0.0) + z
    coo = s.counts.tocoo()
    got = {(s.nodes[i], s.nodes[j]): v for i, j, v in zip(coo.row, coo.col, coo.data, strict=True)}
    assert got == expect_c
    for (x, y), v in expect_w.items():
        i, j = s.index_of([x, y])
        assert s.weights[i, j] == pytest.approx(v)
