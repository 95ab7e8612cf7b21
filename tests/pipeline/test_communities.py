"""A window's communities from the child process equal the ones computed in process, and a
child that cannot run falls back to computing them here. Graph: Zachary's karate club as
networkx ships it; modularity checked with networkx.community.modularity."""

from __future__ import annotations

import io
import subprocess
import sys

import networkx as nx
import numpy as np
import scipy.sparse as sp

from rolewatch import helper_process
from rolewatch.pipeline import communities
from rolewatch.pipeline.communities import start_communities, window_communities


def _karate_ties() -> sp.csr_matrix:
    graph = nx.karate_club_graph()
    return sp.csr_matrix(nx.to_scipy_sparse_array(graph, weight="weight", dtype=np.float64))


def test_the_child_process_finds_the_communities_this_process_finds():
    ties = _karate_ties()
    job = start_communities(ties, 1.0, min_ties=0)
    assert job._future is not None  # handed to a child process
    labels = job.result()
    np.testing.assert_array_equal(labels, window_communities(ties, 1.0))
    # Source: networkx.community.modularity; any sensible split of the karate club scores
    # well above 0.3 (the two-faction split of the original study scores about 0.37,
    # recalled from memory)
    groups = [set(np.flatnonzero(labels == label).tolist()) for label in np.unique(labels)]
    assert nx.community.modularity(nx.karate_club_graph(), groups, weight="weight") > 0.3


def test_the_request_is_the_npy_stream_without_copying_the_graph():
    ties = _karate_ties()
    parts = communities._encode(ties, 0.5)
    # reference: numpy's own .npy writer (np.save), array after array
    expected = io.BytesIO()
    for array in (np.array([34, 34]), np.array([0.5]), ties.data, ties.indices, ties.indptr):
        np.save(expected, array, allow_pickle=False)
    assert b"".join(bytes(part) for part in parts) == expected.getvalue()
    # the graph's arrays go out as views of their own buffers, not as a joined copy
    for array in (ties.data, ties.indices, ties.indptr):
        assert any(np.shares_memory(np.asarray(part), array) for part in parts)


def _no_child() -> None:
    communities.HELPER.stop()


def test_a_child_that_cannot_start_leaves_the_work_to_this_process(monkeypatch):
    ties = _karate_ties()
    _no_child()
    monkeypatch.setattr(helper_process.sys, "executable", "/nonexistent/python")
    job = start_communities(ties, 1.0, min_ties=0)
    np.testing.assert_array_equal(job.result(), window_communities(ties, 1.0))


def test_with_a_rebuild_the_job_lets_the_graph_go_and_builds_it_again_to_fall_back(
    monkeypatch,
):
    # Once the request is written to the child, nothing here holds the graph's arrays
    # (weak references to them die); a child that cannot start makes the job build the
    # graph again and compute the same labels here.
    import gc
    import weakref

    built = []

    def rebuild() -> sp.csr_matrix:
        built.append(1)
        return _karate_ties()

    ties = _karate_ties()
    arrays = [weakref.ref(array) for array in (ties.data, ties.indices, ties.indptr)]
    job = start_communities(ties, 1.0, min_ties=0, rebuild=rebuild)
    del ties
    labels = job.result()
    gc.collect()
    assert all(ref() is None for ref in arrays)
    np.testing.assert_array_equal(labels, window_communities(_karate_ties(), 1.0))
    assert not built  # the child answered
    # the request's parts are let go once written, before the answer comes
    parts = communities._encode(_karate_ties(), 1.0)
    answer = communities.HELPER.exchange(parts)
    assert parts == []
    np.testing.assert_array_equal(np.load(io.BytesIO(answer), allow_pickle=False), labels)
    _no_child()
    monkeypatch.setattr(helper_process.sys, "executable", "/nonexistent/python")
    job = start_communities(_karate_ties(), 1.0, min_ties=0, rebuild=rebuild)
    np.testing.assert_array_equal(job.result(), labels)
    assert built == [1]


def test_small_graphs_and_bridging_off_stay_in_process():
    ties = _karate_ties()
    assert start_communities(ties, 1.0)._future is None  # far below PROCESS_MIN_TIES
    off = start_communities(ties, 0.0, min_ties=0)
    assert off._future is None
    assert (off.result() == -1).all()


def test_the_child_serves_one_window_after_another_and_a_dead_one_is_replaced():
    ties = _karate_ties()
    _no_child()
    first = start_communities(ties, 1.0, min_ties=0).result()
    child = communities.HELPER.process
    assert child is not None
    second = start_communities(ties, 0.5, min_ties=0).result()
    assert communities.HELPER.process is child  # the same process answered both
    np.testing.assert_array_equal(first, window_communities(ties, 1.0))
    np.testing.assert_array_equal(second, window_communities(ties, 0.5))
    child.kill()
    child.wait()
    again = start_communities(ties, 1.0, min_ties=0).result()
    np.testing.assert_array_equal(again, first)
    assert communities.HELPER.process is not child
    _no_child()


def test_a_child_whose_parent_stopped_reading_exits_quietly():
    # The parent closed its end of the answers pipe (it died, say): the child's answer
    # meets a broken pipe, and the child ends without a traceback on its error stream.
    child = subprocess.Popen(
        [sys.executable, "-m", "rolewatch.pipeline.communities"],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    assert child.stdin is not None and child.stdout is not None and child.stderr is not None
    child.stdout.close()
    request = b"not a graph"  # answered with a failure report: still an answer to write
    child.stdin.write(len(request).to_bytes(8, "little") + request)
    child.stdin.close()
    assert child.wait(timeout=60) == 0
    assert child.stderr.read() == b""
