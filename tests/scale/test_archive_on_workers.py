"""A window's events read from the archive by the Dask workers give what the closing
process reads itself: the same events kept (each id once, by the archive's and the store's
rule), the same snapshot, the same close (memberships, scores, alerts) and the same sample
events in the evidence. The reference is the closing process's own read
(:func:`rolewatch.scale.source.window_events`) and a close of the same events from the
store alone with ``compute = "local"``.

Events: the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import sqlalchemy as sa

from rolewatch.scale import source as event_source
from rolewatch.scale.archive import window_paths
from rolewatch.scale.archive_events import (
    READ_ROWS,
    WorkerEvents,
    file_parts,
    read_on_workers,
    stored_table,
)
from rolewatch.store.db import open_store
from rolewatch.store.event_times import timed_events_between
from rolewatch.store.events import ingest, parse_time_us
from rolewatch.store.schema import alerts

from .conftest import NOW, sample_events, sample_settings, write_archive, written
from .helpers import assert_same_closes

WEEK_US = 7 * 86_400 * 1_000_000
ROWS_PER_GROUP = 40  # small row groups, so a file's rows can be read in several parts


def _moved(event: dict, **changes) -> dict:
    return {**event, **changes}


def _conflicting(every: list[dict]) -> tuple[list[list[dict]], list[dict]]:
    """Archive files and store events that hold some ids more than once, with other
    contents: which row is kept decides the window's graph."""
    first, second, third = every[::3], every[1::3], every[2::3]
    # an id again in a later file: the same content (kept once) ...
    later = [dict(e) for e in first[:150:3]]
    # ... and with another target, later in time (the earlier row wins) ...
    retimed = [
        _moved(e, target=every[(i + 7) % len(every)]["actor"], time=_later(e["time"], 60))
        for i, e in enumerate(second[:120:4])
    ]
    retimed = [e for e in retimed if e["target"] != e["actor"]]
    # ... and with another weight at the same time (the earlier file wins)
    reweighted = [_moved(e, weight=float(e.get("weight", 1.0)) + 5.0) for e in first[300:360:5]]
    # ... and at the same time in the same file, rows later: at the start of a later row
    # group than their first rows, near its end (the earlier row wins: a file read in
    # several parts must number its rows across them, not within each part)
    twins = [_moved(e, weight=float(e.get("weight", 1.0)) + 7.0) for e in first[31:40:2]]
    at = 2 * ROWS_PER_GROUP
    files = [first[:at] + twins + first[at:], second + later, reweighted + retimed]
    # the store: the third share, some archived ids again (the archive's row wins at equal
    # times) and one archived id earlier in time (the store's earlier row wins)
    earlier = [_moved(second[500], time=_later(second[500]["time"], -30), weight=99.0)]
    store = third + [_moved(e, weight=42.0) for e in first[30:90:6]] + earlier
    return files, store


def _later(text: str, seconds: int) -> str:
    from rolewatch.clock import to_rfc3339

    return to_rfc3339(parse_time_us(text) + seconds * 1_000_000)


def _setup(tmp_path, name: str, files, store, **settings):
    """A store of its own with ``store``'s events, reading the archive of ``files`` (written
    once per test: of an id twice at equal times the file whose path sorts first wins, and
    each write names its file at random)."""
    archive = str(tmp_path / "archive")
    if not (tmp_path / "archive").exists():
        for events in files:
            write_archive(archive, events, WEEK_US, rows_per_group=ROWS_PER_GROUP)
    config = sample_settings(
        tmp_path / f"{name}.db", event_source="archive", event_archive=archive, **settings
    )
    engine = open_store(config)
    ingest(engine, config, store, NOW)
    return engine, config


def _kept_on_workers(client, events: WorkerEvents) -> set[tuple]:
    """(id, actor, target, weight) of every event the workers kept."""
    kept = set()
    for chunk, samples in zip(
        client.gather(list(events.chunks.futures)), client.gather(list(events.samples)), strict=True
    ):
        actor, target, weight = chunk
        ids = samples.column("id").to_pylist()
        assert samples.num_rows == len(actor)
        for i, a, t, w in zip(ids, actor.tolist(), target.tolist(), weight.tolist(), strict=True):
            kept.add((i, events.accounts[a], events.accounts[t], w))
    return kept


