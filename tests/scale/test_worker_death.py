"""A Dask worker killed while a window closes with ``compute = "dask"`` (a window after
training, or the training close, whose fit and back-fill run on the cluster too): the lost
event chunks make Dask cancel the computation, the close computes the window again on the
remaining and restarted workers, and the window is closed exactly once with what the local
engine writes. When every attempt loses its data, the close fails before writing anything
and the next close of the window succeeds.

The events are the fictional marketplace sample in fixtures/sample (invented data), cut
after its fifth week so that one window is measured after the four training windows (its
sixth week added for the next close of the same process).
"""

from __future__ import annotations

import logging
import os
import signal
import threading
import time

import pytest
from distributed.diagnostics.plugin import SchedulerPlugin

from rolewatch.pipeline.closer import close_due_windows, close_window
from rolewatch.pipeline.windows import WindowGeometry
from rolewatch.scale import dispatch
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest, parse_time_us

from .conftest import NOW, sample_events, sample_settings, write_archive, written
from .helpers import assert_same_closes


def _weeks(settings, first_week: int, weeks: int) -> list[dict]:
    """The sample's events of ``weeks`` windows from its ``first_week`` (0: its first)."""
    events = sample_events()
    geometry = WindowGeometry.from_settings(settings)
    first = min(parse_time_us(event["time"]) for event in events)
    start = geometry.end_after(first) + (first_week - 1) * geometry.period_us
    end = start + weeks * geometry.period_us
    return [
        event
        for event in events
        if (first_week == 0 or parse_time_us(event["time"]) >= start)
        and parse_time_us(event["time"]) < end
    ]


def _holder_of_scattered_data(dask_scheduler, prefix: str = "tuple-") -> str | None:
    """A worker holding a value whose key starts with ``prefix``, or None while there is
    none: by default data scattered by a client (keys ``tuple-<token>``, Dask's naming for a
    scattered tuple: the close scatters each chunk of events as a tuple of arrays)."""
    for task in dask_scheduler.tasks.values():
        if str(task.key).startswith(prefix) and task.who_has:
            return next(iter(task.who_has)).address
    return None


class _Kills:
    """The one SIGKILL a close may meet, whichever watcher (below) sees its value first."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.killed: list[int] = []

    def kill(self, pid: int) -> None:
        with self.lock:
            if not self.killed:
                os.kill(pid, signal.SIGKILL)
                self.killed.append(pid)


class _KillOnScatter(threading.Thread):
    """Kills the first worker seen holding a window's scattered events (or, with
    ``prefix``, another value of the close), polling the scheduler."""

    def __init__(self, client, kills: _Kills, prefix: str = "tuple-") -> None:
        super().__init__(daemon=True)
        self.client = client
        self.kills = kills
        self.prefix = prefix
        self.stop = threading.Event()

    def run(self) -> None:
        while not self.stop.is_set() and not self.kills.killed:
            address = self.client.run_on_scheduler(_holder_of_scattered_data, prefix=self.prefix)
            if address is not None:
                self.kills.kill(self.client.run(os.getpid)[address])
                return
            time.sleep(0.02)


class _KillOnResult(SchedulerPlugin):
    """Kills the worker that has just computed a value whose key starts with ``prefix``, as
    the scheduler records it: a task result may be held for milliseconds only, which a poll
    can miss (it did, once in about twenty runs)."""

    name = "rolewatch-test-kill-on-result"

    def __init__(self, scheduler, kills: _Kills, prefix: str) -> None:
        self.scheduler = scheduler
        self.kills = kills
        self.prefix = prefix

    def transition(self, key, start, finish, *args, **kwargs) -> None:
        if finish != "memory" or self.kills.killed or not str(key).startswith(self.prefix):
            return
        task = self.scheduler.tasks.get(key)
        if task is not None and task.who_has:
            self.kills.kill(next(iter(task.who_has)).pid)


@pytest.fixture
def cluster():
    """A local cluster of two worker processes (each under a nanny that restarts it)."""
    from distributed import Client, LocalCluster

    cluster = LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        dashboard_address=None,
        memory_limit="1GiB",
    )
    client = Client(cluster)
    yield client
    from rolewatch.scale.dispatch import close_clients

    close_clients()
    client.close()
    cluster.close()


def _five_weeks_stored(tmp_path, compute: str, client, **extra):
    """A store of its own holding the sample's first five weeks, closed with ``compute``."""
    settings = sample_settings(
        tmp_path / f"{compute}.db",
        compute=compute,
        dask_scheduler=client.scheduler.address,
        dask_partitions=4,
        **extra,
    )
    engine = open_store(settings)
    ingest(engine, settings, _weeks(settings, 0, 5), NOW)
    return engine, settings


