"""A window's Leiden communities, computed beside its features in a process of their own.

igraph's ``community_leiden`` holds Python's global interpreter lock while it runs (measured
on the ``close-1m`` window: a Python thread beside it ran at about 1 % of its usual speed),
so a thread cannot overlap it with the features, memberships and scores. A child process
can, when the machine has a second core: on ``close-1m`` the communities take about 2 s of
the close on their own. Small graphs are computed in this process, where starting another
would cost more than it saves.

The child is a fresh interpreter running this module (``python -m
rolewatch.pipeline.communities``), started by the first large window and kept for the next
ones (its imports take about 2 s here, which would otherwise count against every close):
each graph goes to its standard input and the labels come back on its standard output, as
length-prefixed ``.npy`` arrays; it exits when its standard input closes (with this
process). Unlike :mod:`multiprocessing`'s "spawn" it never imports the caller's main
script, so a script that closes windows is not run again in the child. The child runs the
very same function on the same graph with the same seed, so the labels are the same
whichever process computed them; if it fails (it cannot start, it dies, its answer does
not parse) it is stopped, the labels are computed here, and the next large window starts a
new child.
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


class _Child:
    """The long-lived child process and the one exchange it serves at a time."""

    def __init__(self) -> None:
        self.process = subprocess.Popen(
            [sys.executable, "-m", __name__], stdin=subprocess.PIPE, stdout=subprocess.PIPE
        )
        self.lock = threading.Lock()

    def labels(self, payload: bytes) -> np.ndarray:
        with self.lock:
            stdin, stdout = self.process.stdin, self.process.stdout
            if stdin is None or stdout is None:
                raise OSError("the community process has no pipes")
            _write_frame(stdin, payload)
            return np.load(io.BytesIO(_read_frame(stdout)), allow_pickle=False)

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.kill()
        self.process.wait()


_child: _Child | None = None
_child_lock = threading.Lock()


def _shared_child() -> _Child:
    global _child
    with _child_lock:
        if _child is None or _child.process.poll() is not None:
            _child = _Child()
        return _child


def _drop_child(child: _Child) -> None:
    """Stop a child that failed, so the next large window starts a new one."""
    global _child
    with _child_lock:
        if _child is child:
            _child = None
    child.stop()


def _run_child(payload: bytes, future: Future) -> None:
    """Have the child compute ``payload``'s labels and settle ``future`` with them (waiting
    on the child's pipes releases the GIL, so this thread costs the close nothing)."""
    child = None
    try:
        child = _shared_child()
        future.set_result(child.labels(payload))
    except BaseException as error:  # handed to the waiting close, which falls back
        if child is not None:
            _drop_child(child)
        future.set_exception(error)


def _write_frame(stream, payload: bytes) -> None:
    stream.write(len(payload).to_bytes(8, "little"))
    stream.write(payload)
    stream.flush()


def _read_frame(stream) -> bytes:
    """One length-prefixed message; OSError when the stream ends early."""
    size = int.from_bytes(_read_exactly(stream, 8), "little")
    return _read_exactly(stream, size)


def _read_exactly(stream, size: int) -> bytes:
    data = stream.read(size)
    if data is None or len(data) != size:
        raise OSError("the community process ended its output early")
    return bytes(data)


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
    """The child: answer graphs on stdin with their labels on stdout until stdin ends."""
    import igraph  # noqa: F401  (imported before the first graph arrives, not during it)

    requests, answers = sys.stdin.buffer, sys.stdout.buffer
    while True:
        try:
            payload = _read_frame(requests)
        except OSError:  # the parent closed the pipe: nothing more to do
            return
        graph, resolution = _decode(io.BytesIO(payload))
        buffer = io.BytesIO()
        np.save(buffer, window_communities(graph, resolution), allow_pickle=False)
        _write_frame(answers, buffer.getvalue())


if __name__ == "__main__":
    _serve()
