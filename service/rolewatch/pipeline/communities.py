"""A window's Leiden communities, computed beside its features in a process of their own.

igraph's ``community_leiden`` holds Python's global interpreter lock while it runs (measured
on the ``close-1m`` window: a Python thread beside it ran at about 1 % of its usual speed),
so a thread cannot overlap it with the features, memberships and scores. A child process
can, when the machine has a second core: on ``close-1m`` the communities take about 2 s of
the close on their own. Small graphs are computed in this process, where handing them to
another would cost more than it saves.

The child runs the very same function on the same graph with the same seed, so the labels
are the same whichever process computed them. If the child process cannot be used (it died,
or the platform refuses to start one), the labels are computed here instead.
"""

from __future__ import annotations

import logging
import os
import threading
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from multiprocessing import get_context

import numpy as np
import scipy.sparse as sp

from rolewatch.engine.bridging import leiden_communities

__all__ = ["CommunityJob", "PROCESS_MIN_TIES", "start_communities", "window_communities"]

log = logging.getLogger(__name__)

# Undirected ties (stored entries / 2) from which the communities go to the child process:
# below this Leiden takes well under a second here.
PROCESS_MIN_TIES = 100_000

_pool: ProcessPoolExecutor | None = None
_pool_lock = threading.Lock()


def window_communities(graph: sp.csr_matrix, resolution: float) -> np.ndarray:
    """Community label of every node of the window's undirected tie graph
    (:func:`rolewatch.engine.bridging.undirected_ties`); -1 for all when bridging is off."""
    n = graph.shape[0]
    if resolution <= 0 or n == 0:
        return np.full(n, -1, dtype=np.int64)
    return leiden_communities(graph, resolution=resolution)


class CommunityJob:
    """The communities of one window, being computed; :meth:`result` waits for them."""

    def __init__(self, graph: sp.csr_matrix, resolution: float, future: Future | None) -> None:
        self._graph = graph
        self._resolution = resolution
        self._future = future

    def result(self) -> np.ndarray:
        """The labels (from the child process, or computed here when it failed)."""
        if self._future is not None:
            try:
                return np.asarray(self._future.result(), dtype=np.int64)
            except (BrokenProcessPool, OSError) as error:
                log.warning("community process failed (%s); computing the communities here", error)
                _discard_pool()
        return window_communities(self._graph, self._resolution)


def start_communities(
    graph: sp.csr_matrix, resolution: float, *, min_ties: int = PROCESS_MIN_TIES
) -> CommunityJob:
    """Start computing the window's communities: in the child process when the graph has
    at least ``min_ties`` undirected ties and the machine more than one core, else later,
    in this process, when the result is asked for."""
    ties = graph.nnz // 2
    if resolution <= 0 or ties < min_ties or (os.cpu_count() or 1) < 2:
        return CommunityJob(graph, resolution, None)
    try:
        future = _shared_pool().submit(window_communities, graph, resolution)
    except (BrokenProcessPool, OSError, RuntimeError) as error:
        log.warning("community process unavailable (%s); computing them here", error)
        _discard_pool()
        future = None
    return CommunityJob(graph, resolution, future)


def _shared_pool() -> ProcessPoolExecutor:
    """One child process for the whole service, started on first use ("spawn": a fresh
    interpreter, safe beside the scheduler's and the server's threads)."""
    global _pool
    with _pool_lock:
        if _pool is None:
            _pool = ProcessPoolExecutor(max_workers=1, mp_context=get_context("spawn"))
        return _pool


def _discard_pool() -> None:
    """Forget a broken pool so the next large window starts a new child."""
    global _pool
    with _pool_lock:
        pool, _pool = _pool, None
    if pool is not None:
        pool.shutdown(wait=False, cancel_futures=True)
