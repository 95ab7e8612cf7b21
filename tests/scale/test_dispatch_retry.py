"""What a Dask close counts as the cluster losing its data, and starts again.

A worker can leave between the scheduler choosing it and using it: a scatter's replication
then looked up the departed worker and distributed raised its address as a ``KeyError``
(``Scheduler.replicate``; seen once on CI while a test killed a worker mid-close). Here the
same error is raised by distributed itself, asking it to replicate to an address it does
not know, and the close's retry must take it for lost data, as it takes a cancelled future.
"""

from __future__ import annotations

import logging

import pytest

from rolewatch.scale import dispatch
from rolewatch.scale.dispatch import DaskDataLost, DaskMeasure, lost_data

GONE = "tcp://127.0.0.1:1"  # no worker listens there


def _replicated_to(client, workers):
    (future,) = client.scatter([1], hash=False)
    client.replicate([future], workers=workers)
    return future.result()


def test_the_schedulers_error_for_a_departed_worker_is_lost_data(dask_cluster):
    with pytest.raises(KeyError) as raised:
        _replicated_to(dask_cluster, [GONE])
    assert lost_data(raised.value)


def test_a_close_retries_after_a_worker_departed_mid_request(dask_cluster, monkeypatch, caplog):
    monkeypatch.setattr(dispatch, "RETRY_PAUSE_S", 0.0)
    measure = DaskMeasure(dask_cluster, partitions=2)
    tries: list[int] = []

    def work():
        tries.append(len(tries))
        alive = sorted(dask_cluster.nthreads())
        return _replicated_to(dask_cluster, [GONE] if len(tries) == 1 else alive)

    with caplog.at_level(logging.WARNING, logger="rolewatch.scale"):
        assert measure.retried(work) == 1
    assert len(tries) == 2
    assert any("lost the window's data" in r.getMessage() for r in caplog.records)


def test_every_attempt_losing_a_worker_fails_the_close_saying_what_happens_next(
    dask_cluster, monkeypatch
):
    monkeypatch.setattr(dispatch, "RETRY_PAUSE_S", 0.0)
    measure = DaskMeasure(dask_cluster, partitions=2, attempts=2)
    with pytest.raises(DaskDataLost, match="next tick"):
        measure.retried(lambda: _replicated_to(dask_cluster, [GONE]))


def test_other_errors_are_not_retried(dask_cluster):
    measure = DaskMeasure(dask_cluster, partitions=2)
    tries: list[int] = []

    def broken():
        tries.append(1)
        return {}["role"]  # a KeyError of the program's own, not a worker's address

    with pytest.raises(KeyError, match="role"):
        measure.retried(broken)
    with pytest.raises(ValueError):
        measure.retried(lambda: int("x"))
    assert tries == [1]
