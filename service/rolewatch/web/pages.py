"""The HTML pages: alert queue, account history, role catalogue, sign-in.

Server-rendered with Jinja2 (autoescape on: account ids and role names are untrusted data),
so every page works without JavaScript; ``static/account.js`` only swaps the evidence panel
in place when a window is picked. Pages need a key with the read scope, kept in a cookie by
:mod:`rolewatch.web.session`; renaming a role needs the admin scope.
"""

from __future__ import annotations

import re
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any
from urllib.parse import quote, urlencode

import jinja2
from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse
from fastapi.staticfiles import StaticFiles
from fastapi.templating import Jinja2Templates

from rolewatch.store import queries
from rolewatch.store.keys import verify_key
from rolewatch.web import charts, data, present, session

HERE = Path(__file__).resolve().parent
STATIC_DIR = HERE / "static"
NOTICE = (
    "Alerts are leads for human review, not verdicts: check the evidence before acting. "
    "Decisions about people are subject to data-protection law and local rules."
)
SECURITY_HEADERS = {
    "Content-Security-Policy": "default-src 'self'; img-src 'self' data:; style-src 'self'; "
    "script-src 'self'; object-src 'none'; base-uri 'none'; form-action 'self'; "
    "frame-ancestors 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
}
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f]")
PAGE_SIZE = 50

_environment = jinja2.Environment(
    loader=jinja2.FileSystemLoader(str(HERE / "templates")),
    autoescape=True,
    trim_blocks=True,
    lstrip_blocks=True,
)
_environment.filters.update(
    number=present.number,
    percent=present.percent,
    score=present.score,
    feature=present.feature_label,
    day=charts.day,
    account_url=lambda account: "/accounts/" + quote(str(account), safe=""),
)
templates = Jinja2Templates(env=_environment)
router = APIRouter(include_in_schema=False)


def static_files() -> StaticFiles:
    """The ``/static`` mount (CSS, the small script, the icon)."""
    return StaticFiles(directory=str(STATIC_DIR))


def _engine(request: Request):
    return request.app.state.engine


def _secure(request: Request) -> bool:
    return request.app.state.settings.public_url.lower().startswith("https://")


def _render(
    request: Request, name: str, context: dict[str, Any], status_code: int = 200
) -> HTMLResponse:
    context = {"notice": NOTICE, "key": None, "form_token": "", "section": "", **context}
    response = templates.TemplateResponse(request, name, context, status_code=status_code)
    response.headers.update(SECURITY_HEADERS)
    return response


def _page(request: Request, name: str, key, context: dict[str, Any], status_code: int = 200):
    context = {**context, "key": key, "form_token": session.form_token(request)}
    return _render(request, name, context, status_code)


# --- sign-in ---------------------------------------------------------------------------------


@router.get("/signin", response_class=HTMLResponse)
def signin_form(request: Request, next: str = "/"):
    return _render(request, "signin.html", {"next": session.safe_next(next), "error": None})


@router.post("/signin", response_class=HTMLResponse)
def signin(request: Request, key: str = Form(""), next: str = Form("/")):
    target = session.safe_next(next)
    key = key.strip()
    found = verify_key(_engine(request), key) if key and len(key) <= 300 else None
    if found is None or not found.allows("read"):
        error = (
            "That key is not valid: it is unknown, revoked or mistyped."
            if found is None
            else "That key lacks the read scope; ask an administrator for a read key."
        )
        return _render(request, "signin.html", {"next": target, "error": error}, 401)
    response = RedirectResponse(target, status_code=303)
    session.set_key_cookie(response, key, secure=_secure(request))
    response.headers.update(SECURITY_HEADERS)
    return response


@router.post("/signout")
def signout(request: Request):
    response = RedirectResponse("/signin", status_code=303)
    session.clear_key_cookie(response, secure=_secure(request))
    return response


# --- alert queue -----------------------------------------------------------------------------


def _day_start_us(text: str) -> int:
    moment = datetime.combine(date.fromisoformat(text), datetime.min.time(), UTC)
    return (moment - charts.EPOCH) // timedelta(microseconds=1)


def _alert_filters(min_score: str, date_from: str, date_to: str):
    """Parse the filter form; bad fields are reported and ignored, good ones kept."""
    errors = []
    filters: dict[str, Any] = {}
    if min_score.strip():
        try:
            value = float(min_score)
            if value != value or value < 0:
                raise ValueError
            filters["min_score"] = value
        except ValueError:
            errors.append(f"Minimum score “{min_score[:40]}” is not a number ≥ 0; it was ignored.")
    for label, text, name, shift in (
        ("From", date_from, "from_us", 0),
        ("To", date_to, "to_us", 1),
    ):
        if text.strip():
            try:
                filters[name] = _day_start_us(text.strip()) + shift * 86_400_000_000
            except ValueError:
                errors.append(
                    f"{label} date “{text[:40]}” is not a date like 2026-02-12; it was ignored."
                )
    return queries.AlertFilters(**filters), errors


