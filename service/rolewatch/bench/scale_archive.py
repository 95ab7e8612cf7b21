"""A window read from the Parquet event archive by the Dask workers and by the closing
process, side by side in one run.

``close-dask-archive``: a SQLite store gets a training window (a fifth of the size, closed
locally first: the fit, not timed here); the window of 10,000,000 events is written to an
event archive (Parquet, one file per 2,000,000 events), not to the store. The window is then
closed twice on copies of the store, each time by a fresh process (so each close's peak
memory is its own), on a local cluster of two worker processes (one thread and
``memory_limit`` 3 GB each), with ``archive_reader = "workers"`` (the workers read the
files; the closing process gets the window's distinct accounts and its distinct pairs) and
with ``archive_reader = "closer"`` (the closing process reads the files and sends the
events). Reported for each: the close's seconds and stages, the peak resident memory of the
closing process during the close (and what it held as the close began) and of its helper
processes (the communities' child), each worker's peak (sampled every 0.2 s with psutil),
the alerts; and the ratios workers / closer.
``close-dask-archive-30m`` is the same with a window of 30,000,000 events. ``--quick`` uses
300,000 events.
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from concurrent.futures import ProcessPoolExecutor
from multiprocessing import get_context
from pathlib import Path
from typing import Any

import numpy as np

from rolewatch.bench.close import FIRST_END, WEEK_US
from rolewatch.bench.scale import (
    LOAD_CHUNK,
    _load_in_chunks,
    _settings,
    _timed_close,
    side_by_side_on_cluster,
)

CASES = ("close-dask-archive", "close-dask-archive-30m")
SIZES = {"close-dask-archive": 10_000_000, "close-dask-archive-30m": 30_000_000}
QUICK = {"close-dask-archive": 300_000, "close-dask-archive-30m": 300_000}
READERS = ("workers", "closer")


def _archived_window(archive: str, rng: np.random.Generator, events: int, accounts: int) -> None:
    """The window's events, drawn as the store's bench windows are (a Zipf-like popularity
    of accounts, :func:`rolewatch.bench.close._power_law_events`), written to ``archive`` in
    files of :data:`LOAD_CHUNK` events, as columns (never a Python row per event)."""
    import pyarrow as pa

    from rolewatch.scale.archive import SCHEMA, write_events

    popularity = 1.0 / np.arange(1, accounts + 1) ** 0.9
    popularity /= popularity.sum()
    names = np.array([f"a-{i:07d}" for i in range(accounts)], dtype=object)
    for first in range(0, events, LOAD_CHUNK):
        size = min(LOAD_CHUNK, events - first)
        actor = rng.choice(accounts, size=size, p=popularity)
        target = rng.choice(accounts, size=size, p=popularity)
        clash = actor == target
        target[clash] = (target[clash] + 1) % accounts
        times = FIRST_END + rng.integers(0, WEEK_US, size=size)
        table = pa.table(
            {
                "id": pa.array([f"w-{first + i}" for i in range(size)], pa.string()),
                "time": pa.array(times, pa.int64()).cast(SCHEMA.field("time").type),
                "actor": pa.array(names[actor], pa.string()),
                "target": pa.array(names[target], pa.string()),
                "kind": pa.array(["payment"] * size, pa.string()),
                "weight": pa.array(np.round(rng.lognormal(2.5, 1.0, size=size), 2)),
            },
            schema=SCHEMA,
        )
        write_events(archive, table, WEEK_US)


def _side_by_side(events: int, client: Any, scheduler: str, tmp: Path) -> dict:
    from rolewatch.pipeline.closer import close_window
    from rolewatch.store.db import open_store

    rng = np.random.default_rng(0)
    accounts = max(20_000, events // 6)
    trained, archive = tmp / "trained.db", str(tmp / "archive")
    open_store(_settings(trained)).dispose()
    _load_in_chunks(trained, rng, events // 5, accounts, FIRST_END - WEEK_US, "t-")
    now_us = FIRST_END + 4 * WEEK_US
    engine = open_store(_settings(trained))
    close_window(engine, _settings(trained), FIRST_END, now_us=now_us)  # training: the fit
    engine.dispose()
    _archived_window(archive, rng, events, accounts)
    pids = list(client.run(os.getpid).values())
    closes = {}
    for reader in READERS:
        path = tmp / f"{reader}.db"
        shutil.copyfile(trained, path)
        with ProcessPoolExecutor(max_workers=1, mp_context=get_context("spawn")) as pool:
            closes[reader] = pool.submit(
                _close_fresh, str(path), archive, reader, scheduler, now_us, pids
            ).result()
        path.unlink()
    workers, closer = closes["workers"], closes["closer"]
    return {
        "events": events,
        "accounts": workers["accounts"],
        "same_alert_count": workers["alerts"] == closer["alerts"],
        "seconds_ratio": round(workers["seconds"] / max(closer["seconds"], 1e-9), 2),
        "peak_rss_ratio": round(workers["peak_rss_mb"] / max(closer["peak_rss_mb"], 1e-9), 2),
        **{f"{reader}_{key}": value for reader in READERS for key, value in closes[reader].items()},
    }


def _close_fresh(
    path: str, archive: str, reader: str, scheduler: str, now_us: int, pids: list[int]
) -> dict:
    """Close the window in this (fresh) process, the archive read by ``reader``."""
    from rolewatch.scale.dispatch import close_clients
    from rolewatch.store.db import open_store

    settings = _settings(
        Path(path),
        compute="dask",
        dask_scheduler=scheduler,
        event_source="archive",
        event_archive=archive,
        archive_reader=reader,
    )
    engine = open_store(settings)
    try:
        return _timed_close(engine, settings, FIRST_END + WEEK_US, now_us, pids)
    finally:
        engine.dispose()
        close_clients()


def run(case: str, *, quick: bool = False) -> Iterator[dict]:
    if case not in CASES:
        raise ValueError(f"unknown case {case!r}")
    events = (QUICK if quick else SIZES)[case]
    yield from side_by_side_on_cluster(case, events, READERS, _side_by_side)
