"""A window's Leiden communities, computed beside its features in a process of their own.

igraph's ``community_leiden`` holds Python's global interpreter lock while it runs (measured
on the ``close-1m`` window: a Python thread beside it ran at about 1 % of its usual speed),
so a thread cannot overlap it with the features, memberships and scores. A child process
can, when the machine has a second core: on ``close-1m`` the communities take about 2 s of
the close on their own. Small graphs are computed in this process, where starting another
would cost more than it saves.

The child is a :class:`rolewatch.helper_process.HelperProcess` running this module
(``python -m rolewatch.pipeline.communities``), started by the first large window and kept
for the next ones (its imports take about 2 s here, which would otherwise count against
every close): each graph goes to it as ``.npy`` arrays and the labels come back the same
way. The child runs the very same function on the same graph with the same seed, so the
labels are the same whichever process computed them; if it fails (it cannot start, it dies,
its answer does not parse) the labels are computed here, and the next large window starts
a new child.
"""

from __future__ import annotations

import io
import logging
import os
import subprocess
import threading
from collections.abc import Callable
from concurrent.futures import Future
from typing import Any

import numpy as np
import numpy.lib.format as npy
import scipy.sparse as sp

from rolewatch.engine.bridging import leiden_communities
from rolewatch.helper_process import HelperProcess, serve

__all__ = [
    "PROCESS_MIN_TIES",
    "CommunityJob",
    "start_communities",
    "window_communities",
]

log = logging.getLogger(__name__)

# Undirected ties (stored entries / 2) from which the communities go to a child process:
# below this Leiden takes well under a second here.
PROCESS_MIN_TIES = 100_000


def window_communities(graph: sp.csr_matrix, resolution: float) -> np.ndarray:
    """Community label of every node of the window's undirected tie graph
    (:func:`rolewatch.engine.bridging.undirected_ties`); -1 for all when bridging is off."""
    n = graph.shape[0]
    if resolution <= 0 or n == 0:
        return np.full(n, -1, dtype=np.int64)
    return leiden_communities(graph, resolution=resolution)


class CommunityJob:
    """The communities of one window, being computed; :meth:`result` waits for them.

    ``graph_of`` gives the graph when the labels are computed in this process (a small
    graph, or the child failed): the graph itself, or a function that builds it again so
    that the job need not keep a large graph while the child works on it.
    """

    def __init__(
        self,
        nodes: int,
        graph_of: Callable[[], sp.csr_matrix],
        resolution: float,
        future: Future | None,
    ) -> None:
        self._nodes = nodes
        self._graph_of = graph_of
        self._resolution = resolution
        self._future = future

    def result(self) -> np.ndarray:
        """The labels (from the child process, or computed here when it failed)."""
        if self._future is not None:
            try:
                labels = np.asarray(self._future.result(), dtype=np.int64)
                if labels.shape == (self._nodes,):
                    return labels
                log.warning(
                    "community process answered %s labels; computing them here", labels.shape
                )
            except (OSError, ValueError, subprocess.SubprocessError) as error:
                log.warning("community process failed (%s); computing them here", error)
        return window_communities(self._graph_of(), self._resolution)


def start_communities(
    graph: sp.csr_matrix,
    resolution: float,
    *,
    min_ties: int = PROCESS_MIN_TIES,
    rebuild: Callable[[], sp.csr_matrix] | None = None,
) -> CommunityJob:
    """Start computing the window's communities: in a child process when the graph has at
    least ``min_ties`` undirected ties and the machine more than one core, else later, in
    this process, when the result is asked for.

    With ``rebuild`` (a function giving the same graph again), a graph sent to the child is
    not kept here: its buffers go once they are written to the child, and should the child
    fail, the graph is built again to compute the labels here.
    """
    nodes = graph.shape[0]
    if resolution <= 0 or graph.nnz // 2 < min_ties or (os.cpu_count() or 1) < 2:
        return CommunityJob(nodes, _holding(graph), resolution, None)
    future: Future = Future()
    payload = _encode(graph, resolution)
    threading.Thread(
        target=_run_child, args=(payload, future), name="rolewatch-communities", daemon=True
    ).start()
    return CommunityJob(nodes, _holding(graph) if rebuild is None else rebuild, resolution, future)


def _holding(graph: sp.csr_matrix) -> Callable[[], sp.csr_matrix]:
    """A ``graph_of`` that keeps the graph itself."""
    return lambda: graph


HELPER = HelperProcess(__name__)


def _run_child(payload: list[Any], future: Future) -> None:
    """Have the child compute ``payload``'s labels and settle ``future`` with them (waiting
    on the child's pipes releases the GIL, so this thread costs the close nothing)."""
    try:
        answer = HELPER.exchange(payload)
        future.set_result(np.load(io.BytesIO(answer), allow_pickle=False))
    except BaseException as error:  # handed to the waiting close, which falls back
        future.set_exception(error)


def _encode(graph: sp.csr_matrix, resolution: float) -> list[Any]:
    """The graph's CSR arrays, its size and the resolution as consecutive ``.npy`` arrays,
    in parts: each array's ``.npy`` header, then a view of the array's own buffer, so the
    request is not a second copy of the graph (the helper empties the list once written,
    which lets the buffers go when nothing else holds the graph)."""
    graph = sp.csr_matrix(graph)
    size = np.array([graph.shape[0], graph.shape[1]], dtype=np.int64)
    parts: list[Any] = []
    for array in (size, np.array([resolution]), graph.data, graph.indices, graph.indptr):
        parts.extend(_npy_parts(np.ascontiguousarray(array)))
    return parts


def _npy_parts(array: np.ndarray) -> list[Any]:
    """``array`` as ``np.save`` writes it: the ``.npy`` header, then the data (a view)."""
    header = io.BytesIO()
    npy.write_array_header_1_0(header, npy.header_data_from_array_1_0(array))
    return [header.getvalue(), array.data.cast("B")]


def _decode(stream: io.BufferedReader | io.BytesIO) -> tuple[sp.csr_matrix, float]:
    header, resolution, data, indices, indptr = (
        np.load(stream, allow_pickle=False) for _ in range(5)
    )
    shape = (int(header[0]), int(header[1]))
    return sp.csr_matrix((data, indices, indptr), shape=shape), float(resolution[0])


def _labels_of(payload: bytes) -> list[bytes]:
    """The child's answer: the labels of the graph in ``payload`` as an ``.npy`` array."""
    graph, resolution = _decode(io.BytesIO(payload))
    buffer = io.BytesIO()
    np.save(buffer, window_communities(graph, resolution), allow_pickle=False)
    return [buffer.getvalue()]


if __name__ == "__main__":
    import igraph  # noqa: F401  (imported before the first graph arrives, not during it)

    serve(_labels_of)
