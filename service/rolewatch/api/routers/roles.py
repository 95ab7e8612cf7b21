"""GET /v1/roles (the active role basis) and PATCH /v1/roles/{id} (rename, admin)."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Body, HTTPException, Path, status
from starlette.concurrency import run_in_threadpool

from rolewatch.api.deps import AdminKey, ReadKey, StoreDep
from rolewatch.api.models import Problem, RenameRole, Role, RolesResponse
from rolewatch.clock import to_rfc3339
from rolewatch.store import queries

router = APIRouter(tags=["roles"])


def _opt_time(value: int | None) -> str | None:
    return None if value is None else to_rfc3339(value)


@router.get(
    "/v1/roles",
    response_model=RolesResponse,
    summary="The frozen role basis",
    responses={401: {"model": Problem}, 403: {"model": Problem}},
)
async def get_roles(store: StoreDep, _key: ReadKey) -> dict[str, Any]:
    """Each role's id, name, description and profile: per readable measure the role's
    average account, the population's average and the role's level; feature weights."""
    found = await run_in_threadpool(queries.list_roles, store)
    basis = found["basis"]
    if basis is None:
        return {
            "basis_version": None,
            "roles": [],
            "message": "no role basis yet: it is fitted when the first training windows "
            "have closed (or by POST /v1/admin/basis)",
        }
    return {
        "basis_version": basis["version"],
        "recipe_version": basis["recipe_version"],
        "created": _opt_time(basis["created_us"]),
        "trained_from": _opt_time(basis["trained_from_us"]),
        "trained_to": _opt_time(basis["trained_to_us"]),
        "roles": found["roles"],
    }


@router.patch(
    "/v1/roles/{role_id}",
    response_model=Role,
    summary="Rename a role (admin)",
    responses={401: {"model": Problem}, 403: {"model": Problem}, 404: {"model": Problem}},
)
async def patch_role(
    store: StoreDep,
    _key: AdminKey,
    role_id: int = Path(ge=0, le=2**31 - 1),
    body: RenameRole = Body(...),
) -> dict[str, Any]:
    """Give a role of the active basis a new name (shown in alerts, history and pages)."""
    role = await run_in_threadpool(queries.rename_role, store, role_id, body.name.strip())
    if role is None:
        raise HTTPException(
            status.HTTP_404_NOT_FOUND, detail=f"no role {role_id} in the active basis"
        )
    return role
