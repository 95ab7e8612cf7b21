"""Working the alerts: the case queue, one case, review changes, notes, reviewers and the
review figures (JSON and CSV).

Reading and commenting need the read scope; changing a case's state or assignee needs the
review scope (admin implies it). A change carries the ``version`` the reviewer read: a stale
one gets 409 with the case as it is now, so nothing is silently overwritten.
"""

from __future__ import annotations

import re
from typing import Any, Literal

from fastapi import APIRouter, HTTPException, Path, Query, Response, status
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import ReadKey, ReviewKey, SettingsDep, StoreDep
from rolewatch.api.models import Problem
from rolewatch.api.review_models import (
    CaseConflict,
    CaseDetail,
    CasePage,
    CasePatch,
    HistoryEntry,
    NoteCreate,
    Reviewers,
    ReviewStats,
    State,
)
from rolewatch.api.timeparams import time_range
from rolewatch.review import cases, stats
from rolewatch.review.states import ReviewRuleError
from rolewatch.store.review import CaseFilters

router = APIRouter(tags=["review"])
ERRORS: dict[int | str, dict[str, Any]] = {401: {"model": Problem}, 403: {"model": Problem}}
CASE_ID = Path(ge=1, le=2**63 - 1)
_KEY_ID = re.compile(r"[A-Za-z0-9]{1,32}")
_CONTROL = re.compile("[\x00-\x1f\x7f]")


def _not_found(error: LookupError) -> HTTPException:
    return HTTPException(status.HTTP_404_NOT_FOUND, detail=str(error).strip("'\""))


def _unprocessable(error: ValueError) -> HTTPException:
    return HTTPException(422, detail=str(error))


def _assignee_filter(assignee: str | None, me: str) -> str | None:
    if assignee is None or assignee == "":
        return None
    if assignee == "me":
        return me
    if assignee != "none" and not _KEY_ID.fullmatch(assignee):
        raise HTTPException(
            status.HTTP_400_BAD_REQUEST,
            detail="assignee: a reviewer's key id, 'me' or 'none' (unassigned)",
        )
    return assignee


def _offset(cursor: str | None) -> int:
    if not cursor:
        return 0
    if not cursor.isdigit() or len(cursor) > 12:
        raise HTTPException(
            status.HTTP_400_BAD_REQUEST, detail="cursor: use the next_cursor of a previous page"
        )
    return int(cursor)


@router.get(
    "/v1/cases",
    response_model=CasePage,
    summary="The case queue: one case per account, highest latest score first",
    responses={**ERRORS, 400: {"model": Problem}},
)
async def list_cases(
    store: StoreDep,
    settings: SettingsDep,
    key: ReadKey,
    state: list[State] | None = Query(None, description="Repeat for several states."),
    assignee: str | None = Query(
        None, max_length=32, description="A reviewer's key id, 'me', or 'none' (unassigned)."
    ),
    min_score: float | None = Query(None, ge=0, le=1e300, description="Latest score at least."),
    from_: str | None = Query(
        None,
        alias="from",
        description="RFC 3339: cases with an alert in a window ending at or after it.",
    ),
    to: str | None = Query(None, description="RFC 3339: ... and before it."),
    account: str | None = Query(None, max_length=200),
    limit: int = Query(50, ge=1, le=500),
    cursor: str | None = Query(None, description="next_cursor of the previous page."),
) -> dict[str, Any]:
    start, end = time_range(from_, to)
    if account is not None and _CONTROL.search(account):
        raise HTTPException(status.HTTP_400_BAD_REQUEST, detail="account: no control characters")
    filters = CaseFilters(
        states=tuple(state or ()),
        assignee=_assignee_filter(assignee, key.key_id),
        min_score=min_score,
        from_us=start,
        to_us=end,
        account=account,
    )
    offset = _offset(cursor)
    found, total = await run_in_threadpool(
        cases.list_queue, store, settings, filters, limit=limit, offset=offset
    )
    more = offset + len(found) < total
    return {"cases": found, "total": total, "next_cursor": str(offset + limit) if more else None}


