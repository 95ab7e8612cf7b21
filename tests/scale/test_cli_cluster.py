"""A real Dask cluster started from the command line (`dask scheduler` and two `dask worker`
processes on 127.0.0.1, each with --memory-limit) closes the sample's windows, and they
match a local close.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import pytest

from rolewatch.pipeline.closer import close_due_windows
from rolewatch.scale.dispatch import close_clients
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest

from .conftest import NOW, sample_events, sample_settings, written
from .helpers import assert_same_closes, scheduler_transitions


def _dask(*arguments: str) -> list[str]:
    """The `dask` command of this environment."""
    return [str(Path(sys.executable).with_name("dask")), *arguments]


def _wait_for_workers(scheduler_file: Path, count: int, timeout: float = 90.0) -> str:
    from distributed import Client

    deadline = time.monotonic() + timeout
    while not scheduler_file.exists():
        if time.monotonic() > deadline:
            raise AssertionError("the dask scheduler wrote no scheduler file")
        time.sleep(0.2)
    address = json.loads(scheduler_file.read_text())["address"]
    with Client(address, timeout="30s") as client:
        client.wait_for_workers(count, timeout=max(1.0, deadline - time.monotonic()))
        # asked of each worker: the client's cached scheduler_info() may list none
        limits = list(
            client.run(lambda dask_worker: dask_worker.memory_manager.memory_limit).values()
        )
    assert limits == [768 * 2**20] * count
    return address


@pytest.mark.slow
def test_a_command_line_cluster_closes_windows_like_the_local_engine(tmp_path):
    scheduler_file = tmp_path / "scheduler.json"
    processes = [
        subprocess.Popen(
            _dask(
                "scheduler",
                "--host",
                "127.0.0.1",
                "--port",
                "0",
                "--no-dashboard",
                "--scheduler-file",
                str(scheduler_file),
            ),
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
    ]
    try:
        for _ in range(2):
            processes.append(
                subprocess.Popen(
                    _dask(
                        "worker",
                        "--scheduler-file",
                        str(scheduler_file),
                        "--host",
                        "127.0.0.1",
                        "--nthreads",
                        "1",
                        "--memory-limit",
                        "768MiB",
                        "--no-dashboard",
                    ),
                    stdout=subprocess.DEVNULL,
                    stderr=subprocess.DEVNULL,
                )
            )
        address = _wait_for_workers(scheduler_file, 2)
        every = sample_events()
        results = {}
        before = scheduler_transitions(address)
        for compute in ("local", "dask"):
            settings = sample_settings(
                tmp_path / f"{compute}.db",
                compute=compute,
                dask_scheduler=address,
                dask_partitions=4,
            )
            engine = open_store(settings)
            ingest(engine, settings, every, NOW)
            closed = close_due_windows(engine, settings, now_us=NOW, drain=True)
            assert closed
            results[compute] = written(engine)
            engine.dispose()
        assert_same_closes(results["dask"], results["local"])
        # the dask close really ran on the cluster
        assert scheduler_transitions(address) > before
    finally:
        close_clients()
        for process in reversed(processes):
            process.terminate()
        for process in processes:
            try:
                process.wait(timeout=20)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()
