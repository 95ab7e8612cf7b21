"""compute = "dask" gives the local engine's answers: the same features (integer-valued
ones exactly, the others within 1e-9 relative), memberships (1e-9), stored scores and alert
set, on a local Dask cluster of two worker processes. Triangles on partitions are checked
against networkx.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import gc
import json
import threading
import time
from dataclasses import replace

import networkx as nx
import numpy as np
import pytest
import sqlalchemy as sa

from rolewatch.pipeline import closer
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.pipeline.compute import measure_locally
from rolewatch.pipeline.loading import PastWindowFacts, interned
from rolewatch.pipeline.recent import RecentFeatures
from rolewatch.scale import dispatch
from rolewatch.scale import features as dask_features
from rolewatch.scale import scoring as dask_scoring
from rolewatch.scale.dispatch import DaskMeasure
from rolewatch.scale.features import (
    SCRATCH_FOLDER,
    FeatureRowsLost,
    ScratchValues,
    WorkerFeatureRows,
)
from rolewatch.scale.graph import build_graph, scatter_events, triangle_table
from rolewatch.scale.training import ClusterColumns
from rolewatch.store.alerts import WindowRef
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest
from rolewatch.store.models import active_model
from rolewatch.store.schema import alerts

from .conftest import NOW, sample_events, sample_settings, written
from .helpers import assert_same_closes, scheduler_transitions

COUNTS = {
    "in_degree",
    "out_degree",
    "degree",
    "in_events",
    "out_events",
    "ego_edges",
    "ego_boundary_edges",
    "ego_arcs_within",
    "ego_arcs_out",
    "ego_arcs_in",
}


def _integer_features(recipe) -> np.ndarray:
    """Features integer by definition: counts, and sums of integer features."""
    integer: dict[str, bool] = {}
    for d in recipe.features:
        if d.parent is None:
            integer[d.name] = d.op in COUNTS
        else:
            integer[d.name] = d.op.startswith("sum_") and integer[d.parent]
    return np.array([integer[name] for name in recipe.names])


@pytest.mark.parametrize(
    ("raw_here_max_bytes", "fetch_bytes"),
    [(None, None), (0, None), (None, 1)],
    ids=["raw-gathered", "raw-on-workers", "one-parent-per-fetch"],
)
def test_features_and_memberships_match_the_local_engine(
    dask_cluster, sample_windows, raw_here_max_bytes, fetch_bytes, monkeypatch
):
    model, windows = sample_windows
    if fetch_bytes is not None:  # every parent column fetched and aggregated on its own
        monkeypatch.setattr(dask_features, "FETCH_BYTES", fetch_bytes)
        assert dask_features.parent_group(10) == 1
    measure = DaskMeasure(dask_cluster, partitions=4, raw_here_max_bytes=raw_here_max_bytes)
    columns = _integer_features(model.recipe)
    assert columns.any() and (~columns).any()
    for events in windows[4:7]:
        snapshot = events.snapshot()
        local_table, local_members = measure_locally(model, snapshot, events)
        dask_table, dask_members = measure(model, snapshot, events)
        if raw_here_max_bytes == 0:  # the raw values and the bins stay with the workers
            assert isinstance(dask_table.raw, WorkerFeatureRows)
            assert isinstance(dask_table.binned, WorkerFeatureRows)
            assert dask_table.raw.shape == local_table.raw.shape
            assert dask_table.binned.shape == local_table.binned.shape
        dask_raw = dask_table.raw[np.arange(snapshot.n_nodes)]
        integral = np.broadcast_to(columns, local_table.raw.shape)
        # integer-valued features (degrees, counts, egonet edges, their sums) exactly
        np.testing.assert_array_equal(dask_raw[integral], local_table.raw[integral])
        np.testing.assert_allclose(
            dask_raw[~integral], local_table.raw[~integral], rtol=1e-9, atol=0
        )
        # a few rows in any order, and one row, read like the in-process table
        rows = np.random.default_rng(0).permutation(snapshot.n_nodes)[:7]
        np.testing.assert_array_equal(dask_table.raw[rows], dask_raw[rows])
        np.testing.assert_array_equal(dask_table.raw[int(rows[0])], dask_raw[rows[0]])
        dask_binned = dask_table.binned[np.arange(snapshot.n_nodes)]
        assert dask_binned.dtype == local_table.binned.dtype
        np.testing.assert_array_equal(dask_binned, local_table.binned)
        np.testing.assert_allclose(dask_members.mixture, local_members.mixture, rtol=0, atol=1e-9)
        np.testing.assert_allclose(dask_members.error, local_members.error, rtol=0, atol=1e-9)
        # the triangles the evidence's clustering reads, counted on the partitions
        assert local_table.triangles is not None
        np.testing.assert_array_equal(dask_table.triangles, local_table.triangles)


def _scratch_files(client) -> int:
    """Feature-value files (raw values, bins) in every worker's scratch folder."""
    return sum(client.run(_count_scratch_files).values())