@router.get("/", response_class=HTMLResponse)
@router.get("/alerts", response_class=HTMLResponse)
def alert_queue(
    request: Request,
    min_score: str = "",
    date_from: str = "",
    date_to: str = "",
    before: int | None = None,
):
    key = session.current_key(request)
    if key is None or not key.allows("read"):
        return session.to_signin(request)
    filters, errors = _alert_filters(min_score, date_from, date_to)
    found, next_cursor = queries.list_alerts(
        _engine(request), filters, limit=PAGE_SIZE, cursor=before
    )
    rows = [
        {
            "alert": alert,
            "window_start": alert["window_start"][:10],
            "window_end": alert["window_end"][:10],
            "evidence": present.strongest_evidence(alert),
        }
        for alert in found
    ]
    older = None
    if next_cursor is not None:
        kept = {"min_score": min_score, "date_from": date_from, "date_to": date_to}
        older = "/alerts?" + urlencode(
            {**{k: v for k, v in kept.items() if v}, "before": next_cursor}
        )
    return _page(
        request,
        "alerts.html",
        key,
        {
            "section": "alerts",
            "rows": rows,
            "errors": errors,
            "form": {"min_score": min_score, "date_from": date_from, "date_to": date_to},
            "older": older,
            "paged": before is not None,
        },
    )


# --- account page ----------------------------------------------------------------------------


def _role_order(engine, history) -> list[tuple[int, str]]:
    """Roles of the active basis (catalogue order), then any other role id the history holds."""
    active = [(role["id"], role["name"]) for role in queries.list_roles(engine)["roles"]]
    known = {role_id for role_id, _ in active}
    extra_ids = sorted({int(role_id) for entry in history for role_id in entry["mixture"]} - known)
    if extra_ids:
        names = queries.role_names(engine, {entry["basis_version"] for entry in history})
        by_id = {role_id: name for (_, role_id), name in names.items()}
        active += [(role_id, by_id.get(role_id, f"role {role_id}")) for role_id in extra_ids]
    return active


def _mixture_rows(mixture, roles, names) -> list[dict[str, Any]]:
    """``{role_id: weight}`` (or the evidence's list form) → rows with names, largest first."""
    if isinstance(mixture, dict):
        items = [(int(role_id), float(weight)) for role_id, weight in mixture.items()]
    else:
        items = [(int(item["role_id"]), float(item["weight"])) for item in mixture or ()]
    styles = {role_id: charts.role_style(index) for index, (role_id, _) in enumerate(roles)}
    rows = [
        {
            "role_id": role_id,
            "name": names.get(role_id, f"role {role_id}"),
            "weight": weight,
            "style": styles.get(role_id, charts.role_style(len(styles))),
        }
        for role_id, weight in items
        if weight >= 0.005
    ]
    return sorted(rows, key=lambda row: -row["weight"])


@router.get("/accounts", response_class=HTMLResponse)
def account_jump(request: Request, account: str = ""):
    """The header's account box: go to that account's page."""
    key = session.current_key(request)
    if key is None or not key.allows("read"):
        return session.to_signin(request)
    account = account.strip()
    if not account:
        return RedirectResponse("/alerts", status_code=303)
    return RedirectResponse("/accounts/" + quote(account, safe=""), status_code=303)


@router.get("/accounts/{account:path}", response_class=HTMLResponse)
def account_page(request: Request, account: str, window: str | None = None):
    key = session.current_key(request)
    if key is None or not key.allows("read"):
        return session.to_signin(request)
    engine = _engine(request)
    if not queries.account_exists(engine, account):
        return _page(
            request, "missing.html", key, {"title": "Account not found", "account": account}, 404
        )
    history_list = queries.account_history(engine, account)
    history = {entry["window_id"]: entry for entry in history_list}
    windows = data.all_windows(engine)
    alerts = data.alerts_by_window(engine, account)
    roles = _role_order(engine, history_list)
    names = dict(roles)

    selected_id = None
    window_error = None
    known_ids = {w["id"] for w in windows}
    if window:
        try:
            selected_id = int(window)
        except ValueError:
            selected_id = None
        if selected_id not in known_ids:
            window_error = "There is no closed window with that id; showing the latest one."
            selected_id = None
    if selected_id is None:
        if alerts:
            selected_id = max(alerts, key=lambda wid: history.get(wid, {}).get("window_end_us", 0))
        elif history_list:
            selected_id = history_list[-1]["window_id"]

    selected = None
    if selected_id is not None:
        meta = (
            next(w for w in windows if w["id"] == selected_id) if selected_id in known_ids else None
        )
        alert = alerts.get(selected_id)
        entry = history.get(selected_id)
        selected = {
            "id": selected_id,
            "start": charts.day(meta["start_us"]) if meta else None,
            "end": charts.day(meta["end_us"]) if meta else None,
            "alert": alert,
            "entry": entry,
            "mixture": _mixture_rows(entry["mixture"], roles, names) if entry else [],
        }
        if alert:
            evidence = alert["evidence"]
            before = {
                r["role_id"]: r for r in _mixture_rows(evidence.get("mixture_before"), roles, names)
            }
            after = {
                r["role_id"]: r for r in _mixture_rows(evidence.get("mixture_after"), roles, names)
            }
            order = [role_id for role_id, _ in roles]
            shown = sorted(
                set(before) | set(after),
                key=lambda r: order.index(r) if r in order else len(order) + r,
            )
            selected["shift_rows"] = [
                {
                    "name": (after.get(r) or before.get(r))["name"],
                    "style": (after.get(r) or before.get(r))["style"],
                    "before": before[r]["weight"] if r in before else 0.0,
                    "after": after[r]["weight"] if r in after else 0.0,
                }
                for r in shown
            ]

    account_href = "/accounts/" + quote(account, safe="")
    return _page(
        request,
        "account.html",
        key,
        {
            "section": "accounts",
            "account": account,
            "account_href": account_href,
            "history": history_list,
            "windows": windows,
            "alerts": alerts,
            "roles": roles,
            "names": names,
            "chart": charts.mixture_chart(windows, history, roles, alerts.keys(), selected_id),
            "activity": charts.activity_chart(windows, history, selected_id),
            "selected": selected,
            "window_error": window_error,
            "table_rows": [
                {
                    "window": w,
                    "entry": history.get(w["id"]),
                    "alert": alerts.get(w["id"]),
                    "dominant": names.get(history[w["id"]]["dominant_role"])
                    if w["id"] in history
                    else None,
                }
                for w in reversed(windows)
            ],
        },
    )