def _windows(engine, config):
    """Each week of the sample: ``(start_us, end_us, the closing process's own read, the
    store's events as the workers get them, the archive's files)``."""
    times = [parse_time_us(e["time"]) for e in sample_events()]
    first_end = (min(times) // WEEK_US + 1) * WEEK_US
    for end_us in range(first_end, max(times) + WEEK_US, WEEK_US):
        start_us = end_us - WEEK_US
        with engine.connect() as connection:
            here = event_source.window_events(connection, config, start_us, end_us)
            stored = stored_table(timed_events_between(connection, start_us, end_us))
        paths = window_paths(config.event_archive, start_us, end_us)
        yield start_us, end_us, here, stored, paths


def test_the_workers_keep_the_events_the_closing_process_keeps(dask_cluster, tmp_path):
    files, store = _conflicting(sample_events())
    engine, config = _setup(tmp_path, "read", files, store)
    assert sum(1 for _ in (tmp_path / "archive").rglob("*.parquet")) >= 3
    checked = files_split = 0
    try:
        for start_us, end_us, here, stored, paths in _windows(engine, config):
            split = file_parts(config.event_archive, paths, read_rows=ROWS_PER_GROUP)
            files_split += len(split) > len(paths)
            # one part per file and one bucket; each row group a part, 3 buckets
            for buckets, read_rows in ((1, READ_ROWS), (3, ROWS_PER_GROUP)):
                there = read_on_workers(
                    dask_cluster,
                    config.event_archive,
                    paths,
                    stored,
                    start_us,
                    end_us,
                    lambda n: 4,
                    buckets,
                    read_rows,
                )
                assert len(there) == len(here)
                assert there.from_store == event_source.stored_part(here)
                expected = {
                    (str(i), a, t, float(w))
                    for i, a, t, w in zip(
                        here.event_id, here.actor, here.target, here.weight, strict=True
                    )
                }
                assert _kept_on_workers(dask_cluster, there) == expected
                local = here.snapshot()
                window = there.snapshot()
                assert list(window.nodes) == list(local.nodes)
                assert (window.counts != local.counts).nnz == 0
                np.testing.assert_array_equal(window.weights.indices, local.weights.indices)
                np.testing.assert_array_equal(window.weights.indptr, local.weights.indptr)
                np.testing.assert_allclose(window.weights.data, local.weights.data, rtol=1e-12)
                # the evidence's samples, against the closing process's own search
                from rolewatch.pipeline.evidence import _sample_event_ids

                rows = np.arange(0, local.n_nodes, 7)
                assert there.sample_event_ids(rows, 5) == _sample_event_ids(local, here, rows, 5)
                checked += 1
    finally:
        engine.dispose()
    assert checked >= 8
    assert files_split >= 3, "windows whose files were read in several parts"


def test_a_window_read_again_gathers_only_the_arcs_of_the_accounts_asked_for(
    dask_cluster, tmp_path
):
    """An earlier window read again for the evidence leaves its arcs on the workers: the
    snapshot around some accounts holds exactly their arcs, both ways, as the whole
    snapshot has them (reference: networkx's multigraph of the kept events counts each
    account's events out and in), and the whole snapshot still comes when asked for."""
    import networkx as nx

    files, store = _conflicting(sample_events())
    engine, config = _setup(tmp_path, "again", files, store)
    checked = 0
    try:
        for start_us, end_us, here, stored, paths in _windows(engine, config):
            if len(here) < 50:
                continue
            there = read_on_workers(
                dask_cluster,
                config.event_archive,
                paths,
                stored,
                start_us,
                end_us,
                lambda n: 3,
                2,
                ROWS_PER_GROUP,
                whole_snapshot=False,
            )
            assert there.window is None  # nothing gathered by the read
            local = here.snapshot()
            asked = np.asarray([*local.nodes[::5], "not-in-this-window"], dtype=object)
            around = there.snapshot_around(asked)
            assert list(around.nodes) == list(local.nodes)
            rows = np.arange(0, local.n_nodes, 5)
            touching = np.zeros(local.n_nodes, dtype=bool)
            touching[rows] = True
            coo = local.counts.tocoo()
            expected = touching[coo.row] | touching[coo.col]
            assert around.counts.nnz == int(expected.sum())
            # counts exact; weights summed on the workers in another order (1e-12)
            for matrix, full, rtol in (
                (around.counts, local.counts, 0.0),
                (around.weights, local.weights, 1e-12),
            ):
                assert matrix.has_sorted_indices
                for mine, theirs in ((matrix[rows], full[rows]), (matrix[:, rows], full[:, rows])):
                    np.testing.assert_allclose(mine.toarray(), theirs.toarray(), rtol=rtol)
            graph = nx.MultiDiGraph()
            graph.add_edges_from(zip(here.actor, here.target, strict=True))
            for row in rows[:20]:
                account = local.nodes[row]
                assert around.counts[row].sum() == graph.out_degree(account)
                assert around.counts[:, row].sum() == graph.in_degree(account)
            whole = there.snapshot()
            assert (whole.counts != local.counts).nnz == 0
            checked += 1
    finally:
        engine.dispose()
    assert checked >= 3


def _evidence(engine) -> dict[tuple, dict]:
    with engine.connect() as connection:
        rows = connection.execute(
            sa.select(alerts.c.window_end_us, alerts.c.account, alerts.c.evidence)
        ).all()
    return {(end, account): json.loads(text) for end, account, text in rows}


def _same(ours, theirs, where: str = "evidence") -> None:
    """Equal, numbers within 1e-9 relative (sums that may add in another order)."""
    if isinstance(ours, dict):
        assert isinstance(theirs, dict) and ours.keys() == theirs.keys(), where
        for key in ours:
            _same(ours[key], theirs[key], f"{where}.{key}")
    elif isinstance(ours, list):
        assert isinstance(theirs, list) and len(ours) == len(theirs), where
        for i, (a, b) in enumerate(zip(ours, theirs, strict=True)):
            _same(a, b, f"{where}[{i}]")
    elif isinstance(ours, float) and not isinstance(theirs, str):
        assert ours == pytest.approx(theirs, rel=1e-9, abs=1e-12), where
    else:
        assert ours == theirs, where


@pytest.mark.slow
def test_a_close_read_on_the_workers_writes_what_the_store_alone_writes(
    dask_cluster, tmp_path, monkeypatch
):
    files, store = _conflicting(sample_events())
    # the reference: the events each close keeps, from the store alone, closed locally
    reference_engine, reference = _setup(tmp_path, "reference", files, store)
    with reference_engine.connect() as connection:
        kept = []
        span = event_source.stream_state(connection, reference)
        start = (span.min_event_us // WEEK_US) * WEEK_US
        for end_us in range(start + WEEK_US, span.max_event_us + WEEK_US, WEEK_US):
            events = event_source.window_events(connection, reference, end_us - WEEK_US, end_us)
            kept += [
                {"id": str(i), "time": None, "actor": a, "target": t, "weight": float(w)}
                for i, a, t, w in zip(
                    events.event_id, events.actor, events.target, events.weight, strict=True
                )
            ]
    reference_engine.dispose()
    times = {e["id"]: e["time"] for e in sample_events()}
    for e in store:
        times[e["id"]] = min(times.get(e["id"], e["time"]), e["time"], key=parse_time_us)
    for group in files:
        for e in group:
            times[e["id"]] = min(times[e["id"]], e["time"], key=parse_time_us)
    alone = sample_settings(tmp_path / "alone.db")
    engine = open_store(alone)
    ingest(engine, alone, [{**e, "time": times[e["id"]]} for e in kept], NOW)
    from rolewatch.pipeline.closer import close_due_windows

    close_due_windows(engine, alone, now_us=NOW, drain=True)
    expected, expected_evidence = written(engine), _evidence(engine)
    engine.dispose()

    read = []
    on_workers = event_source.read_on_cluster

    def counted(*args, **kwargs):
        found = on_workers(*args, **kwargs)
        read.append(found)
        return found

    monkeypatch.setattr(event_source, "read_on_cluster", counted)
    # keep no window's features between closes: every "before" is measured again, its
    # window read on the workers too
    from rolewatch.pipeline import closer
    from rolewatch.pipeline.recent import RecentFeatures

    monkeypatch.setattr(closer, "_recent_features", lambda engine: RecentFeatures(max_bytes=0))
    engine, config = _setup(
        tmp_path,
        "dask",
        files,
        store,
        compute="dask",
        dask_scheduler=dask_cluster.scheduler.address,
        dask_partitions=4,
    )
    closed = close_due_windows(engine, config, now_us=NOW, drain=True)
    got, got_evidence = written(engine), _evidence(engine)
    engine.dispose()
    assert expected["alerts"], "the sample raises alerts after training"
    assert_same_closes(got, expected)
    # the whole evidence: sample events, counterparts, features before and after
    assert got_evidence.keys() == expected_evidence.keys()
    # the models are the same but for their versions (the training's sums ran in another
    # order on the cluster; assert_same_closes compared them)
    version = {got["model"][1]["version"]: expected["model"][1]["version"]}
    for key, evidence in got_evidence.items():
        evidence = {**evidence, "basis_version": version[evidence["basis_version"]]}
        _same(evidence, expected_evidence[key])
    assert any(e["sample_event_ids"] for e in got_evidence.values())
    assert any(e.get("feature_moves") for e in got_evidence.values())
    # every measured window was read by the workers (training windows are read here), and
    # so were the baseline windows the evidence measured again
    measured = [summary for summary in closed if not summary.training]
    assert measured and len(read) > len(measured)
    assert all(isinstance(found, WorkerEvents) for found in read)


def test_with_the_closer_as_reader_the_closing_process_reads_the_archive(dask_cluster, tmp_path):
    from rolewatch.scale.dispatch import measure_for

    files, store = _conflicting(sample_events())
    engine, config = _setup(
        tmp_path,
        "closer",
        files,
        store,
        compute="dask",
        dask_scheduler=dask_cluster.scheduler.address,
        archive_reader="closer",
    )
    try:
        measure = measure_for(config)
        with engine.connect() as connection:
            start, end = 0, 2**62
            assert event_source.read_on_cluster(connection, config, measure, start, end) is None
            on_workers = config.model_copy(update={"archive_reader": "workers"})
            found = event_source.read_on_cluster(connection, on_workers, measure, start, end)
            assert isinstance(found, WorkerEvents) and len(found) == len(
                event_source.window_events(connection, config, start, end)
            )
    finally:
        engine.dispose()


def test_a_files_parts_are_its_row_groups_in_order_within_the_row_limit(tmp_path):
    # Against the file's own footer as pyarrow reads it: every row group in exactly one
    # part, in order, each part's first row the rows of the groups before it.
    import pyarrow.parquet as pq

    archive = str(tmp_path / "archive")
    write_archive(archive, sample_events(), WEEK_US, rows_per_group=ROWS_PER_GROUP)
    paths = sorted(str(p) for p in (tmp_path / "archive").rglob("*.parquet"))
    parts = file_parts(archive, paths, read_rows=100)
    for rank, path in enumerate(paths):
        sizes = [
            pq.ParquetFile(path).metadata.row_group(g).num_rows
            for g in range(pq.ParquetFile(path).metadata.num_row_groups)
        ]
        mine = [part for part in parts if part.path == path]
        assert all(part.rank == rank for part in mine)
        assert [g for part in mine for g in part.row_groups] == list(range(len(sizes)))
        for part in mine:
            assert part.rows == sum(sizes[g] for g in part.row_groups)
            assert part.first_row == sum(sizes[: part.row_groups[0]])
            assert part.rows <= 100 or len(part.row_groups) == 1
    assert len(parts) > len(paths)
    # a limit below one row group: each group is a part of its own
    assert len(file_parts(archive, paths, read_rows=1)) == sum(
        pq.ParquetFile(p).metadata.num_row_groups for p in paths
    )


def test_the_bucket_count_follows_the_window_between_its_bounds():
    # At least two buckets a worker, about one per BUCKET_EVENTS events, at most
    # MAX_BUCKETS (the rule's own numbers; the sizes behind them are in the module).
    from rolewatch.scale.archive_events import BUCKET_EVENTS, MAX_BUCKETS, bucket_count

    assert bucket_count(0, 2) == 4
    assert bucket_count(10 * BUCKET_EVENTS, 2) == 10
    assert bucket_count(10 * BUCKET_EVENTS + 1, 2) == 11
    assert bucket_count(30 * BUCKET_EVENTS, 0) == 30
    assert bucket_count(10**12, 8) == MAX_BUCKETS