def _wait_for_scratch_files(client, count: int) -> None:
    deadline = time.monotonic() + 30
    while _scratch_files(client) != count and time.monotonic() < deadline:
        time.sleep(0.2)


def _count_scratch_files(dask_worker) -> int:
    from pathlib import Path

    folder = Path(dask_worker.local_directory) / SCRATCH_FOLDER
    return len(list(folder.glob("*.npy"))) if folder.exists() else 0


def test_raw_values_and_bins_on_workers_are_files_deleted_with_their_table(
    dask_cluster, sample_windows
):
    model, windows = sample_windows
    gc.collect()  # earlier tests' tables
    _wait_for_scratch_files(dask_cluster, 0)
    measure = DaskMeasure(dask_cluster, partitions=4, raw_here_max_bytes=0)
    snapshot = windows[5].snapshot()
    table, _members = measure(model, snapshot, windows[5])
    local_table, _ = measure_locally(model, snapshot, windows[5])
    assert _scratch_files(dask_cluster) > 0
    # the values and the bins came from the files, not from the workers' memory
    pieces = [*table.raw.pieces, *table.binned.pieces]
    assert all(isinstance(s, ScratchValues) for piece in pieces for s in piece)
    np.testing.assert_allclose(table.raw[[3, 1]], local_table.raw[[3, 1]], rtol=1e-9, atol=0)
    np.testing.assert_array_equal(table.binned[[3, 1]], local_table.binned[[3, 1]])
    del table
    gc.collect()
    _wait_for_scratch_files(dask_cluster, 0)
    assert _scratch_files(dask_cluster) == 0


def test_values_dropped_on_the_client_event_loop_thread_are_deleted_without_blocking_it(
    dask_cluster, sample_windows
):
    # The garbage collector may finalise a table on any thread, an event-loop thread
    # included (seen: a kept window let go by a collection during a message decode on the
    # thread running an in-process scheduler, whose finalizer then waited for that
    # scheduler for ever). On the client's own loop thread the wait fails instead, and
    # the files stayed: this test.
    from distributed import Client

    model, windows = sample_windows
    gc.collect()
    _wait_for_scratch_files(dask_cluster, 0)
    own = Client(dask_cluster.scheduler.address, set_as_default=False)  # its own loop thread
    try:
        measure = DaskMeasure(own, partitions=4, raw_here_max_bytes=0)
        held = [measure(model, windows[5].snapshot(), windows[5])[0]]
        assert _scratch_files(dask_cluster) > 0
        dropped, after = threading.Event(), threading.Event()

        def drop() -> None:
            held.clear()  # the last reference: finalised here, on the loop's thread
            dropped.set()

        own.loop.add_callback(drop)
        assert dropped.wait(30)
        own.loop.add_callback(after.set)
        assert after.wait(30), "the client's event loop is blocked"
        _wait_for_scratch_files(dask_cluster, 0)
        assert _scratch_files(dask_cluster) == 0
    finally:
        own.close(timeout=5)