# --- role catalogue --------------------------------------------------------------------------


def _profile_parts(role) -> tuple[dict[str, float], dict[str, float]]:
    """A role's stored profile → (feature weights, sense-making measure affinities)."""
    profile = role.get("profile") or {}
    if not isinstance(profile, dict):
        return {}, {}
    features = profile.get("features", profile)
    measures = profile.get("measures") or {}
    return (features if isinstance(features, dict) else {}), (
        measures if isinstance(measures, dict) else {}
    )


def _roles_context(request: Request) -> dict[str, Any]:
    engine = _engine(request)
    found = queries.list_roles(engine)
    latest = data.latest_window_with_members(engine)
    counts = data.dominant_counts(engine, latest["id"]) if latest else {}
    total = sum(counts.values())
    rows = []
    profiles = [_profile_parts(role) for role in found["roles"]]
    levels = charts.profile_levels([features for features, _ in profiles])
    for index, role in enumerate(found["roles"]):
        measures = profiles[index][1]
        rows.append(
            {
                "role": role,
                "style": charts.role_style(index),
                "bars": levels[index],
                "measures": sorted(
                    (
                        (name, value)
                        for name, value in (measures or {}).items()
                        if value is not None
                    ),
                    key=lambda item: -abs(float(item[1])),
                )[:4],
                "dominant": counts.get(role["id"], 0),
                "dominant_share": counts.get(role["id"], 0) / total if total else None,
            }
        )
    return {
        "section": "roles",
        "basis": found["basis"],
        "rows": rows,
        "latest": latest,
        "total": total,
    }


@router.get("/roles", response_class=HTMLResponse)
def role_catalogue(request: Request, renamed: int | None = None):
    key = session.current_key(request)
    if key is None or not key.allows("read"):
        return session.to_signin(request)
    context = _roles_context(request)
    context.update(renamed=renamed, error=None, is_admin=key.allows("admin"))
    return _page(request, "roles.html", key, context)


@router.post("/roles", response_class=HTMLResponse)
def rename_role(
    request: Request, role_id: int = Form(...), name: str = Form(""), token: str = Form("")
):
    key = session.current_key(request)
    if key is None:
        return session.to_signin(request)
    context = _roles_context(request)
    context.update(renamed=None, is_admin=key.allows("admin"))
    if not key.allows("admin") or not session.form_token_ok(request, token):
        context["error"] = (
            "Renaming a role needs a key with the admin scope; sign in with one."
            if not key.allows("admin")
            else "The form expired; reload the page and try again."
        )
        return _page(request, "roles.html", key, context, 403)
    name = name.strip()
    if not name or len(name) > 100 or _CONTROL.search(name):
        context["error"] = "A role name needs 1 to 100 printable characters."
        return _page(request, "roles.html", key, context, 422)
    if queries.rename_role(_engine(request), role_id, name) is None:
        context["error"] = f"There is no role {role_id} in the active basis."
        return _page(request, "roles.html", key, context, 404)
    response = RedirectResponse(f"/roles?renamed={role_id}#role-{role_id}", status_code=303)
    response.headers.update(SECURITY_HEADERS)
    return response


def include_pages(app) -> None:
    """Add the pages and the ``/static`` mount to ``app`` (called by ``create_app``)."""
    app.include_router(router)
    app.mount("/static", static_files(), name="static")
