"""Partition bounds of a Dask close: contiguous code ranges of about equal work."""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.scale.partitions import balanced_bounds, split_by_range


def _range_loads(load: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    return np.add.reduceat(load, bounds[:-1]) if bounds.size > 1 else np.array([])


@pytest.mark.parametrize(("n", "partitions"), [(10, 3), (1000, 7), (5, 5), (7, 1)])
def test_equal_loads_give_the_ranges_numpy_array_split_gives(n, partitions):
    # Reference: numpy.array_split's sizes (n // p + 1 for the first n % p parts, else n // p)
    # are the most even split of n equal items; balanced ranges hold the same counts, the
    # larger ones last instead of first.
    bounds = balanced_bounds(np.ones(n), partitions)
    sizes = sorted(np.diff(bounds))
    assert sizes == sorted(len(part) for part in np.array_split(np.arange(n), partitions))


def test_a_power_law_load_is_spread_evenly():
    # Codes sorted by activity (as the ids of accounts numbered by signup or popularity
    # are): equal code ranges would give the first range most of the events.
    rng = np.random.default_rng(3)
    n, partitions = 50_000, 8
    popularity = 1.0 / np.arange(1, n + 1) ** 0.9
    ends = rng.multinomial(2_000_000, popularity / popularity.sum())
    load = ends + 1
    bounds = balanced_bounds(load, partitions)
    assert bounds[0] == 0 and bounds[-1] == n and np.all(np.diff(bounds) > 0)
    loads = _range_loads(load, bounds)
    assert loads.sum() == load.sum()
    # No range holds more than its share plus one code's load (the bound's definition).
    assert loads.max() <= load.sum() / partitions + load.max()
    equal = np.linspace(0, n, partitions + 1).astype(np.int64)
    assert _range_loads(load, equal).max() > 0.5 * load.sum()  # what balancing avoids
    assert loads.max() < 0.2 * load.sum()


def test_a_code_heavier_than_a_share_keeps_its_own_range_and_empty_ranges_go():
    load = np.array([1, 1, 100, 1, 1, 1], dtype=np.int64)
    bounds = balanced_bounds(load, 4)
    assert np.all(np.diff(bounds) > 0) and bounds[0] == 0 and bounds[-1] == load.size
    assert len(bounds) - 1 < 4
    owner = np.searchsorted(bounds, 2, side="right") - 1
    assert _range_loads(load, bounds)[owner] >= 100


def test_split_by_range_follows_uneven_bounds():
    bounds = balanced_bounds(np.array([5, 1, 1, 1, 1, 1, 5], dtype=np.int64), 3)
    codes = np.array([6, 0, 3, 2, 6, 1])
    parts = split_by_range(codes, bounds)
    for j, positions in enumerate(parts):
        assert np.all((codes[positions] >= bounds[j]) & (codes[positions] < bounds[j + 1]))
    assert sorted(np.concatenate(parts).tolist()) == list(range(codes.size))
