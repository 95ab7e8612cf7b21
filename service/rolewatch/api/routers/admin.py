"""Admin routes: POST /v1/admin/basis (refit the role basis on a reference period) and
GET /v1/admin/keys (list API keys, never their secrets)."""

from __future__ import annotations

import logging

from fastapi import APIRouter, Body, Depends, HTTPException, Request, status
from fastapi.encoders import jsonable_encoder
from starlette.concurrency import run_in_threadpool

from rolewatch.api.auth import require_scope
from rolewatch.api.models import KeyInfo, Problem, RefitRequest
from rolewatch.api.timeparams import time_range
from rolewatch.clock import to_rfc3339
from rolewatch.store.keys import list_keys

router = APIRouter(tags=["admin"])
log = logging.getLogger(__name__)


def _refit(engine, settings, start_us: int, end_us: int):
    from rolewatch.pipeline.lifecycle import refit_basis

    return refit_basis(engine, settings, start_us, end_us)


@router.post(
    "/v1/admin/basis",
    summary="Refit the role basis on a reference period (admin)",
    responses={
        400: {"model": Problem},
        401: {"model": Problem},
        403: {"model": Problem},
        503: {"model": Problem},
    },
)
async def refit(
    request: Request, body: RefitRequest = Body(...), key=Depends(require_scope("admin"))
):
    """Fit a new feature recipe and role basis on the closed windows of ``[from, to)``; its
    roles are matched to the old ones so ids stay stable where roles persist."""
    start, end = time_range(body.from_, body.to)
    log.info("basis refit requested", extra={"fields": {"key_id": key.key_id}})
    try:
        outcome = await run_in_threadpool(
            _refit, request.app.state.engine, request.app.state.settings, start, end
        )
    except ImportError:
        raise HTTPException(
            status.HTTP_503_SERVICE_UNAVAILABLE,
            detail="basis refitting is not available in this build",
        ) from None
    except ValueError as error:
        raise HTTPException(status.HTTP_400_BAD_REQUEST, detail=str(error)) from None
    if hasattr(outcome, "to_dict") and not isinstance(outcome, dict):
        outcome = {"basis_version": getattr(outcome, "version", None)}
    return jsonable_encoder(outcome)


@router.get(
    "/v1/admin/keys",
    response_model=list[KeyInfo],
    summary="API keys (admin)",
    responses={401: {"model": Problem}, 403: {"model": Problem}},
)
async def get_keys(request: Request, _key=Depends(require_scope("admin"))) -> list[dict]:
    keys = await run_in_threadpool(list_keys, request.app.state.engine)
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