@router.get(
    "/v1/cases/{case_id}",
    response_model=CaseDetail,
    summary="One case with its alerts and audit history (your view is recorded)",
    responses={**ERRORS, 404: {"model": Problem}},
)
async def get_case(
    store: StoreDep, settings: SettingsDep, key: ReadKey, case_id: int = CASE_ID
) -> dict[str, Any]:
    try:
        return await run_in_threadpool(cases.case_detail, store, settings, case_id, viewer=key)
    except cases.CaseNotFound as error:
        raise _not_found(error) from None


@router.patch(
    "/v1/cases/{case_id}",
    response_model=CaseDetail,
    summary="Change a case's state and/or assignee (review scope; send the version you read)",
    responses={
        **ERRORS,
        404: {"model": Problem},
        409: {"model": CaseConflict, "description": "The case changed since that version."},
        422: {"model": Problem},
    },
)
async def patch_case(
    store: StoreDep,
    settings: SettingsDep,
    key: ReviewKey,
    body: CasePatch,
    case_id: int = CASE_ID,
) -> Any:
    change = cases.CaseChange(
        version=body.version,
        state=body.state,
        reason=body.reason,
        text=body.text,
        assignee=body.assignee if "assignee" in body.model_fields_set else cases.UNSET,
    )
    try:
        return await run_in_threadpool(cases.change_case, store, settings, case_id, key, change)
    except cases.CaseNotFound as error:
        raise _not_found(error) from None
    except cases.VersionConflict as conflict:
        return JSONResponse(
            {"detail": str(conflict), "case": conflict.current},
            status_code=status.HTTP_409_CONFLICT,
        )
    except ReviewRuleError as error:
        raise _unprocessable(error) from None


@router.post(
    "/v1/cases/{case_id}/notes",
    status_code=201,
    response_model=HistoryEntry,
    summary="Add a note to a case's history (read scope)",
    responses={**ERRORS, 404: {"model": Problem}, 422: {"model": Problem}},
)
async def add_note(
    store: StoreDep, settings: SettingsDep, key: ReadKey, body: NoteCreate, case_id: int = CASE_ID
) -> dict[str, Any]:
    try:
        return await run_in_threadpool(cases.add_note, store, settings, case_id, key, body.text)
    except cases.CaseNotFound as error:
        raise _not_found(error) from None
    except ReviewRuleError as error:
        raise _unprocessable(error) from None


@router.get(
    "/v1/reviewers",
    response_model=Reviewers,
    summary="Keys that may review cases, by display name (for assignment)",
    responses=ERRORS,
)
async def list_reviewers(store: StoreDep, _key: ReadKey) -> dict[str, Any]:
    return {"reviewers": await run_in_threadpool(cases.reviewers, store)}


@router.get(
    "/v1/review/stats",
    response_model=ReviewStats,
    summary="Review figures: raised, reviewed, confirmed, dismissed by reason, time to review, "
    "precision; per window and per role move",
    responses={**ERRORS, 400: {"model": Problem}},
)
async def review_stats(
    store: StoreDep,
    _key: ReadKey,
    from_: str | None = Query(
        None, alias="from", description="RFC 3339: windows ending at or after it."
    ),
    to: str | None = Query(None, description="RFC 3339: windows ending before it."),
) -> dict[str, Any]:
    start, end = time_range(from_, to)
    return await run_in_threadpool(stats.review_figures, store, from_us=start, to_us=end)


@router.get(
    "/v1/review/stats.csv",
    summary="The review figures per window or per role move, as CSV",
    response_class=Response,
    responses={**ERRORS, 400: {"model": Problem}, 200: {"content": {"text/csv": {}}}},
)
async def review_stats_csv(
    store: StoreDep,
    _key: ReadKey,
    by: Literal["window", "transition"] = Query("window"),
    from_: str | None = Query(None, alias="from"),
    to: str | None = Query(None),
) -> Response:
    start, end = time_range(from_, to)
    figures = await run_in_threadpool(stats.review_figures, store, from_us=start, to_us=end)
    body = stats.figures_csv(figures, by)
    return Response(
        body,
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="review-{by}.csv"'},
    )
