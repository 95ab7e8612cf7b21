"""The background scheduler: jobs run on their tick, failures are counted and never stop it."""

from __future__ import annotations

import time
from datetime import timedelta

from fastapi.testclient import TestClient

from rolewatch import metrics
from rolewatch.api.app import create_app
from rolewatch.api.jobs import run_job


def job_runs(job: str, outcome: str) -> float:
    return metrics.JOB_RUNS.labels(job=job, outcome=outcome)._value.get()


def test_a_failing_job_is_logged_and_counted_not_raised(caplog):
    before = job_runs("close_windows", "error")
    run_job("close_windows", None, None)  # the real closer, given no store, fails
    assert job_runs("close_windows", "error") == before + 1
    assert any("job close_windows failed" in r.getMessage() for r in caplog.records)


def test_scheduler_runs_both_jobs_every_tick_and_stops(app_settings):
    settings = app_settings.model_copy(update={"tick_interval": timedelta(seconds=0.5)})
    before = {
        job: job_runs(job, "ok") + job_runs(job, "error") for job in ("close_windows", "deliver")
    }
    app = create_app(settings, run_jobs=True)
    with TestClient(app) as client:
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:
            done = {
                job: job_runs(job, "ok") + job_runs(job, "error") - before[job] for job in before
            }
            if all(count >= 2 for count in done.values()):
                break
            time.sleep(0.2)
        assert all(count >= 2 for count in done.values()), done
        assert client.get("/healthz").status_code == 200  # the API answers while jobs run
    # After shutdown no job runs any more.
    settled = {job: job_runs(job, "ok") + job_runs(job, "error") for job in before}
    time.sleep(1.2)
    assert settled == {job: job_runs(job, "ok") + job_runs(job, "error") for job in before}