def test_live_workers_are_asked_of_the_scheduler_not_read_from_the_clients_cache(
    dask_cluster, sample_windows, monkeypatch
):
    # distributed's client refreshes a cached copy of the scheduler's identity every 2 s,
    # listing no workers; Client.scheduler_info() refetches it and returns the cache, so a
    # refresh landing in between made live workers look gone: their values unreadable
    # (FeatureRowsLost), their files never deleted (seen on CI). Here every refresh lands last.
    model, windows = sample_windows
    gc.collect()
    _wait_for_scratch_files(dask_cluster, 0)

    async def refreshed_without_workers(n_workers: int = 0) -> None:
        dask_cluster._scheduler_identity = {**dask_cluster._scheduler_identity, "workers": {}}

    monkeypatch.setattr(dask_cluster, "_update_scheduler_info", refreshed_without_workers)
    assert not dask_cluster.scheduler_info().get("workers")
    measure = DaskMeasure(
        dask_cluster, partitions=4, raw_here_max_bytes=0, accounts_per_partition=10
    )
    assert measure.partitions_for(10) == 2  # one partition per worker at least
    table, _members = measure(model, windows[5].snapshot(), windows[5])
    local_table, _ = measure_locally(model, windows[5].snapshot(), windows[5])
    assert table.raw.readable()
    np.testing.assert_allclose(table.raw[[3, 1]], local_table.raw[[3, 1]], rtol=1e-9, atol=0)
    assert _scratch_files(dask_cluster) > 0
    del table
    gc.collect()
    _wait_for_scratch_files(dask_cluster, 0)
    assert _scratch_files(dask_cluster) == 0


def test_reading_values_of_a_worker_that_left_raises_a_clear_error(dask_cluster, sample_windows):
    model, windows = sample_windows
    measure = DaskMeasure(dask_cluster, partitions=4, raw_here_max_bytes=0)
    table, _members = measure(model, windows[5].snapshot(), windows[5])
    raw = table.raw
    gone = [[replace(s, worker="tcp://127.0.0.1:9") for s in piece] for piece in raw.pieces]
    lost = WorkerFeatureRows(dask_cluster, raw.bounds, gone, raw.names)
    with pytest.raises(FeatureRowsLost, match="next tick closes the window again"):
        lost[[0, 1]]


def test_values_left_on_the_workers_are_kept_by_what_this_process_holds(
    dask_cluster, sample_windows
):
    model, windows = sample_windows
    events = windows[5]
    snapshot = events.snapshot()
    table, _members = DaskMeasure(dask_cluster, partitions=4, raw_here_max_bytes=0)(
        model, snapshot, events
    )
    ref = WindowRef(id=6, start="2026-02-01T00:00:00Z", end="2026-02-08T00:00:00Z")
    facts = PastWindowFacts(
        ref=ref, accounts=snapshot.n_nodes, events=int(round(float(snapshot.counts.sum())))
    )
    # room for the snapshot only: the values on the workers' disks cost this process nothing
    recent = RecentFeatures(max_bytes=snapshot.counts.data.nbytes * 3)
    assert table.raw.nbytes > 0
    recent.remember(ref, snapshot, table)
    kept = recent.find(facts, model.recipe.version)
    assert kept is not None and kept[1] is table
    # a writer of the values has left the cluster: not used, and let go
    raw = table.raw
    gone = [[replace(s, worker="tcp://127.0.0.1:9") for s in piece] for piece in raw.pieces]
    lost = replace(table, raw=WorkerFeatureRows(dask_cluster, raw.bounds, gone, raw.names))
    assert not lost.raw.readable()
    recent.remember(ref, snapshot, lost)
    assert recent.find(facts, model.recipe.version) is None
    recent.remember(ref, snapshot, table)  # the same values whole again: found again
    assert recent.find(facts, model.recipe.version) is not None


