"""The training close (the fit and the training windows' back-fill) on a local Dask cluster
and in the closing process, side by side in one run.

``train-dask``: a SQLite store gets one training window of 10,000,000 events (the bench
generator's power-law window, :func:`rolewatch.bench.close._power_law_events`), and the
window is closed twice on copies of the store, each time by a fresh process (so each
close's peak memory is its own): with ``compute = "dask"`` on a local cluster of two worker
processes (one thread and ``memory_limit`` 3 GB each: discovery's candidates and the
back-fill computed on the workers, only the training sample's rows gathered) and with
``compute = "local"`` (all of it in the closing process).
Both fit on the default sample of ``training_sample_accounts`` accounts. Reported for each:
the close's seconds and stages, the peak resident memory of the closing process (and what it
held as the close began), of its helper processes (the communities' child) and of each
worker (sampled every 0.2 s with psutil); the fit's own seconds and the closing process's
memory as it began and its peak during it (measured around the closer's call of it);
whether the two models keep the same features and roles; and the ratios dask / local.
``--quick`` uses 300,000 events.
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
from rolewatch.bench.memory import PeakMemory
from rolewatch.bench.scale import (
    _load_in_chunks,
    _settings,
    _timed_close,
    side_by_side_on_cluster,
)

CASES = ("train-dask",)
SIZES = {"train-dask": 10_000_000}
QUICK = {"train-dask": 300_000}
COMPUTES = ("dask", "local")


def _side_by_side(events: int, client: Any, scheduler: str, tmp: Path) -> dict:
    from rolewatch.store.db import open_store

    rng = np.random.default_rng(0)
    accounts = max(20_000, events // 6)
    stored = tmp / "stored.db"
    open_store(_settings(stored)).dispose()
    _load_in_chunks(stored, rng, events, accounts, FIRST_END - WEEK_US, "t-")
    pids = list(client.run(os.getpid).values())
    closes = {}
    for compute in COMPUTES:
        path = tmp / f"{compute}.db"
        shutil.copyfile(stored, path)
        with ProcessPoolExecutor(max_workers=1, mp_context=get_context("spawn")) as pool:
            closes[compute] = pool.submit(
                _close_fresh, str(path), compute, scheduler, pids
            ).result()
        path.unlink()
    dask, local = closes["dask"], closes["local"]
    features, roles = dask.pop("features"), dask.pop("roles")
    return {
        "events": events,
        "accounts": dask["accounts"],
        "features": len(features),
        "roles": roles,
        "same_features": features == local.pop("features"),
        "same_roles": roles == local.pop("roles"),
        "fit_seconds_ratio": round(dask["fit_seconds"] / max(local["fit_seconds"], 1e-9), 2),
        "seconds_ratio": round(dask["seconds"] / max(local["seconds"], 1e-9), 2),
        "peak_rss_ratio": round(dask["peak_rss_mb"] / max(local["peak_rss_mb"], 1e-9), 2),
        **{
            f"{compute}_{key}": value
            for compute in COMPUTES
            for key, value in closes[compute].items()
        },
    }


def _close_fresh(path: str, compute: str, scheduler: str, pids: list[int]) -> dict:
    """Close the training window in this (fresh) process with ``compute``; the fit's own
    seconds are timed around the closer's call of it."""
    import time

    from rolewatch.pipeline import closer
    from rolewatch.pipeline.model import load_active_model
    from rolewatch.scale.dispatch import close_clients
    from rolewatch.store.db import open_store

    fitted: list[float] = []
    fit_peaks: list[float] = []
    fit_starts: list[float] = []
    fit_for = closer.fit_for

    def timed_fit(*args: Any) -> Any:
        with PeakMemory([]) as memory:
            fit_starts.append(memory.start_mb)
            started = time.perf_counter()
            try:
                return fit_for(*args)
            finally:
                fitted.append(time.perf_counter() - started)
                fit_peaks.append(memory.peak_mb)

    closer.fit_for = timed_fit  # type: ignore[assignment]
    settings = _settings(Path(path), compute=compute, dask_scheduler=scheduler)
    engine = open_store(settings)
    try:
        closed = _timed_close(engine, settings, FIRST_END, FIRST_END + 4 * WEEK_US, pids)
        with engine.connect() as connection:
            model = load_active_model(connection)
        assert model is not None, "the training close stores the model"
        return {
            **closed,
            "fit_seconds": round(sum(fitted), 2),
            "fit_start_rss_mb": round(min(fit_starts, default=0.0), 1),
            "fit_peak_rss_mb": round(max(fit_peaks, default=0.0), 1),
            "features": list(model.recipe.names),
            "roles": [info.name for info in model.roles],
        }
    finally:
        engine.dispose()
        close_clients()


def run(case: str, *, quick: bool = False) -> Iterator[dict]:
    if case not in CASES:
        raise ValueError(f"unknown case {case!r}")
    events = (QUICK if quick else SIZES)[case]
    yield from side_by_side_on_cluster(case, events, COMPUTES, _side_by_side)
