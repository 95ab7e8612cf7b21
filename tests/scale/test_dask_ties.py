"""Tie cells counted on the Dask cluster (rolewatch.scale.ties) equal the local engine's
(rolewatch.engine.ties.tie_counts) and the plain definition read off a networkx graph, with
the known-pair history split into key ranges across the workers.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest

from rolewatch.engine.pairs import KnownPairs, account_keys, pair_keys
from rolewatch.engine.ties import tie_counts
from rolewatch.pipeline import compute
from rolewatch.pipeline.compute import compute_window
from rolewatch.scale.dispatch import DaskMeasure
from rolewatch.scale.graph import build_graph, scatter_events
from rolewatch.scale.ties import count_ties, known_ranges
from rolewatch.store.alerts import WindowRef

from .conftest import sample_settings


def _history_before(windows, index: int) -> KnownPairs:
    """Every pair of the windows before ``index``, as the closer accumulates it."""
    known = KnownPairs.empty()
    for events in windows[:index]:
        known = known.with_keys(tie_counts(events.snapshot(), known).new_pairs)
    return known


def _on_cluster(client, events, known: KnownPairs, partitions: int):
    snapshot = events.snapshot()
    actor, target = events.rows_in(snapshot)
    graph = build_graph(
        scatter_events(client, actor, target, events.weight, snapshot.n_nodes, partitions)
    )
    return snapshot, count_ties(graph, snapshot.node_keys, known).result()


@pytest.mark.parametrize("partitions", [1, 3, 8])
@pytest.mark.parametrize("index", [0, 5, 7])
def test_tie_cells_on_partitions_equal_the_local_engine(
    dask_cluster, sample_windows, partitions, index
):
    _model, windows = sample_windows
    known = _history_before(windows, index)  # empty before the first window
    snapshot, counted = _on_cluster(dask_cluster, windows[index], known, partitions)
    local = tie_counts(snapshot, known)
    np.testing.assert_array_equal(counted.cells, local.cells)
    np.testing.assert_array_equal(counted.counterparts, local.counterparts)
    np.testing.assert_array_equal(counted.new_counterparts, local.new_counterparts)
    np.testing.assert_array_equal(counted.new_pairs, local.new_pairs)
    assert counted.cells.dtype == np.int64 and counted.new_pairs.dtype == np.uint64
    if index:
        assert local.cells[:, [0, 2]].sum() > 0, "some ties are known after the first window"


def test_tie_cells_on_partitions_follow_the_plain_definition(dask_cluster, sample_windows):
    _model, windows = sample_windows
    index = 6
    before = [
        (a, b)
        for events in windows[:index]
        for a, b in zip(events.actor, events.target, strict=True)
    ]
    known_plain = {frozenset(pair) for pair in before}
    known = KnownPairs.from_parts(
        [pair_keys(account_keys([a for a, _ in before]), account_keys([b for _, b in before]))]
    )
    snapshot, counted = _on_cluster(dask_cluster, windows[index], known, 4)
    # the cells by their definition (rolewatch.engine.ties), read off a networkx DiGraph
    graph = nx.DiGraph(zip(windows[index].actor, windows[index].target, strict=True))
    expected = []
    for account in snapshot.nodes:
        sent, received = set(graph.successors(account)), set(graph.predecessors(account))
        known_to = {
            other for other in sent | received if frozenset((account, other)) in known_plain
        }
        expected.append(
            (
                len(sent & known_to),
                len(sent - known_to),
                len(received & known_to),
                len(received - known_to),
                len(sent | received),
                len((sent | received) - known_to),
            )
        )
    got = np.column_stack([counted.cells, counted.counterparts, counted.new_counterparts])
    np.testing.assert_array_equal(got, np.array(expected))
    new_plain = {frozenset(edge) for edge in graph.edges} - known_plain
    firsts, seconds = zip(*(sorted(pair) for pair in new_plain), strict=True)
    expected_keys = np.sort(pair_keys(account_keys(list(firsts)), account_keys(list(seconds))))
    np.testing.assert_array_equal(counted.new_pairs, expected_keys)


def test_the_known_history_is_split_into_ranges_of_its_keys(dask_cluster):
    keys = np.sort(np.random.default_rng(7).integers(0, 2**63, 1_000, dtype=np.uint64))
    known = KnownPairs(np.unique(keys))
    ranges = known_ranges(dask_cluster, known, 6)
    chunks = dask_cluster.gather(list(ranges.chunks))
    assert ranges.ranges == 6
    np.testing.assert_array_equal(np.concatenate(chunks), known.keys)  # each key once, in order
    for k, chunk in enumerate(chunks):
        assert 150 <= chunk.size <= 190  # about equal sizes
        if k:
            assert chunk[0] == ranges.starts[k - 1]
        if k < len(chunks) - 1:
            assert chunk[-1] < ranges.starts[k]
    # more ranges than keys, and an empty history: one range each key at most
    assert known_ranges(dask_cluster, KnownPairs(known.keys[:2]), 6).ranges == 2
    assert known_ranges(dask_cluster, KnownPairs.empty(), 6).ranges == 1


def test_a_dask_close_counts_its_ties_on_the_cluster(
    dask_cluster, sample_windows, tmp_path, monkeypatch
):
    model, windows = sample_windows
    settings = sample_settings(tmp_path / "unused.db")
    index = 6
    known = _history_before(windows, index)
    window = WindowRef(id=None, start="2026-01-01T00:00:00Z", end="2026-01-08T00:00:00Z")

    def closed(measure):
        return compute_window(
            model,
            settings,
            windows[index],
            [],
            known,
            window=window,
            raise_alerts=False,
            measure=measure,
        )

    local = closed(compute.measure_locally)

    def not_here(*_args, **_kwargs):
        raise AssertionError("the tie cells were counted in the closing process")

    monkeypatch.setattr(compute, "tie_counts", not_here)
    on_dask = closed(DaskMeasure(dask_cluster, partitions=4))
    np.testing.assert_array_equal(on_dask.ties, local.ties)
    np.testing.assert_array_equal(on_dask.new_pairs, local.new_pairs)
    np.testing.assert_array_equal(on_dask.activity.counterparts, local.activity.counterparts)
    np.testing.assert_array_equal(
        on_dask.activity.new_counterparts, local.activity.new_counterparts
    )
    np.testing.assert_array_equal(on_dask.activity.events_out, local.activity.events_out)
    np.testing.assert_array_equal(on_dask.score, local.score)
