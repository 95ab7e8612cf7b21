"""Closing one power-law window locally and on a local Dask cluster, side by side in one run.

``close-dask-10m``: a window of 10,000,000 events; ``close-dask-30m``: 30,000,000;
``close-dask-scaling``: 1M, 3M, 10M and 30M events. For each size a SQLite store gets a
training window (a fifth of the size) that is closed locally first (the fit, not timed here);
the store file is then copied, and the big window is closed once with ``compute = "dask"`` on
a local cluster of two worker processes, one thread and ``memory_limit`` 3 GB each, and once
with ``compute = "local"`` when the in-process close would fit in the memory this machine
has free (see :data:`LOCAL_MB_PER_MILLION_EVENTS`). Reported: both close times and their
ratio, the seconds of each stage of both closes, the peak resident memory of the closing
process during each close, of its helper processes (the communities' child, SQLite's window
reader: the closing machine holds them too), and the peak of each Dask worker (all sampled
every 0.2 s with psutil). A size whose Dask close fails on every attempt (workers restarted
over their limit) gives a line with ``dask_closed: false`` and the error, and the run goes
on.
``--quick`` uses 100,000 and 300,000 events.

``close-dask-next``: the window after one closed on Dask by the same process, as a running
service closes it. The store gets a training window (closed locally) and two windows of
4,000,000 events; the first is closed on Dask, and its raw feature values (over 512 MB)
stay in the workers' scratch files, kept for the next window's evidence. The second window
is closed by that process, then again on a copy of the store taken before, by a fresh
engine (as after a restart: the evidence measures the first window again on the cluster).
Reported: both closes' seconds, stages, alerts, peak resident memory of this process (and
what it held as each close began) and of each worker. ``--quick`` uses 300,000 events.

``close-dask-history``: a window closed on Dask against a long known-pair history, as a
service running for months has one. The store gets a training window (closed locally), a
window of 1,000,000 events, and, before the training window, 40 closed windows of old
events whose first-seen pairs make the history (100,000,000 keys in all, drawn at random:
8 bytes each in the store, 800 MB together). The window is closed twice on copies of one
store, side by side: with the history read from the store by the closing process and sent
to the workers one window's part at a time, cut by key range (no ``output_archive``), and
with ``output_archive`` set, every window's pairs already in its Parquet file, so the
workers read the history there.
Reported: both closes' seconds, stages, alerts and the peak resident memory of this process
and of each worker. ``--quick`` uses 100,000 events and 1,000,000 keys.

``close-dask-history-next``: the window after one closed on Dask against that history, as a
running service closes it: the same store with one more window of 1,000,000 events, once
with ``output_archive`` set and once without. The first window is closed by this process
(its workers keep the history's key ranges, :mod:`rolewatch.scale.held_pairs`); the store
(and the outputs) are copied; the second window is closed by this process, which adds only
the first window's pairs to the kept ranges, then on the copies, whose other address makes
the close place the whole history again (read on the workers from every window's file, or
read from the store by this process and sent), as after a restart. Reported per source as
for ``close-dask-history``. ``--quick`` uses 100,000 events and 1,000,000 keys.

``archive-history-52``: 52 windows of 200,000 accounts each (10,400,000 rows, 8 roles)
written as per-window Parquet outputs (:mod:`rolewatch.scale.outputs`); the first read builds
the per-window row-group index (``open_ms``); then 200 reads of one random account's
52-window history through it (:mod:`rolewatch.scale.output_reads`); p50 and p95 in ms
(target p95 ≤ 100 ms). Beside them, 50 reads by one pyarrow dataset scan with a filter on
``account`` (row-group statistics pushdown, footers read once): ``dataset_scan_p50_ms``,
``dataset_scan_p95_ms``.
``--quick`` uses 20,000 accounts per window.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from rolewatch.bench.close import FIRST_END, WEEK_US, _load, _power_law_events
from rolewatch.bench.memory import PeakMemory

CASES = (
    "close-dask-10m",
    "close-dask-30m",
    "close-dask-scaling",
    "close-dask-next",
    "close-dask-history",
    "close-dask-history-next",
    "archive-history-52",
)
SIZES = {
    "close-dask-10m": [10_000_000],
    "close-dask-30m": [30_000_000],
    "close-dask-scaling": [1_000_000, 3_000_000, 10_000_000, 30_000_000],
    "close-dask-next": [4_000_000],
    "close-dask-history": [1_000_000],
    "close-dask-history-next": [1_000_000],
}
QUICK = {
    "close-dask-10m": [300_000],
    "close-dask-30m": [300_000],
    "close-dask-scaling": [100_000, 300_000],
    "close-dask-next": [300_000],
    "close-dask-history": [100_000],
    "close-dask-history-next": [100_000],
}
# The known pairs of the close-dask-history store: 40 old windows' first-seen pairs.
HISTORY_KEYS = 100_000_000
HISTORY_WINDOWS = 40
WORKER_MEMORY = "3GB"
LOAD_CHUNK = 2_000_000  # events generated and stored at once (smaller windows: one draw)
# The in-process close's peak memory per million events of this generator's windows: 7.3-7.5
# GB at 10,000,000 events, 3.2 GB at 3,000,000 (this bench, docs/scale.md). A size whose
# in-process close would need more than the memory free is closed on Dask only.
LOCAL_MB_PER_MILLION_EVENTS = 750


def side_by_side_on_cluster(
    case: str, events: int, order: Sequence[str], side_by_side: Callable[..., dict]
) -> Iterator[dict]:
    """One record of ``side_by_side(events, client, scheduler_address, folder)`` run on a
    local cluster of two worker processes (one thread, :data:`WORKER_MEMORY` each) in a
    temporary folder, with the machine's core count and the closes' ``order``."""
    from distributed import Client, LocalCluster

    from rolewatch.scale.dispatch import close_clients

    cluster = LocalCluster(
        n_workers=2, threads_per_worker=1, memory_limit=WORKER_MEMORY, dashboard_address=None
    )
    client = Client(cluster)
    try:
        with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
            measured = side_by_side(events, client, cluster.scheduler_address, Path(tmp))
            yield {
                "case": case,
                "cores": os.cpu_count(),
                "workers": 2,
                "worker_memory_limit": WORKER_MEMORY,
                "order": list(order),
                **measured,
            }
    finally:
        close_clients()
        client.close()
        cluster.close()


def _settings(path: Path, **extra: Any):
    from rolewatch.config import load_settings

    return load_settings(
        database_url=f"sqlite:///{path}",
        training_windows=1,
        window_period="7d",
        window_span="7d",
        **extra,
    )


def _close(path: Path, now_us: int, worker_pids: list[int], **extra: Any) -> dict:
    from rolewatch.store.db import open_store

    settings = _settings(path, **extra)
    engine = open_store(settings)
    try:
        return _timed_close(engine, settings, FIRST_END + WEEK_US, now_us, worker_pids)
    finally:
        engine.dispose()


def _timed_close(
    engine: Any, settings: Any, end_us: int, now_us: int, worker_pids: list[int]
) -> dict:
    """Close the window ending at ``end_us``: its seconds, alerts, stages and memory."""
    from rolewatch.pipeline.closer import close_window

    with PeakMemory(worker_pids) as memory:
        started = time.perf_counter()
        summaries = close_window(engine, settings, end_us, now_us=now_us)
        seconds = time.perf_counter() - started
    return {
        "seconds": round(seconds, 2),
        "start_rss_mb": round(memory.start_mb, 1),
        "peak_rss_mb": round(memory.peak_mb, 1),
        "worker_peak_mb": [round(m, 1) for m in memory.worker_peak_mb],
        "worker_restarts": memory.worker_restarts,
        "helper_peak_rss_mb": {name: round(m, 1) for name, m in memory.helper_peak_mb.items()},
        "accounts": summaries[-1].accounts,
        "alerts": summaries[-1].alert_count,
        "stage_seconds": summaries[-1].stage_seconds,
    }


def _load_in_chunks(
    path: Path, rng: np.random.Generator, events: int, accounts: int, start_us: int, prefix: str
) -> None:
    """The window's events in chunks of :data:`LOAD_CHUNK` (one Python row per event would
    otherwise hold several GB of this process at 10,000,000 events, and keep it)."""
    for first in range(0, events, LOAD_CHUNK):
        size = min(LOAD_CHUNK, events - first)
        chunk_prefix = prefix if first == 0 else f"{prefix}{first}-"
        _load(path, _power_law_events(rng, size, accounts, start_us, chunk_prefix))


def _one_size(events: int, client: Any, scheduler: str, tmp: Path) -> dict:
    from rolewatch.pipeline.closer import close_window
    from rolewatch.store.db import open_store

    rng = np.random.default_rng(0)
    accounts = max(20_000, events // 6)
    local_db, dask_db = tmp / f"local-{events}.db", tmp / f"dask-{events}.db"
    settings = _settings(local_db)
    open_store(settings).dispose()
    _load_in_chunks(local_db, rng, events // 5, accounts, FIRST_END - WEEK_US, "t-")
    _load_in_chunks(local_db, rng, events, accounts, FIRST_END, "w-")
    now_us = FIRST_END + 4 * WEEK_US
    engine = open_store(settings)
    close_window(engine, settings, FIRST_END, now_us=now_us)  # training: the fit
    engine.dispose()
    shutil.copyfile(local_db, dask_db)
    pids = list(client.run(os.getpid).values())
    from rolewatch.scale.dispatch import DaskDataLost

    try:
        on_dask = _close(dask_db, now_us, pids, compute="dask", dask_scheduler=scheduler)
    except DaskDataLost as error:  # a size the workers cannot hold: reported, not fatal
        for path in (local_db, dask_db):
            path.unlink()
        return {"events": events, "dask_closed": False, "dask_error": str(error)}
    dask_db.unlink()
    dask = {
        "events": events,
        "accounts": on_dask["accounts"],
        "dask_seconds": on_dask["seconds"],
        "dask_closer_peak_rss_mb": on_dask["peak_rss_mb"],
        "dask_worker_peak_mb": on_dask["worker_peak_mb"],
        "dask_worker_restarts": on_dask["worker_restarts"],
        "dask_helper_peak_rss_mb": on_dask["helper_peak_rss_mb"],
        "dask_stage_seconds": on_dask["stage_seconds"],
    }
    skipped = _local_would_not_fit(events)
    if skipped:
        local_db.unlink()
        return {**dask, "local_skipped": skipped}
    local = _close(local_db, now_us, pids)
    local_db.unlink()
    return {
        **dask,
        "local_seconds": local["seconds"],
        "ratio": round(on_dask["seconds"] / max(local["seconds"], 1e-9), 2),
        "local_peak_rss_mb": local["peak_rss_mb"],
        "local_helper_peak_rss_mb": local["helper_peak_rss_mb"],
        "same_alert_count": local["alerts"] == on_dask["alerts"],
        "local_stage_seconds": local["stage_seconds"],
    }


def _next_window(events: int, client: Any, scheduler: str, tmp: Path) -> dict:
    """The window after one this process closed on Dask, closed by this process and by a
    fresh engine on a copy of the store (see the module's docstring)."""
    from rolewatch.pipeline.closer import close_window
    from rolewatch.store.db import open_store

    rng = np.random.default_rng(0)
    accounts = max(20_000, events // 6)
    path, copy = tmp / f"next-{events}.db", tmp / f"next-{events}-restarted.db"
    open_store(_settings(path)).dispose()
    _load_in_chunks(path, rng, events // 5, accounts, FIRST_END - WEEK_US, "t-")
    _load_in_chunks(path, rng, events, accounts, FIRST_END, "w-")
    _load_in_chunks(path, rng, events, accounts, FIRST_END + WEEK_US, "v-")
    now_us = FIRST_END + 5 * WEEK_US
    training = open_store(_settings(path))
    close_window(training, _settings(path), FIRST_END, now_us=now_us)
    training.dispose()
    pids = list(client.run(os.getpid).values())
    on_dask = _settings(path, compute="dask", dask_scheduler=scheduler)
    engine = open_store(on_dask)
    close_window(engine, on_dask, FIRST_END + WEEK_US, now_us=now_us)
    engine.dispose()  # its connections: the engine, and what the closer keeps for it, stay
    shutil.copyfile(path, copy)
    next_end = FIRST_END + 2 * WEEK_US
    kept = _timed_close(engine, on_dask, next_end, now_us, pids)
    engine.dispose()
    del engine  # and with it the first window's kept values (their files on the workers)
    restarted_settings = _settings(copy, compute="dask", dask_scheduler=scheduler)
    restarted = open_store(restarted_settings)
    again = _timed_close(restarted, restarted_settings, next_end, now_us, pids)
    restarted.dispose()
    path.unlink()
    copy.unlink()
    return {
        "events": events,
        "accounts": kept["accounts"],
        "seconds_ratio": round(again["seconds"] / max(kept["seconds"], 1e-9), 2),
        "same_alert_count": kept["alerts"] == again["alerts"],
        **{f"next_{key}": value for key, value in kept.items()},
        **{f"restarted_{key}": value for key, value in again.items()},
    }


def _old_windows_with_pairs(path: Path, keys: int, now_us: int) -> None:
    """:data:`HISTORY_WINDOWS` closed windows before the training window, each with its share
    of ``keys`` random first-seen pair keys (no memberships: they are not in the look-back)."""
    from rolewatch.store.db import open_store, write_transaction
    from rolewatch.store.pairs import insert_window_pairs
    from rolewatch.store.windows import insert_window

    rng = np.random.default_rng(2)
    engine = open_store(_settings(path))
    share = keys // HISTORY_WINDOWS
    for window in range(HISTORY_WINDOWS):
        end_us = FIRST_END - (HISTORY_WINDOWS + 1 - window) * WEEK_US
        part = rng.integers(0, 2**64 - 1, share, dtype=np.uint64, endpoint=True)
        with write_transaction(engine) as connection:
            window_id = insert_window(
                connection,
                start_us=end_us - WEEK_US,
                end_us=end_us,
                closed_us=now_us,
                event_count=share,
                training=True,
                measures=None,
            )
            insert_window_pairs(connection, window_id, part)
    engine.dispose()


def _write_pair_files(path: Path, outputs: str, before_end_us: int) -> None:
    """Every earlier window's pairs in its Parquet file, as the closes would have left them."""
    from rolewatch.scale.pair_outputs import write_window_pairs
    from rolewatch.store.db import open_store
    from rolewatch.store.pairs import known_pair_windows, window_pair_keys

    engine = open_store(_settings(path))
    with engine.connect() as connection:
        for end in known_pair_windows(connection, before_end_us=before_end_us):
            write_window_pairs(outputs, end, window_pair_keys(connection, end_us=end))
    engine.dispose()


def _history_store(path: Path, events: int, keys: int, windows: int) -> int:
    """A store with a training window (closed, fitted), ``windows`` windows of ``events``
    power-law events after it and :data:`HISTORY_WINDOWS` older closed windows holding
    ``keys`` first-seen pairs; returns the ``now_us`` its closes take."""
    from rolewatch.pipeline.closer import close_window
    from rolewatch.store.db import open_store

    rng = np.random.default_rng(0)
    accounts = max(20_000, events // 6)
    open_store(_settings(path)).dispose()
    _load_in_chunks(path, rng, events // 5, accounts, FIRST_END - WEEK_US, "t-")
    for window in range(windows):
        start_us = FIRST_END + window * WEEK_US
        prefix = "w-" if window == 0 else f"w{window}-"
        _load_in_chunks(path, rng, events, accounts, start_us, prefix)
    now_us = FIRST_END + 4 * WEEK_US
    training = open_store(_settings(path))
    close_window(training, _settings(path), FIRST_END, now_us=now_us)
    training.dispose()
    _old_windows_with_pairs(path, keys, now_us)  # after the fit, which would take them in
    return now_us


def _long_history(events: int, client: Any, scheduler: str, tmp: Path, keys: int) -> dict:
    """One window closed on Dask against a long known-pair history, read by this process
    from the store and read by the workers from the outputs (see the module's docstring)."""
    stored, archived = tmp / "history-store.db", tmp / "history-outputs.db"
    now_us = _history_store(stored, events, keys, windows=1)
    shutil.copyfile(stored, archived)
    outputs = str(tmp / "history-outputs")
    end_us = FIRST_END + WEEK_US
    _write_pair_files(archived, outputs, end_us)
    pids = list(client.run(os.getpid).values())
    from_store = _close(stored, now_us, pids, compute="dask", dask_scheduler=scheduler)
    from_outputs = _close(
        archived, now_us, pids, compute="dask", dask_scheduler=scheduler, output_archive=outputs
    )
    stored.unlink()
    archived.unlink()
    shutil.rmtree(outputs)
    return {
        "events": events,
        "known_pairs": keys,
        "accounts": from_store["accounts"],
        "seconds_ratio": round(from_store["seconds"] / max(from_outputs["seconds"], 1e-9), 2),
        "same_alert_count": from_store["alerts"] == from_outputs["alerts"],
        **{f"store_{key}": value for key, value in from_store.items()},
        **{f"outputs_{key}": value for key, value in from_outputs.items()},
    }


def _history_next(events: int, client: Any, scheduler: str, tmp: Path, keys: int) -> dict:
    """The window after one closed against a long history, the history from the outputs and
    from the store: with its ranges kept on the workers, and placed whole (see the module's
    docstring)."""
    base = tmp / "history-next-base.db"
    now_us = _history_store(base, events, keys, windows=2)
    pids = list(client.run(os.getpid).values())
    measured: dict[str, Any] = {"events": events, "known_pairs": keys}
    for source in ("outputs", "store"):
        path = tmp / f"history-next-{source}.db"
        shutil.copyfile(base, path)
        outputs = tmp / f"history-next-{source}-outputs" if source == "outputs" else None
        if outputs is not None:
            _write_pair_files(path, str(outputs), FIRST_END + WEEK_US)
        kept, again = _next_closes(path, outputs, now_us, pids, scheduler)
        measured |= {
            "accounts": kept["accounts"],
            f"{source}_seconds_ratio": round(again["seconds"] / max(kept["seconds"], 1e-9), 2),
            f"{source}_same_alert_count": kept["alerts"] == again["alerts"],
            **{f"{source}_kept_{key}": value for key, value in kept.items()},
            **{f"{source}_placed_whole_{key}": value for key, value in again.items()},
        }
    base.unlink()
    return measured


def _next_closes(
    path: Path, outputs: Path | None, now_us: int, pids: list[int], scheduler: str
) -> tuple[dict, dict]:
    """Close the first window of ``path`` (its history's ranges kept on the workers), then
    the next by this process and on copies of the store and outputs (placed whole)."""
    from rolewatch.store.db import open_store

    common: dict[str, Any] = dict(compute="dask", dask_scheduler=scheduler)
    if outputs is not None:
        common["output_archive"] = str(outputs)
    _close(path, now_us, pids, **common)  # keeps the ranges
    copy = path.with_name(path.stem + "-restarted.db")
    shutil.copyfile(path, copy)
    copied = None if outputs is None else outputs.with_name(outputs.name + "-restarted")
    if outputs is not None and copied is not None:
        shutil.copytree(outputs, copied)
    results = []
    for store, folder in ((path, outputs), (copy, copied)):
        extra = {} if folder is None else {"output_archive": str(folder)}
        settings = _settings(store, **{**common, **extra})
        engine = open_store(settings)
        results.append(_timed_close(engine, settings, FIRST_END + 2 * WEEK_US, now_us, pids))
        engine.dispose()
        store.unlink()
        if folder is not None:
            shutil.rmtree(folder)
    return results[0], results[1]


def _local_would_not_fit(events: int) -> str | None:
    """Why the in-process close of ``events`` events is not run here, or None if it fits."""
    import psutil

    need_mb = events / 1e6 * LOCAL_MB_PER_MILLION_EVENTS
    free_mb = psutil.virtual_memory().available / 2**20
    if need_mb < 0.9 * free_mb:
        return None
    return (
        f"the in-process close would need about {need_mb / 1024:.1f} GB "
        f"({LOCAL_MB_PER_MILLION_EVENTS} MB per million events, measured up to 10,000,000) "
        f"and {free_mb / 1024:.1f} GB is free"
    )


def _write_history_windows(folder: str, accounts: np.ndarray, k: int) -> None:
    """52 windows of outputs for the same accounts, every column filled."""
    from rolewatch.scale.outputs import WindowOutputs, write_window_outputs

    rng = np.random.default_rng(0)
    n = len(accounts)
    for window in range(52):
        mixture = rng.dirichlet(np.ones(k), size=n)
        write_window_outputs(
            folder,
            FIRST_END + window * WEEK_US,
            WindowOutputs(
                accounts=accounts,
                role_ids=tuple(range(1, k + 1)),
                mixture=mixture,
                dominant=mixture.argmax(axis=1) + 1,
                score=rng.normal(size=n),
                status=np.full(n, "scored"),
                events_out=rng.integers(0, 50, size=n),
                events_in=rng.integers(0, 50, size=n),
                basis_version="bench",
                counterparts=rng.integers(0, 20, size=n),
                new_counterparts=rng.integers(0, 5, size=n),
                error=rng.random(n),
                ties=rng.integers(0, 10, size=(n, 4)),
                community=rng.integers(0, 500, size=n),
            ),
        )


def _percentiles(seconds: list[float], prefix: str = "") -> dict:
    ms = np.array(seconds) * 1000
    return {
        f"{prefix}p50_ms": round(float(np.percentile(ms, 50)), 1),
        f"{prefix}p95_ms": round(float(np.percentile(ms, 95)), 1),
    }


def _scan_reads(folder: str, accounts: np.ndarray) -> list[float]:
    """The same reads as one dataset scan with a filter on ``account`` (row-group statistics
    pushdown over every window's file, footers read once): the approach the index replaced."""
    import pyarrow as pa
    import pyarrow.dataset as ds

    partitioning = ds.partitioning(pa.schema([("window_end_us", pa.int64())]), flavor="hive")
    dataset = ds.dataset(folder, format="parquet", partitioning=partitioning)
    for fragment in dataset.get_fragments():
        fragment.ensure_complete_metadata()
    seconds = []
    for account in accounts:
        started = time.perf_counter()
        table = dataset.to_table(filter=ds.field("account") == str(account), use_threads=False)
        table.to_pylist()
        seconds.append(time.perf_counter() - started)
        assert table.num_rows == 52
    return seconds


def _history(quick: bool) -> dict:
    from rolewatch.scale.output_reads import OutputIndex, account_history

    rng = np.random.default_rng(1)
    n = 20_000 if quick else 200_000
    accounts = np.array([f"a-{i:07d}" for i in range(n)])
    with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
        _write_history_windows(tmp, accounts, k=8)
        index = OutputIndex(tmp)
        started = time.perf_counter()
        account_history(index, str(accounts[0]))  # the first read opens every window's index
        open_seconds = time.perf_counter() - started
        seconds = []
        for account in rng.choice(accounts, size=200):
            started = time.perf_counter()
            rows = account_history(index, str(account))
            seconds.append(time.perf_counter() - started)
            assert len(rows) == 52
        scan = _scan_reads(tmp, rng.choice(accounts, size=50))
    return {
        "windows": 52,
        "rows": 52 * n,
        **_percentiles(seconds),
        "open_ms": round(open_seconds * 1000, 1),
        **_percentiles(scan, "dataset_scan_"),
        "target_p95_ms": 100,
    }


def run(case: str, *, quick: bool = False) -> Iterator[dict]:
    from distributed import Client, LocalCluster

    if case not in CASES:
        raise ValueError(f"unknown case {case!r}")
    if case == "archive-history-52":
        yield {"case": case, "cores": os.cpu_count(), **_history(quick)}
        return
    cluster = LocalCluster(
        n_workers=2, threads_per_worker=1, memory_limit=WORKER_MEMORY, dashboard_address=None
    )
    client = Client(cluster)
    try:
        with tempfile.TemporaryDirectory(prefix="rolewatch-bench-") as tmp:
            for events in (QUICK if quick else SIZES)[case]:
                address, folder = cluster.scheduler_address, Path(tmp)
                if case == "close-dask-next":
                    measured = _next_window(events, client, address, folder)
                elif case in ("close-dask-history", "close-dask-history-next"):
                    keys = 1_000_000 if quick else HISTORY_KEYS
                    history = _long_history if case == "close-dask-history" else _history_next
                    measured = history(events, client, address, folder, keys)
                else:
                    measured = _one_size(events, client, address, folder)
                yield {
                    "case": case,
                    "cores": os.cpu_count(),
                    "workers": 2,
                    "worker_memory_limit": WORKER_MEMORY,
                    **measured,
                }
    finally:
        from rolewatch.scale.dispatch import close_clients

        close_clients()
        client.close()
        cluster.close()
