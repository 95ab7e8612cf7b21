"""The known-pair history kept in the Parquet outputs and read on the Dask workers, one key
range each (rolewatch.scale.pair_outputs, rolewatch.scale.ties.ArchivedPairs): the same
history as the store's (rolewatch.store.pairs), the same tie cells and closes as the local
engine's, and a closing process that never reads the history whole.

Key ranges are checked against plain numpy selections of the keys; file layout against
pyarrow's own Parquet metadata. The events are the fictional marketplace sample in
fixtures/sample (invented data).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from rolewatch.engine.pairs import KnownPairs
from rolewatch.engine.ties import tie_counts
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.scale import dispatch, held_pairs, pair_outputs
from rolewatch.scale.graph import build_graph, scatter_events
from rolewatch.scale.pair_outputs import (
    pair_range,
    pair_windows,
    with_window_pairs,
    write_window_pairs,
)
from rolewatch.scale.ties import ArchivedPairs, count_ties
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest, parse_time_us
from rolewatch.store.pairs import known_pair_parts

from .conftest import NOW, sample_events, sample_settings, written
from .helpers import assert_same_closes

ENDS = [1_000, 2_000, 3_000]


def _random_parts(seed: int = 3) -> list[np.ndarray]:
    """Three windows' first-seen pairs: disjoint random 64-bit keys, as the closer makes
    them (each window keeps only pairs no earlier window had)."""
    rng = np.random.default_rng(seed)
    keys = np.unique(rng.integers(0, 2**64 - 1, 30_000, dtype=np.uint64, endpoint=True))
    rng.shuffle(keys)
    return [keys[:5_000], keys[5_000:17_000], keys[17_000:]]


@pytest.fixture()
def archived(tmp_path, monkeypatch):
    monkeypatch.setattr(pair_outputs, "ROW_GROUP", 1_000)  # many row groups per file
    outputs = str(tmp_path / "outputs")
    parts = _random_parts()
    for end, part in zip(ENDS, parts, strict=True):
        assert write_window_pairs(outputs, end, part) == part.size
    return outputs, KnownPairs.from_parts(parts)


def test_each_window_file_is_sorted_in_row_groups_with_statistics(archived, tmp_path):
    outputs, _known = archived
    assert pair_windows(outputs, [*ENDS, 4_000]) == set(ENDS)
    file = pq.ParquetFile(tmp_path / "outputs" / "window_end_us=2000" / "pairs.parquet")
    assert file.schema_arrow.field("pair_key").type == pa.uint64()
    keys = file.read().column("pair_key").to_numpy()
    np.testing.assert_array_equal(keys, np.sort(keys))
    assert file.metadata.num_row_groups == 12
    assert all(
        file.metadata.row_group(i).column(0).statistics.has_min_max
        for i in range(file.metadata.num_row_groups)
    )


@pytest.mark.parametrize(
    ("low", "high"),
    [(0, None), (0, 2**62), (2**62, 2**63 + 12345), (2**64 - 2**60, None), (5, 6)],
)
def test_a_key_range_read_equals_the_plain_selection(archived, low, high):
    outputs, known = archived
    got = pair_range(outputs, ENDS, low, high)
    keys = known.keys
    expected = keys[(keys >= np.uint64(low)) & ((keys < np.uint64(high)) if high else True)]
    np.testing.assert_array_equal(got, expected)
    assert got.dtype == np.uint64


def test_a_file_without_statistics_is_read_whole_and_cut(archived, tmp_path):
    outputs, known = archived
    keys = np.sort(known.keys[:100])
    folder = tmp_path / "outputs" / "window_end_us=9000"
    folder.mkdir()
    table = pa.table({"pair_key": pa.array(keys, pa.uint64())})
    pq.write_table(table, folder / "pairs.parquet", write_statistics=False, row_group_size=10)
    got = pair_range(outputs, [9_000], int(keys[10]), int(keys[50]))
    np.testing.assert_array_equal(got, keys[10:50])


def test_archived_history_on_the_workers_answers_as_the_history_in_memory(dask_cluster, archived):
    outputs, known = archived
    history = ArchivedPairs(dask_cluster, outputs, ENDS)
    ranges = history.ranges_on(dask_cluster, 5)
    assert ranges.ranges == 5
    np.testing.assert_array_equal(
        np.concatenate(dask_cluster.gather(list(ranges.chunks))), known.keys
    )
    rng = np.random.default_rng(11)
    query = np.concatenate(
        [known.keys[rng.integers(0, len(known), 500)], rng.integers(0, 2**63, 500, dtype=np.uint64)]
    )
    np.testing.assert_array_equal(history.contains(query), known.contains(query))
    np.testing.assert_array_equal(history.new_keys(query), known.new_keys(query))
    assert history.ranges_on(dask_cluster, 9) is ranges  # read once, shared
    assert history.contains(np.zeros(0, dtype=np.uint64)).size == 0


def test_a_range_merged_with_newer_windows_equals_the_plain_union(archived):
    outputs, known = archived
    low, high = 2**62, 2**63 + 12345
    older = pair_range(outputs, ENDS[:2], low, high)
    merged = with_window_pairs(older, outputs, ENDS[2:], low, high)
    # reference: numpy's union of the sorted sets, cut to the range
    keys = known.keys
    np.testing.assert_array_equal(merged, keys[(keys >= np.uint64(low)) & (keys < np.uint64(high))])
    # a window merged in twice, and a merge into an empty range, keep each key once
    np.testing.assert_array_equal(with_window_pairs(merged, outputs, ENDS[2:], low, high), merged)
    empty = np.zeros(0, dtype=np.uint64)
    np.testing.assert_array_equal(
        with_window_pairs(empty, outputs, ENDS, low, high), pair_range(outputs, ENDS, low, high)
    )


def _gathered(client, history: ArchivedPairs, ranges: int) -> np.ndarray:
    chunks = history.ranges_on(client, ranges).chunks
    return np.concatenate(client.gather(list(chunks)))


def test_the_next_close_reads_only_the_windows_closed_since(dask_cluster, archived, tmp_path):
    outputs, known = archived
    assert _gathered(dask_cluster, ArchivedPairs(dask_cluster, outputs, ENDS), 4).size == len(known)
    newer = np.random.default_rng(5).integers(0, 2**64 - 1, 3_000, dtype=np.uint64, endpoint=True)
    newer = newer[~known.contains(newer)]
    write_window_pairs(outputs, 4_000, newer)
    # the older windows' files gone: a whole read would fail, the kept ranges need none
    for end in ENDS:
        (tmp_path / "outputs" / f"window_end_us={end}" / "pairs.parquet").unlink()
    history = ArchivedPairs(dask_cluster, outputs, [*ENDS, 4_000])
    expected = known.with_keys(newer)
    # a close with a few more partitions is served by the kept count of ranges
    np.testing.assert_array_equal(_gathered(dask_cluster, history, 6), expected.keys)
    assert history.ranges_on(dask_cluster, 6).ranges == 4
    query = np.concatenate([newer[:100], known.keys[:100], np.arange(100, dtype=np.uint64)])
    np.testing.assert_array_equal(history.contains(query), expected.contains(query))
    held_pairs.forget_held_pairs()


def test_a_history_that_does_not_extend_the_kept_one_is_read_whole(dask_cluster, archived):
    outputs, known = archived
    parts = _random_parts()
    _gathered(dask_cluster, ArchivedPairs(dask_cluster, outputs, ENDS), 4)
    # an older window no longer asked for is not kept in the answer
    later = ArchivedPairs(dask_cluster, outputs, ENDS[1:])
    np.testing.assert_array_equal(
        _gathered(dask_cluster, later, 4), KnownPairs.from_parts(parts[1:]).keys
    )
    # more than twice the kept ranges asked for: read again in the new count
    wider = ArchivedPairs(dask_cluster, outputs, ENDS[1:])
    np.testing.assert_array_equal(
        _gathered(dask_cluster, wider, 9), KnownPairs.from_parts(parts[1:]).keys
    )
    assert wider.ranges_on(dask_cluster, 9).ranges == 9
    # after the cluster lost data the ranges are forgotten: a rewritten file is read again
    later.forget_ranges()
    write_window_pairs(outputs, ENDS[1], parts[1][:10])
    again = ArchivedPairs(dask_cluster, outputs, ENDS[1:])
    np.testing.assert_array_equal(
        _gathered(dask_cluster, again, 4), KnownPairs.from_parts([parts[1][:10], parts[2]]).keys
    )
    held_pairs.forget_held_pairs()


def test_tie_cells_against_the_archived_history_equal_the_local_engine(
    dask_cluster, sample_windows, tmp_path
):
    _model, windows = sample_windows
    outputs = str(tmp_path / "outputs")
    known = KnownPairs.empty()
    for end, events in enumerate(windows[:6], start=1):
        counted = tie_counts(events.snapshot(), known)
        write_window_pairs(outputs, end, counted.new_pairs)
        known = known.with_keys(counted.new_pairs)
    events = windows[6]
    snapshot = events.snapshot()
    actor, target = events.rows_in(snapshot)
    graph = build_graph(
        scatter_events(dask_cluster, actor, target, events.weight, snapshot.n_nodes, 3)
    )
    archived = ArchivedPairs(dask_cluster, outputs, list(range(1, 7)))
    on_cluster = count_ties(graph, snapshot.node_keys, archived).result()
    local = tie_counts(snapshot, known)
    np.testing.assert_array_equal(on_cluster.cells, local.cells)
    np.testing.assert_array_equal(on_cluster.new_counterparts, local.new_counterparts)
    np.testing.assert_array_equal(on_cluster.new_pairs, local.new_pairs)


def _closed(dask_cluster, tmp_path, compute: str, outputs: str | None):
    settings = sample_settings(
        tmp_path / f"{compute}-{bool(outputs)}.db",
        compute=compute,
        dask_scheduler=dask_cluster.scheduler.address,
        dask_partitions=4,
        output_archive=outputs,
    )
    engine = open_store(settings)
    ingest(engine, settings, sample_events(), NOW)
    return engine, settings


def _closed_locally(dask_cluster, tmp_path) -> dict:
    """What the local engine writes for the whole sample: the reference."""
    engine, settings = _closed(dask_cluster, tmp_path, "local", None)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    expected = written(engine)
    engine.dispose()
    return expected


@pytest.mark.slow
def test_a_dask_close_with_outputs_never_reads_the_history_whole(
    dask_cluster, tmp_path, monkeypatch
):
    expected = _closed_locally(dask_cluster, tmp_path)

    outputs = tmp_path / "outputs"
    engine, settings = _closed(dask_cluster, tmp_path, "dask", str(outputs))
    reads: list[int] = []

    def counted_read(connection, *, before_end_us):
        reads.append(before_end_us)
        return known_pair_parts(connection, before_end_us=before_end_us)

    monkeypatch.setattr(dispatch, "known_pair_parts", counted_read)
    summaries = close_due_windows(engine, settings, now_us=NOW, drain=True)
    assert reads == [], "a Dask close with outputs read the history from the store"
    assert sum(not s.training for s in summaries) >= 2
    got = written(engine)
    assert_same_closes(got, expected)
    # every window's file holds the part the store holds for it
    for end, count, blob in got["pairs"]:
        keys = pq.read_table(outputs / f"window_end_us={end}" / "pairs.parquet")
        assert keys.num_rows == count
        np.testing.assert_array_equal(
            keys.column("pair_key").to_numpy(), np.frombuffer(blob, dtype="<u8")
        )
    engine.dispose()


@pytest.mark.slow
def test_earlier_windows_without_their_pairs_file_have_it_written_from_the_store(
    dask_cluster, tmp_path, caplog
):
    expected = _closed_locally(dask_cluster, tmp_path)

    # the first five weeks closed on Dask before output_archive was set, the rest after
    outputs = tmp_path / "outputs"
    common = dict(compute="dask", dask_scheduler=dask_cluster.scheduler.address, dask_partitions=4)
    before = sample_settings(tmp_path / "switched.db", **common)
    after = sample_settings(tmp_path / "switched.db", output_archive=str(outputs), **common)
    ends = [row[0] for row in expected["windows"]]
    events = sample_events()
    early = [event for event in events if parse_time_us(event["time"]) < ends[4]]
    engine = open_store(before)
    ingest(engine, before, early, NOW)
    close_due_windows(engine, before, now_us=NOW, drain=True)
    assert not outputs.exists()
    ingest(engine, after, events[len(early) :], NOW)
    caplog.set_level("INFO", logger="rolewatch.scale")
    close_due_windows(engine, after, now_us=NOW, drain=True)
    assert "wrote the known pairs of earlier windows to the outputs" in caplog.text
    assert pair_windows(str(outputs), ends) == set(ends)
    assert_same_closes(written(engine), expected)
    engine.dispose()