def _close_killing_a_worker(engine, settings, client, prefix: str = "tuple-"):
    """Close the due windows while a worker holding the window's events (or the value
    ``prefix`` names) is killed."""
    client.wait_for_workers(2, timeout=60)
    deadline = time.monotonic() + 30
    # The chunks of an earlier failed attempt are released asynchronously: wait, so the
    # worker killed is one holding this close's events.
    while client.run_on_scheduler(_holder_of_scattered_data) is not None:
        assert time.monotonic() < deadline, "an earlier close's events stayed on the cluster"
        time.sleep(0.05)
    kills = _Kills()
    scheduler = client.cluster.scheduler  # the local cluster's, in this process
    scheduler.add_plugin(_KillOnResult(scheduler, kills, prefix), name=_KillOnResult.name)
    killer = _KillOnScatter(client, kills, prefix)
    killer.start()
    try:
        return close_due_windows(engine, settings, now_us=NOW, drain=True)
    finally:
        killer.stop.set()
        killer.join()
        scheduler.remove_plugin(name=_KillOnResult.name)
        assert kills.killed, "a worker holding the window's events was killed"


@pytest.mark.parametrize("killed_in", ["training", "measured"])
def test_a_worker_killed_mid_close_leaves_the_window_closed_once(
    cluster, tmp_path, caplog, monkeypatch, killed_in
):
    # "training": the worker dies while the training close computes the training windows'
    # features on the cluster (the fit, then the back-fill); "measured": while a window
    # after training is measured.
    results = {}
    for compute in ("local", "dask"):
        engine, settings = _five_weeks_stored(tmp_path, compute, cluster)
        if compute == "local":
            close_due_windows(engine, settings, now_us=NOW, drain=True)
        else:
            if killed_in == "measured":  # the training close first, on the cluster, untouched
                for end_us in [row[0] for row in results["local"]["windows"]][:4]:
                    close_window(engine, settings, end_us, now_us=NOW)
            before = len(written(engine)["windows"])
            assert before == (4 if killed_in == "measured" else 0)
            # One attempt only: the lost chunks fail the close, before anything is written.
            monkeypatch.setattr(dispatch, "DASK_ATTEMPTS", 1)
            with pytest.raises(dispatch.DaskDataLost, match="next tick"):
                _close_killing_a_worker(engine, settings, cluster)
            # the windows recorded before the failed close (training windows are recorded
            # as they close, the fourth one fits the model)
            assert len(written(engine)["windows"]) == (4 if killed_in == "measured" else 3)
            monkeypatch.setattr(dispatch, "DASK_ATTEMPTS", 3)
            caplog.clear()
            with caplog.at_level(logging.WARNING, logger="rolewatch.scale"):
                closed = _close_killing_a_worker(engine, settings, cluster)
            assert [summary.training for summary in closed][-1:] == [False]
            assert all(summary.training for summary in closed[:-1])
        results[compute] = written(engine)
        engine.dispose()
    retried = [r for r in caplog.records if "lost the window's data" in r.getMessage()]
    assert retried, "the close computed the window again"
    # exactly once: one window record per window, one membership per account and window
    ends = [row[0] for row in results["dask"]["windows"]]
    assert len(ends) == len(set(ends)) == 5
    keys = [(row[0], row[1]) for row in results["dask"]["memberships"]]
    assert len(keys) == len(set(keys))
    assert_same_closes(results["dask"], results["local"])


@pytest.mark.parametrize(
    ("outputs", "prefix"),
    [(True, "pair_range-"), (False, "_prepared-")],
    ids=["history", "scoring"],
)
def test_a_worker_killed_holding_a_value_the_cluster_recomputes_leaves_the_same_close(
    cluster, tmp_path, outputs, prefix
):
    # "history": the known pairs read on the workers from the outputs (a range is a task
    # result, read from the pair files). "scoring": the window's score inputs sent to the
    # workers in parts and scored there (rolewatch.scale.scoring); losing a part's prepared
    # columns scores the window again, or Dask recomputes them from the part's copy. Either
    # way the window closes as the local engine closes it.
    results = {}
    for compute in ("local", "dask"):
        extra = {"output_archive": str(tmp_path / f"{compute}-outputs")} if outputs else {}
        engine, settings = _five_weeks_stored(tmp_path, compute, cluster, **extra)
        if compute == "local":
            close_due_windows(engine, settings, now_us=NOW, drain=True)
        else:
            closed = _close_killing_a_worker(engine, settings, cluster, prefix=prefix)
            assert [summary.training for summary in closed].count(False) == 1
        results[compute] = written(engine)
        engine.dispose()
    assert_same_closes(results["dask"], results["local"])


