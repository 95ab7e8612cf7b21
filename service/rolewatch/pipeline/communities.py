"""A window's Leiden communities, computed beside its features in a process of their own.

igraph's ``community_leiden`` holds Python's global interpreter lock while it runs (measured
on the ``close-1m`` window: a Python thread beside it ran at about 1 % of its usual speed),
so a thread cannot overlap it with the features, memberships and scores. A child process
can, when the machine has a second core: on ``close-1m`` the communities take about 2 s of
the close on their own. Small graphs are computed in this process, where starting another
would cost more than it saves.

The child is a fresh interpreter running this module (``python -m
rolewatch.pipeline.communities``): the graph goes to its standard input and the labels come
back on its standard output, as ``.npy`` arrays. Unlike :mod:`multiprocessing`'s "spawn" it
never imports the caller's main script, so a script that closes windows is not run again
in the child. The child runs the very same function on the same graph with the same seed,
so the labels are the same whichever process computed them; if it fails (it cannot start,
it dies, its answer does not parse) the labels are computed here instead.
"""

from __future__ import annotations

import io
import logging
import os
import subprocess
import sys
import threading
from concurrent.futures import Future

import numpy as np
import scipy.sparse as sp

from rolewatch.engine.bridging import leiden_communities

__all__ = ["PROCESS_MIN_TIES", "CommunityJob", "start_communities", "window_communities"]

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
    """The communities of one window, being computed; :meth:`result` waits for them."""

    def __init__(self, graph: sp.csr_matrix, resolution: float, future: Future | None) -> None:
        self._graph = graph
        self._resolution = resolution
        self._future = future

    def result(self) -> np.ndarray:
        """The labels (from the child process, or computed here when it failed)."""
        if self._future is not None:
            try:
                labels = np.asarray(self._future.result(), dtype=np.int64)
                if labels.shape == (self._graph.shape[0],):
                    return labels
                log.warning(
                    "community process answered %s labels; computing them here", labels.shape
                )
            except (OSError, ValueError, subprocess.SubprocessError) as error:
                log.warning("community process failed (%s); computing them here", error)
        return window_communities(self._graph, self._resolution)


def start_communities(
    graph: sp.csr_matrix, resolution: float, *, min_ties: int = PROCESS_MIN_TIES
) -> CommunityJob:
    """Start computing the window's communities: in a child process when the graph has at
    least ``min_ties`` undirected ties and the machine more than one core, else later, in
    this process, when the result is asked for."""
    if resolution <= 0 or graph.nnz // 2 < min_ties or (os.cpu_count() or 1) < 2:
        return CommunityJob(graph, resolution, None)
    future: Future = Future()
    payload = _encode(graph, resolution)
    threading.Thread(
        target=_run_child, args=(payload, future), name="rolewatch-communities", daemon=True
    ).start()
    return CommunityJob(graph, resolution, future)


def _run_child(payload: bytes, future: Future) -> None:
    """Run the child on ``payload`` and settle ``future`` with its labels (waiting on the
    child's pipes releases the GIL, so this thread costs the close nothing)."""
    try:
        done = subprocess.run(
            [sys.executable, "-m", __name__],
            input=payload,
            capture_output=True,
            check=False,
        )
        if done.returncode != 0:
            tail = done.stderr.decode("utf-8", "replace").strip()[-500:]
            raise subprocess.SubprocessError(f"exit {done.returncode}: {tail}")
        future.set_result(np.load(io.BytesIO(done.stdout), allow_pickle=False))
    except BaseException as error:  # handed to the waiting close, which falls back
        future.set_exception(error)


def _encode(graph: sp.csr_matrix, resolution: float) -> bytes:
    """The graph's CSR arrays, its size and the resolution as consecutive ``.npy`` arrays."""
    graph = sp.csr_matrix(graph)
    buffer = io.BytesIO()
    header = np.array([graph.shape[0], graph.shape[1]], dtype=np.int64)
    for array in (header, np.array([resolution]), graph.data, graph.indices, graph.indptr):
        np.save(buffer, array, allow_pickle=False)
    return buffer.getvalue()


def _decode(stream: io.BufferedReader | io.BytesIO) -> tuple[sp.csr_matrix, float]:
    header, resolution, data, indices, indptr = (
        np.load(stream, allow_pickle=False) for _ in range(5)
    )
    shape = (int(header[0]), int(header[1]))
    return sp.csr_matrix((data, indices, indptr), shape=shape), float(resolution[0])


def _serve() -> None:
    """The child: read one graph on stdin, write its labels on stdout."""
    graph, resolution = _decode(io.BytesIO(sys.stdin.buffer.read()))
    buffer = io.BytesIO()
    np.save(buffer, window_communities(graph, resolution), allow_pickle=False)
    sys.stdout.buffer.write(buffer.getvalue())
    sys.stdout.buffer.flush()


if __name__ == "__main__":
    _serve()
