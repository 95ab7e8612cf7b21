"""Prometheus metrics of the service, in one registry that ``GET /metrics`` exposes.

Other modules import the metric objects from here and increment them. No label ever carries
an account id, an event id or any other value supplied by clients: label values come from
short fixed lists (outcome names, job names, route templates), so the number of series stays
bounded.
"""

from __future__ import annotations

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
)

from rolewatch.pipeline.stages import STAGES

REGISTRY = CollectorRegistry(auto_describe=True)

EVENTS_ACCEPTED = Counter(
    "rolewatch_events_accepted_total", "Events stored by ingest.", registry=REGISTRY
)
EVENTS_REJECTED = Counter(
    "rolewatch_events_rejected_total", "Events refused by ingest validation.", registry=REGISTRY
)
EVENTS_DUPLICATE = Counter(
    "rolewatch_events_duplicate_total",
    "Events whose id was already stored (idempotent retries).",
    registry=REGISTRY,
)
EVENTS_LATE = Counter(
    "rolewatch_events_late_total",
    "Events stored after the window that covers them had closed.",
    registry=REGISTRY,
)
INGEST_BATCHES = Counter(
    "rolewatch_ingest_batches_total", "Batches passed to ingest.", registry=REGISTRY
)
WINDOWS_CLOSED = Counter(
    "rolewatch_windows_closed_total", "Windows closed by the window closer.", registry=REGISTRY
)
WINDOW_CLOSE_SECONDS = Histogram(
    "rolewatch_window_close_seconds",
    "Time to close one window (snapshot, features, memberships, scores, alerts).",
    buckets=(0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 120, 300, 600),
    registry=REGISTRY,
)
WINDOW_STAGE_SECONDS = Histogram(
    "rolewatch_window_stage_seconds",
    "Time one window close spent in each stage (load, features, ties, memberships, history, "
    "bridging, scoring, evidence, store).",
    ["stage"],
    buckets=(0.01, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 120, 300),
    registry=REGISTRY,
)
ALERTS_RAISED = Counter(
    "rolewatch_alerts_raised_total", "Alerts raised by window closing.", registry=REGISTRY
)
DELIVERIES = Counter(
    "rolewatch_deliveries_total",
    "Webhook delivery attempts by outcome (delivered, retry, failed).",
    ["outcome"],
    registry=REGISTRY,
)
JOB_RUNS = Counter(
    "rolewatch_job_runs_total",
    "Background job runs by job and outcome (ok, error).",
    ["job", "outcome"],
    registry=REGISTRY,
)
HTTP_REQUESTS = Counter(
    "rolewatch_http_requests_total",
    "HTTP requests by method, route template and status code.",
    ["method", "route", "status"],
    registry=REGISTRY,
)
LAST_INGEST = Gauge(
    "rolewatch_last_ingest_timestamp_seconds",
    "Unix time of the last batch that carried valid events (this process).",
    registry=REGISTRY,
)

for _stage in STAGES:
    WINDOW_STAGE_SECONDS.labels(stage=_stage)
for _outcome in ("delivered", "retry", "failed"):
    DELIVERIES.labels(outcome=_outcome)
for _job in ("close_windows", "deliver"):
    for _result in ("ok", "error"):
        JOB_RUNS.labels(job=_job, outcome=_result)


def exposition() -> tuple[bytes, str]:
    """The registry in Prometheus text format, and its content type."""
    return generate_latest(REGISTRY), CONTENT_TYPE_LATEST


def record_window_closed(
    *, seconds: float, alerts: int = 0, stages: dict[str, float] | None = None
) -> None:
    """Count one closed window: its close duration, the seconds of each of its stages and
    the alerts it raised."""
    WINDOWS_CLOSED.inc()
    WINDOW_CLOSE_SECONDS.observe(seconds)
    for stage, stage_seconds in (stages or {}).items():
        WINDOW_STAGE_SECONDS.labels(stage=stage).observe(stage_seconds)
    if alerts:
        ALERTS_RAISED.inc(alerts)
