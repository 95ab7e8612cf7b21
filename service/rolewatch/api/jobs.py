"""The background jobs the scheduler runs every ``tick_interval``.

Each job imports its worker function when it runs, so the app starts (and the API serves)
even while a worker module is missing or broken. A failing run is logged and counted in
``rolewatch_job_runs_total{outcome="error"}``; it never stops the scheduler.
"""

from __future__ import annotations

import importlib
import logging
import time
from typing import TYPE_CHECKING

from sqlalchemy.engine import Engine

from rolewatch import metrics
from rolewatch.clock import now_micros
from rolewatch.config import Settings

if TYPE_CHECKING:
    from apscheduler.schedulers.background import BackgroundScheduler

log = logging.getLogger(__name__)

JOBS = {
    "close_windows": ("rolewatch.pipeline.closer", "close_due_windows"),
    "deliver": ("rolewatch.delivery.worker", "deliver_due"),
    "retention": ("rolewatch.store.retention", "purge_expired"),  # no-op when retention_windows=0
}
_missing_reported: set[str] = set()


def run_job(name: str, engine: Engine, settings: Settings) -> None:
    """Run one job once, catching and logging every error."""
    module_name, function_name = JOBS[name]
    started = time.perf_counter()
    try:
        function = getattr(importlib.import_module(module_name), function_name)
    except (ImportError, AttributeError) as error:
        metrics.JOB_RUNS.labels(job=name, outcome="error").inc()
        if name not in _missing_reported:  # say it once, not every tick
            _missing_reported.add(name)
            log.error("job %s unavailable: %s", name, error)
        return
    try:
        function(engine, settings, now_us=now_micros())
    except Exception:
        metrics.JOB_RUNS.labels(job=name, outcome="error").inc()
        log.exception("job %s failed", name, extra={"fields": {"job": name}})
        return
    metrics.JOB_RUNS.labels(job=name, outcome="ok").inc()
    log.debug(
        "job %s ran",
        name,
        extra={"fields": {"job": name, "seconds": round(time.perf_counter() - started, 4)}},
    )


def stop_scheduler(scheduler: BackgroundScheduler) -> None:
    """Graceful stop: the closer finishes the window it is on and takes no other, running
    deliveries finish, then the scheduler's threads end."""
    from rolewatch.pipeline.closer import SHUTDOWN

    SHUTDOWN.set()
    try:
        scheduler.shutdown(wait=True)
    finally:
        SHUTDOWN.clear()  # direct callers of the closer in this process (tests, replay) go on


def start_scheduler(engine: Engine, settings: Settings) -> BackgroundScheduler:
    """A started APScheduler 3.x BackgroundScheduler with the jobs (threads, off the loop)."""
    from apscheduler.schedulers.background import BackgroundScheduler

    from rolewatch.pipeline.closer import SHUTDOWN

    SHUTDOWN.clear()

    scheduler = BackgroundScheduler(timezone="UTC")
    seconds = settings.tick_interval.total_seconds()
    for name in JOBS:
        scheduler.add_job(
            run_job,
            "interval",
            seconds=seconds,
            args=(name, engine, settings),
            id=name,
            name=name,
            max_instances=1,
            coalesce=True,
            misfire_grace_time=max(1, int(seconds)),
        )
    scheduler.start()
    return scheduler
