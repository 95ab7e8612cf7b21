"""The store's known-pair history placed on the Dask cluster and kept there between closes
(rolewatch.scale.stored_pairs, rolewatch.scale.held_pairs): each close's ranges hold the
same keys as the whole history read from the store (rolewatch.store.pairs), and a later
close reads only the windows closed since.

Keys are random 64-bit integers; the merge is checked against numpy's ``union1d`` and the
ranges against plain numpy selections.
"""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.config import load_settings
from rolewatch.engine.pairs import KnownPairs
from rolewatch.engine.sorting import merged_sorted
from rolewatch.scale import held_pairs, stored_pairs
from rolewatch.scale.stored_pairs import StoredPairs
from rolewatch.store.db import open_store, write_transaction
from rolewatch.store.pairs import insert_window_pairs
from rolewatch.store.schema import pair_history
from rolewatch.store.windows import insert_window

WEEK = 7 * 24 * 3600 * 1_000_000


@pytest.mark.parametrize("sizes", [(1_000, 300), (0, 50), (40, 0), (1, 1)])
def test_merging_sorted_keys_is_numpys_union(sizes):
    rng = np.random.default_rng(sum(sizes))
    keys = np.unique(rng.integers(0, 2**64 - 1, sizes[0], dtype=np.uint64, endpoint=True))
    added = np.unique(rng.integers(0, 2**64 - 1, sizes[1], dtype=np.uint64, endpoint=True))
    added = np.union1d(added, keys[:3])  # a few keys already there
    np.testing.assert_array_equal(merged_sorted(keys, added), np.union1d(keys, added))


def test_a_range_joined_from_its_pieces_is_numpys_unique():
    rng = np.random.default_rng(3)
    pieces = [np.sort(rng.integers(0, 1_000, size, dtype=np.uint64)) for size in (50, 0, 80)]
    pieces = [np.unique(piece) for piece in pieces]  # each window's part: distinct
    np.testing.assert_array_equal(stored_pairs._joined(*pieces), np.unique(np.concatenate(pieces)))
    assert stored_pairs._joined().size == 0


def _parts(count: int, seed: int = 7) -> list[np.ndarray]:
    rng = np.random.default_rng(seed)
    keys = np.unique(rng.integers(0, 2**64 - 1, 6_000 * count, dtype=np.uint64, endpoint=True))
    rng.shuffle(keys)
    return np.array_split(keys, count)


def _add_window(engine, end_us: int, keys: np.ndarray) -> int:
    with write_transaction(engine) as connection:
        window_id = insert_window(
            connection,
            start_us=end_us - WEEK,
            end_us=end_us,
            closed_us=end_us,
            event_count=keys.size,
            training=True,
            measures=None,
        )
        insert_window_pairs(connection, window_id, keys)
    return window_id


@pytest.fixture()
def store(store_url):
    """An empty store on SQLite and on PostgreSQL (each test's own schema)."""
    engine = open_store(load_settings(database_url=store_url))
    held_pairs.forget_held_pairs()
    yield engine
    held_pairs.forget_held_pairs()
    engine.dispose()


def _placed(client, engine, before_end_us: int, count: int = 4) -> tuple[StoredPairs, np.ndarray]:
    with engine.connect() as connection:
        history = StoredPairs.read(connection, client, before_end_us=before_end_us)
    ranges = history.ranges_on(client, count)
    return history, np.concatenate(client.gather(list(ranges.chunks)))


def test_the_first_close_places_the_whole_history_in_key_ranges(dask_cluster, store):
    parts = _parts(3)
    for week, part in enumerate(parts, start=1):
        _add_window(store, week * WEEK, part)
    history, placed = _placed(dask_cluster, store, 4 * WEEK)
    known = KnownPairs.from_parts(parts)
    np.testing.assert_array_equal(placed, known.keys)
    ranges = history.ranges_on(dask_cluster, 4)
    for k, chunk in enumerate(dask_cluster.gather(list(ranges.chunks))):
        low = 0 if k == 0 else int(ranges.starts[k - 1])
        high = None if k == ranges.ranges - 1 else int(ranges.starts[k])
        keys = known.keys
        inside = (keys >= np.uint64(low)) & ((keys < np.uint64(high)) if high else True)
        np.testing.assert_array_equal(chunk, keys[inside])
    query = np.concatenate([parts[1][:200], np.arange(200, dtype=np.uint64)])
    np.testing.assert_array_equal(history.contains(query), known.contains(query))
    # an earlier end: a history the kept one does not extend, read whole
    _history, earlier = _placed(dask_cluster, store, 3 * WEEK)
    np.testing.assert_array_equal(earlier, KnownPairs.from_parts(parts[:2]).keys)


def test_a_later_close_reads_only_the_windows_closed_since(dask_cluster, store, monkeypatch):
    parts = _parts(4)
    for week, part in enumerate(parts[:3], start=1):
        _add_window(store, week * WEEK, part)
    _placed(dask_cluster, store, 4 * WEEK)
    _add_window(store, 4 * WEEK, parts[3])
    read: list[int] = []
    real_read = stored_pairs.window_pair_keys

    def counted_read(connection, *, end_us):
        read.append(end_us)
        return real_read(connection, end_us=end_us)

    monkeypatch.setattr(stored_pairs, "window_pair_keys", counted_read)
    history, placed = _placed(dask_cluster, store, 5 * WEEK, count=5)
    np.testing.assert_array_equal(placed, KnownPairs.from_parts(parts).keys)
    assert history.ranges_on(dask_cluster, 5).ranges == 4  # the kept count serves 5
    assert read == [4 * WEEK]  # the window closed since, alone
    # the cluster lost its ranges: the history is read whole again, from the store
    history.forget_ranges()
    np.testing.assert_array_equal(
        np.concatenate(dask_cluster.gather(list(history.ranges_on(dask_cluster, 4).chunks))),
        KnownPairs.from_parts(parts).keys,
    )
    assert read == [4 * WEEK, *(week * WEEK for week in range(1, 5))]


def test_a_window_whose_part_changed_is_not_taken_for_the_kept_one(dask_cluster, store):
    parts = _parts(3)
    ids = [_add_window(store, week * WEEK, part) for week, part in enumerate(parts, start=1)]
    _placed(dask_cluster, store, 4 * WEEK)
    # the store rebuilt under the same address: the second window's part is another one
    with write_transaction(store) as connection:
        connection.execute(pair_history.delete().where(pair_history.c.window_id == ids[1]))
        insert_window_pairs(connection, ids[1], parts[1][:100])
    _history, placed = _placed(dask_cluster, store, 4 * WEEK)
    expected = KnownPairs.from_parts([parts[0], parts[1][:100], parts[2]])
    np.testing.assert_array_equal(placed, expected.keys)