@pytest.mark.parametrize(
    ("outputs", "prefix"), [(True, "with_window_pairs-"), (False, "merged_sorted-")]
)
def test_a_worker_killed_holding_a_kept_range_of_the_history_leaves_the_same_close(
    cluster, tmp_path, outputs, prefix
):
    # The next close of the same process extends the ranges kept from the close before with
    # that window's pairs (rolewatch.scale.held_pairs), read on the workers from the outputs
    # or sent from the store: losing a worker that holds an extended range closes the window
    # all the same.
    results = {}
    for compute in ("local", "dask"):
        extra = {"output_archive": str(tmp_path / f"{compute}-outputs")} if outputs else {}
        engine, settings = _five_weeks_stored(tmp_path, compute, cluster, **extra)
        close_due_windows(engine, settings, now_us=NOW, drain=True)
        ingest(engine, settings, _weeks(settings, 5, 1), NOW)
        if compute == "local":
            close_due_windows(engine, settings, now_us=NOW, drain=True)
        else:
            closed = _close_killing_a_worker(engine, settings, cluster, prefix=prefix)
            assert [summary.training for summary in closed] == [False]
        results[compute] = written(engine)
        engine.dispose()
    assert len(results["local"]["windows"]) == 6
    assert_same_closes(results["dask"], results["local"])


@pytest.mark.parametrize("prefix", ["_kept_once-", "_sorted_accounts-", "_coded-"])
def test_a_worker_killed_holding_events_it_read_from_the_archive_leaves_the_same_close(
    cluster, tmp_path, prefix
):
    # With the events in the archive the workers read them (rolewatch.scale.archive_events):
    # every bucket of events is a task reading the archive's files, so Dask computes a lost
    # one again and the window closes as the local engine closes it from the store.
    engine, settings = _five_weeks_stored(tmp_path, "local", cluster)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    results = {"local": written(engine)}
    engine.dispose()
    archive = str(tmp_path / "archive")
    write_archive(archive, _weeks(settings, 0, 5), WindowGeometry.from_settings(settings).period_us)
    settings = sample_settings(
        tmp_path / "archived.db",
        compute="dask",
        dask_scheduler=cluster.scheduler.address,
        dask_partitions=4,
        event_source="archive",
        event_archive=archive,
    )
    engine = open_store(settings)
    closed = _close_killing_a_worker(engine, settings, cluster, prefix=prefix)
    assert [summary.training for summary in closed].count(False) == 1
    results["dask"] = written(engine)
    engine.dispose()
    assert_same_closes(results["dask"], results["local"])


def _blocked_until(name: str) -> bool:
    from distributed import Event

    return Event(name).wait()


def test_blocks_waiting_on_a_chunk_whose_worker_died_fail_the_attempt(cluster, monkeypatch):
    # Blocks whose event chunk was lost before they were built could wait for ever: the
    # wait asks whether each chunk still has a holder among the workers alive, and gives
    # the attempt up (a cancelled computation, which the close retries) when one has none.
    # The blocks here do not depend on the chunks, so only that check ends the wait.
    from concurrent.futures import CancelledError

    from distributed import Event

    monkeypatch.setattr(dispatch, "BUILD_POLL_S", 0.1)
    cluster.wait_for_workers(2, timeout=60)
    first, second = sorted(cluster.scheduler_info()["workers"])
    measure = dispatch.DaskMeasure(cluster, partitions=2)
    release = Event("rolewatch-test-blocks", client=cluster)
    built = [cluster.submit(_blocked_until, "rolewatch-test-blocks", workers=[first], pure=False)]
    chunks = [
        *cluster.scatter([[1, 2, 3]], workers=[first], hash=False),
        *cluster.scatter([[4, 5]], workers=[second], hash=False),
    ]
    outcome: list[BaseException | None] = []
    waiting = threading.Thread(
        target=lambda: outcome.append(_waited(measure, built, chunks)), daemon=True
    )
    waiting.start()
    waiting.join(1.0)
    assert waiting.is_alive(), "blocks still building and every chunk held: the wait goes on"
    os.kill(cluster.run(os.getpid)[second], signal.SIGKILL)
    waiting.join(30)
    assert not waiting.is_alive(), "a chunk without a holder ends the wait"
    assert isinstance(outcome[0], CancelledError) and dispatch.lost_data(outcome[0])
    release.set()
    assert built[0].result(timeout=30) is True


def _waited(measure, built, chunks) -> BaseException | None:
    try:
        measure.wait_built(built, chunks)
    except BaseException as error:  # noqa: BLE001 - the test inspects it
        return error
    return None
