"""Structured logging: one JSON object per line, each carrying the request id when there is one.

Log records never carry secrets (API keys, signing secrets) or event payloads at INFO: only
counts, ids the service itself made, durations and outcomes. Use ``extra={"fields": {...}}``
to add structured fields to a record.
"""

from __future__ import annotations

import contextvars
import json
import logging
import sys
import time

REQUEST_ID: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "rolewatch_request_id", default=None
)


class JsonFormatter(logging.Formatter):
    """Format a record as one JSON line: time (RFC 3339 UTC), level, logger, message, fields."""

    def format(self, record: logging.LogRecord) -> str:
        document = {
            "time": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = REQUEST_ID.get()
        if request_id:
            document["request_id"] = request_id
        fields = getattr(record, "fields", None)
        if isinstance(fields, dict):
            document.update(fields)
        if record.exc_info:
            document["exception"] = self.formatException(record.exc_info)
        return json.dumps(document, default=str, ensure_ascii=False)


class _PlainFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        line = super().format(record)
        request_id = REQUEST_ID.get()
        fields = getattr(record, "fields", None)
        extra = " ".join(f"{k}={v}" for k, v in (fields or {}).items())
        return " ".join(
            part for part in (line, f"request_id={request_id}" if request_id else "", extra) if part
        )


def configure_logging(level: str = "INFO", *, json_lines: bool = True, stream=None) -> None:
    """Send rolewatch's (and uvicorn's) logs to ``stream`` (stderr) in one format."""
    handler = logging.StreamHandler(stream or sys.stderr)
    handler.setFormatter(
        JsonFormatter()
        if json_lines
        else _PlainFormatter("%(asctime)s %(levelname)s %(name)s %(message)s")
    )
    root = logging.getLogger()
    for existing in list(root.handlers):
        if getattr(existing, "_rolewatch", False):
            root.removeHandler(existing)
    handler._rolewatch = True  # type: ignore[attr-defined]
    root.addHandler(handler)
    root.setLevel(level)
    for name in ("uvicorn", "uvicorn.error", "uvicorn.access", "apscheduler", "alembic"):
        logger = logging.getLogger(name)
        logger.handlers = []
        logger.propagate = True
    # Access lines repeat what the request log below says; keep them at WARNING.
    logging.getLogger("uvicorn.access").setLevel("WARNING")
    logging.getLogger("apscheduler").setLevel("WARNING")
    # A window close often outlasts one tick; the scheduler then skips that tick's run, which
    # is the intended behaviour (max_instances=1), not something to warn about every second.
    scheduler_log = logging.getLogger("apscheduler.scheduler")
    if not any(isinstance(f, _SkippedRunFilter) for f in scheduler_log.filters):
        scheduler_log.addFilter(_SkippedRunFilter())
    logging.getLogger("alembic").setLevel("WARNING")
    # httpx logs every request's full URL at INFO; webhook URLs often carry a token.
    logging.getLogger("httpx").setLevel("WARNING")
    logging.getLogger("httpcore").setLevel("WARNING")


class _SkippedRunFilter(logging.Filter):
    """Drop APScheduler's "skipped: maximum number of running instances reached" lines."""

    def filter(self, record: logging.LogRecord) -> bool:
        return "maximum number of running instances reached" not in record.getMessage()
