"""GET /v1/windows: closed windows with their counts, and the windows still open."""

from __future__ import annotations

import json
from typing import Any

from fastapi import APIRouter, Query
from sqlalchemy.engine import Engine
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import ReadKey, SettingsDep, StoreDep
from rolewatch.api.models import Problem, WindowsResponse
from rolewatch.clock import now_micros, to_rfc3339
from rolewatch.config import Settings
from rolewatch.store import queries

router = APIRouter(tags=["windows"])


def _opt(value: int | None) -> str | None:
    return None if value is None else to_rfc3339(value)


def _stages(stored: str | None) -> dict[str, float] | None:
    return None if stored is None else json.loads(stored)


def windows_document(engine: Engine, settings: Settings, now_us: int, limit: int) -> dict[str, Any]:
    """The API form of the closed windows (newest first) and the open ones at ``now_us``."""
    closed = queries.list_windows(engine, limit=limit)
    pending = queries.open_windows(engine, settings, now_us=now_us)
    return {
        "watermark": _opt(pending["watermark_us"]),
        "latest_event": _opt(pending["max_event_us"]),
        "open": [
            {
                "start": to_rfc3339(w["start_us"]),
                "end": to_rfc3339(w["end_us"]),
                "status": w["status"],
                "event_count": w["event_count"],
            }
            for w in pending["windows"]
        ],
        "closed": [
            {
                "id": w["id"],
                "start": to_rfc3339(w["start_us"]),
                "end": to_rfc3339(w["end_us"]),
                "status": w["status"],
                "closed": to_rfc3339(w["closed_us"]),
                "event_count": w["event_count"],
                "account_count": w["account_count"],
                "late_count": w["late_count"],
                "alert_count": w["alert_count"],
                "new_count": w.get("new_count"),
                "inactive_count": w.get("inactive_count"),
                "scored_count": w.get("scored_count"),
                "training": bool(w["training"]),
                "recipe_version": w["recipe_version"],
                "basis_version": w["basis_version"],
                "reconstruction_error": w["reconstruction_error"],
                "close_seconds": w["close_seconds"],
                "stage_seconds": _stages(w.get("stage_seconds")),
            }
            for w in closed
        ],
    }


@router.get(
    "/v1/windows",
    response_model=WindowsResponse,
    summary="Closed and open windows",
    responses={401: {"model": Problem}, 403: {"model": Problem}},
)
async def get_windows(
    store: StoreDep,
    settings: SettingsDep,
    _key: ReadKey,
    limit: int = Query(200, ge=1, le=5000, description="Most recent closed windows to list."),
) -> dict[str, Any]:
    """Closed windows newest first (counts, late counts, reconstruction error) and the open
    windows computed from the settings and the watermark, with their events so far."""
    return await run_in_threadpool(windows_document, store, settings, now_micros(), limit)
