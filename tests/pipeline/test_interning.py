"""Interned account ids and the one-sort distinct values give what the plain numpy paths
give: numpy's own ``unique`` and ``Snapshot.from_events`` are the references."""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.engine.snapshot import Snapshot
from rolewatch.engine.sorting import unique_sorted
from rolewatch.pipeline.loading import interned


@pytest.mark.parametrize("dtype", [np.int64, np.uint64, np.int32, np.float64])
def test_unique_sorted_is_numpys_unique(dtype):
    rng = np.random.default_rng(7)
    for size in (0, 1, 2, 17, 5000):
        values = rng.integers(0, 40, size).astype(dtype)
        # reference: numpy.unique (sorted distinct values)
        expected = np.unique(values)
        found = unique_sorted(values)
        assert found.dtype == expected.dtype
        np.testing.assert_array_equal(found, expected)


def test_interned_events_build_the_snapshot_from_events_builds():
    rng = np.random.default_rng(3)
    ids = np.array([f"acct-{i}" for i in rng.permutation(300)] + ["é-ü", "Z", "a"], dtype=object)
    actor = ids[rng.integers(0, len(ids), 4000)]
    target = ids[rng.integers(0, len(ids), 4000)]
    keep = actor != target
    actor, target = actor[keep], target[keep]
    weight = rng.lognormal(1.0, 1.0, actor.size)
    events = interned(np.arange(actor.size).astype(str), actor, target, weight)
    np.testing.assert_array_equal(events.actor, actor)
    np.testing.assert_array_equal(events.target, target)
    # positions, not ids, per event: four bytes each below 2**31 accounts
    assert events.actor_index.dtype == events.target_index.dtype == np.int32
    assert events.account_count() == len(set(actor) | set(target))
    built = events.snapshot()
    reference = Snapshot.from_events(actor.astype(str), target.astype(str), weight)
    np.testing.assert_array_equal(built.nodes, reference.nodes)
    assert (built.counts != reference.counts).nnz == 0
    assert (built.weights != reference.weights).nnz == 0
    # index_of agrees with a plain dictionary of the node order
    position = {node: i for i, node in enumerate(reference.nodes.tolist())}
    asked = np.concatenate([actor[:50], np.array(["nobody", "acct-x"], dtype=object)])
    np.testing.assert_array_equal(
        built.index_of(asked), [position.get(str(a), -1) for a in asked.tolist()]
    )


def test_one_long_id_does_not_widen_every_account_row():
    # ids of every length up to the store's limit and across scripts; reference order:
    # Python's own sorted() of str (code point order)
    names = ["x" * 200, "a-1", "é" * 150, "Z", "a-10", "ü-ß", "a-2", "\U0001f600"]
    actor = np.array(names, dtype=object)
    target = np.array(names[1:] + names[:1], dtype=object)
    events = interned(np.arange(len(names)).astype(str), actor, target, np.ones(len(names)))
    assert events.accounts.tolist() == sorted(names)
    snapshot = events.snapshot()
    # one reference per account (8 bytes), not 4 bytes per character of the longest id
    for ids in (events.accounts, snapshot.nodes):
        assert ids.dtype == object and ids.nbytes == 8 * len(names)
    np.testing.assert_array_equal(snapshot.index_of(actor), [sorted(names).index(a) for a in names])


def test_ids_that_are_not_text_are_interned_as_their_text():
    events = interned(np.array(["e1", "e2"], dtype=object), [10, 9], [9, 100], [1.0, 2.0])
    # reference: Python's sorted() of the ids written as str
    assert events.accounts.tolist() == sorted(["10", "9", "100"])
    assert events.actor.tolist() == ["10", "9"] and events.target.tolist() == ["9", "100"]


def test_from_interned_refuses_what_from_events_refuses():
    nodes = np.array(["a", "b", "c"])
    with pytest.raises(ValueError, match="actor == target"):
        Snapshot.from_interned(nodes, [0, 1], [1, 1])
    with pytest.raises(ValueError, match="sorted and distinct"):
        Snapshot.from_interned(np.array(["b", "a"]), [0], [1])
    with pytest.raises(ValueError, match="outside nodes"):
        Snapshot.from_interned(nodes, [0], [3])
    with pytest.raises(ValueError, match="finite"):
        Snapshot.from_interned(nodes, [0], [1], [np.nan])


def test_stored_mixtures_become_the_row_major_matrix_a_row_by_row_fill_gives():
    from rolewatch.store.memberships import mixture_matrix

    mixtures = [{"2": 0.25, "0": 0.75}, {}, {"1": 1.0, "9": 0.5}, {"0": 0.1, "1": 0.2, "2": 0.7}]
    role_ids = ["0", "1", "2"]
    expected = np.zeros((len(mixtures), len(role_ids)))  # reference: a plain loop
    for row, shares in enumerate(mixtures):
        for role_id, weight in shares.items():
            if role_id in role_ids:
                expected[row, role_ids.index(role_id)] = weight
    found = mixture_matrix(mixtures, role_ids)
    np.testing.assert_array_equal(found, expected)
    # row sums must add in the same order as for any other row-major matrix
    assert found.flags.c_contiguous


def test_interning_in_storage_order_then_sorting_gives_the_sorted_events():
    # reference: the events permuted first, as plain numpy indexing gives them
    rng = np.random.default_rng(11)
    names = np.array([f"m-{i:03d}" for i in range(80)], dtype=object)
    actor = names[rng.integers(0, 80, 2000)]
    target = names[(rng.integers(1, 80, 2000) + rng.integers(0, 80, 2000)) % 80]
    keep = actor != target
    actor, target = actor[keep], target[keep]
    ids = np.array([f"e{i}" for i in range(actor.size)], dtype=object)
    weight = rng.uniform(0.1, 5.0, actor.size)
    order = rng.permutation(actor.size)
    late = interned(ids, actor, target, weight, order=order)
    early = interned(ids[order], actor[order], target[order], weight[order])
    for name in ("event_id", "actor", "target", "weight", "accounts", "actor_index"):
        np.testing.assert_array_equal(getattr(late, name), getattr(early, name))
    np.testing.assert_array_equal(late.actor, actor[order])
