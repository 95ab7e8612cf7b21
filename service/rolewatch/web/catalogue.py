"""The role catalogue page: each role's name, description, profile over the readable
measures against the population, holders over time and typical transitions; renaming
(admin scope)."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from sqlalchemy.engine import Engine

from rolewatch.api.deps import PageKey, SettingsDep, StoreDep
from rolewatch.api.integers import INT32_MAX, stored_integer
from rolewatch.config import Settings
from rolewatch.engine.naming import format_value
from rolewatch.engine.readable import MEASURE_LABELS, MEASURES
from rolewatch.store import queries, summaries
from rolewatch.store.keys import ApiKey
from rolewatch.web import charts, session
from rolewatch.web.pages import _CONTROL, _page

router = APIRouter(include_in_schema=False)

#: Windows the holders chart and the transitions look back over.
HISTORY_WINDOWS = 26
#: Largest level (mean percentile minus one half) a profile bar can show.
_LEVEL_SPAN = 0.5


def _profile_rows(profile: dict[str, Any]) -> list[dict[str, Any]]:
    """One row per readable measure: the role's average, the population's, and a bar from
    the middle (population median percentile) to the role's mean percentile."""
    measures = profile.get("measures") if isinstance(profile, dict) else None
    if not isinstance(measures, dict):
        return []
    rows = []
    for name in MEASURES:
        entry = measures.get(name)
        if not isinstance(entry, dict) or entry.get("level") is None:
            continue
        level = max(-_LEVEL_SPAN, min(_LEVEL_SPAN, float(entry["level"])))
        rows.append(
            {
                "measure": name,
                "label": MEASURE_LABELS[name],
                "role": format_value(name, float(entry.get("mean", float("nan")))),
                "population": format_value(name, float(entry.get("population", float("nan")))),
                "level": level,
                "percentile": round(100 * (level + 0.5)),
            }
        )
    return rows


def _holders_chart(windows: list[dict[str, Any]], counts: dict[int, int]) -> list[dict[str, Any]]:
    """Bars of the accounts holding a role per window, scaled to the role's busiest window."""
    top = max(counts.values(), default=0)
    return [
        {
            "day": charts.day(w["end_us"]),
            "count": counts.get(w["id"], 0),
            "height": round(40 * counts.get(w["id"], 0) / top, 1) if top else 0.0,
        }
        for w in windows
    ]


def _transitions(
    moves: dict[tuple[int, int], int], role_id: int, names: dict[int, str], top: int = 3
) -> tuple[list[tuple[str, int]], list[tuple[str, int]]]:
    """The most common roles accounts came from into ``role_id`` and went to out of it."""
    into = sorted(((n, a) for (a, b), n in moves.items() if b == role_id), reverse=True)
    out = sorted(((n, b) for (a, b), n in moves.items() if a == role_id), reverse=True)
    label = lambda other: names.get(other, f"role {other}")  # noqa: E731
    return (
        [(label(other), n) for n, other in into[:top]],
        [(label(other), n) for n, other in out[:top]],
    )


def _roles_context(engine: Engine) -> dict[str, Any]:
    """The role catalogue: each role with its profile, holders over time and transitions."""
    found = queries.list_roles(engine)
    latest = summaries.latest_window_with_members(engine)
    counts = summaries.dominant_counts(engine, latest["id"]) if latest else {}
    total = sum(counts.values())
    basis = found["basis"]
    windows, holders = (
        summaries.holders_by_window(engine, basis["version"], limit=HISTORY_WINDOWS)
        if basis
        else ([], {})
    )
    moves = summaries.role_transitions(engine, [w["id"] for w in windows])
    names = {role["id"]: role["name"] for role in found["roles"]}
    rows = []
    for index, role in enumerate(found["roles"]):
        into, out = _transitions(moves, role["id"], names)
        rows.append(
            {
                "role": role,
                "style": charts.role_style(index),
                "profile": _profile_rows(role.get("profile") or {}),
                "over_time": _holders_chart(windows, holders.get(role["id"], {})),
                "into": into,
                "out": out,
                "dominant": counts.get(role["id"], 0),
                "dominant_share": counts.get(role["id"], 0) / total if total else None,
            }
        )
    return {
        "section": "roles",
        "basis": basis,
        "rows": rows,
        "latest": latest,
        "total": total,
        "windows": windows,
    }


@router.get("/roles", response_class=HTMLResponse)
def role_catalogue(
    request: Request, key: PageKey, store: StoreDep, renamed: str = ""
) -> HTMLResponse:
    context = _roles_context(store)
    renamed_id = stored_integer(renamed, high=INT32_MAX)
    context.update(renamed=renamed_id, error=None, is_admin=key.allows("admin"))
    return _page(request, "roles.html", key, context)


def _rename_refusal(
    key: ApiKey, request: Request, settings: Settings, token: str, name: str
) -> tuple[str, int] | None:
    """Why a rename form is refused (message and status), or None when it may go ahead."""
    if not key.allows("admin"):
        return "Renaming a role needs a key with the admin scope; sign in with one.", 403
    if not session.same_site(request, settings) or not session.form_token_ok(request, token):
        return "The form expired; reload the page and try again.", 403
    if not name or len(name) > 100 or _CONTROL.search(name):
        return "A role name needs 1 to 100 printable characters.", 422
    return None


@router.post("/roles", response_class=HTMLResponse)
def rename_role(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    role_id: str = Form(""),
    name: str = Form(""),
    token: str = Form(""),
) -> Response:
    context = _roles_context(store)
    context.update(renamed=None, is_admin=key.allows("admin"))
    name = name.strip()
    refusal = _rename_refusal(key, request, settings, token, name)
    number = stored_integer(role_id, high=INT32_MAX)
    if refusal is None and (number is None or queries.rename_role(store, number, name) is None):
        refusal = f"There is no role “{role_id[:40]}” in the active basis.", 404
    if refusal is not None:
        context["error"], status_code = refusal
        return _page(request, "roles.html", key, context, status_code)
    return RedirectResponse(f"/roles?renamed={number}#role-{number}", status_code=303)
