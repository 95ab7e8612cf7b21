"""Admin routes: POST /v1/admin/basis (refit the role basis on a reference period) and
GET /v1/admin/keys (list API keys, never their secrets)."""

from __future__ import annotations

import logging
from typing import Any

from fastapi import APIRouter, Body, HTTPException, status
from fastapi.encoders import jsonable_encoder
from sqlalchemy.engine import Engine
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import AdminKey, SettingsDep, StoreDep
from rolewatch.api.models import KeyInfo, Problem, RefitRequest
from rolewatch.api.timeparams import required_time_range
from rolewatch.clock import to_rfc3339
from rolewatch.config import Settings
from rolewatch.store.keys import list_keys

router = APIRouter(tags=["admin"])
log = logging.getLogger(__name__)


def _refit(engine: Engine, settings: Settings, start_us: int, end_us: int) -> dict[str, Any]:
    from rolewatch.pipeline.lifecycle import refit_basis

    return refit_basis(engine, settings, start_us, end_us)


@router.post(
    "/v1/admin/basis",
    summary="Refit the role basis on a reference period (admin)",
    response_model=None,
    responses={
        400: {"model": Problem},
        401: {"model": Problem},
        403: {"model": Problem},
        503: {"model": Problem},
    },
)
async def refit(
    store: StoreDep, settings: SettingsDep, key: AdminKey, body: RefitRequest = Body(...)
) -> Any:
    """Fit a new feature recipe and role basis on the closed windows of ``[from, to)``; its
    roles are matched to the old ones so ids stay stable where roles persist."""
    start, end = required_time_range(body.from_, body.to)
    log.info("basis refit requested", extra={"fields": {"key_id": key.key_id}})
    try:
        outcome = await run_in_threadpool(_refit, store, settings, start, end)
    except ImportError:
        raise HTTPException(
            status.HTTP_503_SERVICE_UNAVAILABLE,
            detail="basis refitting is not available in this build",
        ) from None
    except ValueError as error:
        raise HTTPException(status.HTTP_400_BAD_REQUEST, detail=str(error)) from None
    return jsonable_encoder(outcome)


@router.get(
    "/v1/admin/keys",
    response_model=list[KeyInfo],
    summary="API keys (admin)",
    responses={401: {"model": Problem}, 403: {"model": Problem}},
)
async def get_keys(store: StoreDep, _key: AdminKey) -> list[dict[str, Any]]:
    keys = await run_in_threadpool(list_keys, store)
    return [
        {
            "key_id": k.key_id,
            "scopes": list(k.scopes),
            "label": k.label,
            "created": to_rfc3339(k.created_us),
            "revoked": None if k.revoked_us is None else to_rfc3339(k.revoked_us),
        }
        for k in keys
    ]
