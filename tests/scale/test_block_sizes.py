"""Dask sees the memory a partition's block holds, so it can count and spill it.

Dask sizes a task's result with ``dask.sizeof.sizeof``; for numpy arrays and scipy CSR
matrices it knows their buffers (the reference here), for any other object it asks
``sys.getsizeof``. A block is a dataclass of such matrices and arrays, so its size must be
theirs summed, not the few dozen bytes of the object itself.
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("distributed")

from dask.sizeof import sizeof  # noqa: E402

from rolewatch.scale.graph_steps import build_block, orient, route_events  # noqa: E402


def _block():
    rng = np.random.default_rng(4)
    n = 2_000
    actor = rng.integers(0, n, 20_000).astype(np.int32)
    target = rng.integers(0, n, 20_000).astype(np.int32)
    keep = actor != target
    chunk = (actor[keep], target[keep], rng.gamma(2.0, 5.0, keep.sum()))
    bounds = np.array([0, 700, n])
    routed = route_events(chunk, bounds)
    return build_block(0, 700, n, routed[0])[0]


def test_block_size_is_the_size_of_its_matrices_and_columns():
    block = _block()
    parts = [block.need, block.out, block.inn, block.all, block.mutual]
    parts += list(block.columns.values())
    held = sum(sizeof(part) for part in parts)  # Dask's own sizes of arrays and CSR matrices
    assert held > 100_000
    assert abs(sizeof(block) - held) <= 4_096  # the buffers, give or take object headers


def test_oriented_block_size_counts_its_upper_arcs():
    block = _block()
    degrees = np.ones((block.need.size, 3))
    oriented = orient(block, degrees)
    parts = [oriented.need, oriented.need_degree, oriented.upper, *oriented.sums]
    held = sum(sizeof(part) for part in parts)
    assert abs(sizeof(oriented) - held) <= 4_096