def test_triangles_on_partitions_match_networkx(dask_cluster, sample_windows):
    _model, windows = sample_windows
    events = windows[5]
    snapshot = events.snapshot()
    actor, target = events.rows_in(snapshot)
    graph = build_graph(
        scatter_events(dask_cluster, actor, target, events.weight, snapshot.n_nodes, 3)
    )
    parts = triangle_table(graph).gather()
    triangles = np.concatenate([part[0] for part in parts])
    opposite_mutual = np.concatenate([part[1] for part in parts])
    counted = dict(zip(snapshot.nodes, zip(triangles, opposite_mutual, strict=True), strict=True))
    directed = nx.DiGraph(zip(events.actor, events.target, strict=True))
    undirected = directed.to_undirected()
    # networkx's per-node triangle count (nx.triangles) is the reference
    expected = {node: count for node, count in nx.triangles(undirected).items() if count}
    got = {node: int(tri) for node, (tri, _) in counted.items() if tri}
    assert got == expected
    # the triangles whose edge opposite the node runs both ways, by networkx adjacency
    for node in list(expected)[:200]:
        neighbours = sorted(undirected[node])
        mutual = sum(
            1
            for i, a in enumerate(neighbours)
            for b in neighbours[i + 1 :]
            if directed.has_edge(a, b) and directed.has_edge(b, a)
        )
        assert counted[node][1] == mutual


def _closed_sample(dask_cluster, tmp_path, compute: str, events: list[dict]):
    """A store of its own with the sample's events, every due window closed with
    ``compute``; the open engine and the closes' summaries."""
    settings = sample_settings(
        tmp_path / f"{compute}.db",
        compute=compute,
        dask_scheduler=dask_cluster.scheduler.address,
        dask_partitions=4,
    )
    engine = open_store(settings)
    ingest(engine, settings, events, NOW)
    return engine, close_due_windows(engine, settings, now_us=NOW, drain=True)


@pytest.mark.slow
def test_closing_on_dask_writes_what_closing_locally_writes(dask_cluster, tmp_path, monkeypatch):
    every = sample_events()
    results = {}
    before = scheduler_transitions(dask_cluster.scheduler.address)
    scored_on_cluster: list[int] = []
    on_cluster = dask_scoring.score_on_cluster

    def counting(client, inputs, policy, partitions):
        scored_on_cluster.append(inputs.mixture.shape[0])
        return on_cluster(client, inputs, policy, partitions)

    monkeypatch.setattr(dask_scoring, "score_on_cluster", counting)
    read_on_cluster: list[int] = []
    at_rows = ClusterColumns.at_rows

    def reading(self, defs):
        read_on_cluster.append(len(defs))
        return at_rows(self, defs)

    monkeypatch.setattr(ClusterColumns, "at_rows", reading)
    summaries = []
    for compute in ("local", "dask"):
        engine, summaries = _closed_sample(dask_cluster, tmp_path, compute, every)
        results[compute] = written(engine)
        engine.dispose()
    assert results["local"]["alerts"], "the sample raises alerts after training"
    assert_same_closes(results["dask"], results["local"])
    # the dask close really ran on the cluster: the training's features (discovery and the
    # basis fit's tables, for each of the 4 training windows) and every window's scores,
    # the training windows' back-fill included
    assert scheduler_transitions(dask_cluster.scheduler.address) > before
    assert any(summary.training for summary in summaries)
    assert summaries and len(scored_on_cluster) == len(summaries)
    assert len(read_on_cluster) >= 2 * 4


def test_a_window_smaller_than_the_partition_count_measures_like_the_local_engine(
    dask_cluster, sample_windows
):
    model, windows = sample_windows
    events = interned(
        np.array(["e1", "e2", "e3", "e4"], dtype=object),
        np.array(["acct-a", "acct-b", "acct-c", "acct-b"], dtype=object),
        np.array(["acct-b", "acct-c", "acct-a", "acct-a"], dtype=object),
        np.array([1.0, 2.0, 3.0, 1.0]),
    )
    snapshot = events.snapshot()
    local_table, local_members = measure_locally(model, snapshot, events)
    dask_table, dask_members = DaskMeasure(dask_cluster, partitions=8)(model, snapshot, events)
    np.testing.assert_allclose(dask_table.raw, local_table.raw, rtol=1e-9, atol=0)
    np.testing.assert_allclose(dask_members.mixture, local_members.mixture, rtol=0, atol=1e-9)


def _alert_evidence(engine) -> list[tuple]:
    """Every alert's evidence, without the window's id and the basis version, checked to be
    the store's active one (a model fitted on the cluster is the local one but for its
    version, docs/scale.md)."""
    with engine.connect() as connection:
        rows = connection.execute(
            sa.select(alerts.c.account, alerts.c.window_end_us, alerts.c.evidence).order_by(
                alerts.c.window_end_us, alerts.c.account
            )
        ).all()
        model = active_model(connection)
    found = []
    for account, end, evidence in rows:
        document = json.loads(evidence)
        document["window"].pop("id")
        assert model is not None and document.pop("basis_version") == model.basis_version
        found.append((account, end, document))
    return found


def test_raw_values_on_the_workers_reject_rows_beyond_the_window(dask_cluster, sample_windows):
    model, windows = sample_windows
    events = windows[4]
    snapshot = events.snapshot()
    table, _ = DaskMeasure(dask_cluster, partitions=3, raw_here_max_bytes=0)(
        model, snapshot, events
    )
    with pytest.raises(IndexError, match="out of range"):
        table.raw[np.array([0, snapshot.n_nodes])]
    np.testing.assert_array_equal(table.raw[-1], table.raw[snapshot.n_nodes - 1])
    assert table.raw[np.array([], dtype=np.int64)].shape == (0, len(model.recipe.names))


@pytest.mark.slow
@pytest.mark.parametrize("raw_on_workers", [False, True], ids=["raw-gathered", "raw-on-workers"])
def test_baseline_windows_measured_on_the_cluster_give_the_local_evidence(
    dask_cluster, tmp_path, monkeypatch, raw_on_workers
):
    # Nothing is kept between closes, so every alert's "before" features are recomputed
    # from the baseline window's events: on the workers for compute = "dask". With the raw
    # values left on the workers, the evidence reads the alerted accounts' rows from there.
    measured: list[int] = []
    left: list[bool] = []
    cluster_measure = DaskMeasure._measure  # the window's own and its baselines' measures

    def counting(self, model, snapshot, events, known):
        measured.append(snapshot.n_nodes)
        table, members, ties = cluster_measure(self, model, snapshot, events, known)
        left.append(isinstance(table.raw, WorkerFeatureRows))
        return table, members, ties

    if raw_on_workers:
        monkeypatch.setattr(dispatch, "RAW_HERE_MAX_BYTES", 0)

    monkeypatch.setattr(DaskMeasure, "_measure", counting)
    monkeypatch.setattr(closer, "_recent_features", lambda _engine: RecentFeatures(max_bytes=0))
    evidence, closed = {}, {}
    for compute in ("local", "dask"):
        engine, summaries = _closed_sample(dask_cluster, tmp_path, compute, sample_events())
        closed[compute] = [s for s in summaries if not s.training]
        evidence[compute] = _alert_evidence(engine)
        engine.dispose()
    assert evidence["local"], "the sample raises alerts after training"
    # more cluster measurements than measured windows: the baselines went there too
    assert len(measured) > len(closed["dask"])
    assert all(left) if raw_on_workers else not any(left)
    assert [row[:2] for row in evidence["dask"]] == [row[:2] for row in evidence["local"]]
    for (_, _, on_dask), (_, _, local) in zip(evidence["dask"], evidence["local"], strict=True):
        assert on_dask["feature_moves"], "alerts show their feature moves"
        _assert_close_documents(on_dask, local)


def _assert_close_documents(ours, theirs) -> None:
    """Equal documents, numbers within 1e-9 relative (the cluster's means and sums may add
    in another order, docs/scale.md)."""
    if isinstance(ours, dict):
        assert ours.keys() == theirs.keys()
        for key in ours:
            _assert_close_documents(ours[key], theirs[key])
    elif isinstance(ours, list):
        assert len(ours) == len(theirs)
        for a, b in zip(ours, theirs, strict=True):
            _assert_close_documents(a, b)
    elif isinstance(ours, float) and not isinstance(theirs, bool):
        assert ours == pytest.approx(theirs, rel=1e-9, abs=1e-12)
    else:
        assert ours == theirs
