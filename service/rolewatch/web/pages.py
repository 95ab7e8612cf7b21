"""The HTML pages: alert list, account history, role catalogue, sign-in (the case queue,
the home page, is in :mod:`rolewatch.web.review_pages`).

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
from fastapi import APIRouter, FastAPI, Form, Request
from fastapi.responses import HTMLResponse, PlainTextResponse, RedirectResponse, Response
from fastapi.staticfiles import StaticFiles
from fastapi.templating import Jinja2Templates
from sqlalchemy.engine import Engine

from rolewatch.api.deps import PageKey, SettingsDep, SignInRequired, StoreDep, redirect_to_signin
from rolewatch.api.integers import stored_integer
from rolewatch.config import Settings
from rolewatch.engine.naming import format_value
from rolewatch.identifiers import visible
from rolewatch.scale import history as archived_history
from rolewatch.store import queries, summaries
from rolewatch.store.keys import ApiKey, verify_key
from rolewatch.web import charts, present, session

HERE = Path(__file__).resolve().parent
STATIC_DIR = HERE / "static"
NOTICE = (
    "Alerts are leads for human review, not verdicts: check the evidence before acting. "
    "Decisions about people are subject to data-protection law and local rules."
)
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
    visible=lambda text: visible(str(text)),
    shown_id=present.shown_id,
    measure=lambda value, name: "–" if value is None else format_value(name, float(value)),
)
templates = Jinja2Templates(env=_environment)
router = APIRouter(include_in_schema=False)

Roles = list[tuple[int, str]]
"""Role ids with their names, in the order the pages show them."""


def _render(
    request: Request, name: str, context: dict[str, Any], status_code: int = 200
) -> HTMLResponse:
    context = {"notice": NOTICE, "key": None, "form_token": "", "section": "", **context}
    return templates.TemplateResponse(request, name, context, status_code=status_code)


def _page(
    request: Request, name: str, key: ApiKey, context: dict[str, Any], status_code: int = 200
) -> HTMLResponse:
    """A page for a signed-in key: the header shows the key and forms carry its token."""
    context = {**context, "key": key, "form_token": session.form_token(request)}
    return _render(request, name, context, status_code)


# --- sign-in ---------------------------------------------------------------------------------


CROSS_SITE = "This form did not come from this site, or it expired: reload the page and try again."


def _signin_page(
    request: Request, settings: Settings, target: str, error: str | None, status_code: int = 200
) -> HTMLResponse:
    """The sign-in form with a fresh form token (also set in its cookie)."""
    token = session.new_signin_token()
    context = {"next": target, "error": error, "signin_token": token}
    response = _render(request, "signin.html", context, status_code)
    session.set_signin_cookie(response, token, settings)
    return response


@router.get("/signin", response_class=HTMLResponse)
def signin_form(request: Request, settings: SettingsDep, next: str = "/") -> HTMLResponse:
    return _signin_page(request, settings, session.safe_next(next), None)


@router.post("/signin", response_class=HTMLResponse)
def signin(
    request: Request,
    store: StoreDep,
    settings: SettingsDep,
    key: str = Form(""),
    next: str = Form("/"),
    token: str = Form(""),
) -> Response:
    target = session.safe_next(next)
    if not session.same_site(request, settings) or not session.signin_token_ok(request, token):
        return _signin_page(request, settings, target, CROSS_SITE, 403)
    key = key.strip()
    found = verify_key(store, key) if key and len(key) <= 300 else None
    if found is None or not found.allows("read"):
        error = (
            "That key is not valid: it is unknown, revoked or mistyped."
            if found is None
            else "That key lacks the read scope; ask an administrator for a read key."
        )
        return _signin_page(request, settings, target, error, 401)
    response = RedirectResponse(target, status_code=303)
    session.sign_in(store, response, found, settings)
    return response


@router.post("/signout")
def signout(
    request: Request, store: StoreDep, settings: SettingsDep, token: str = Form("")
) -> Response:
    if not session.same_site(request, settings) or not session.form_token_ok(request, token):
        return PlainTextResponse(CROSS_SITE, status_code=403)
    response = RedirectResponse("/signin", status_code=303)
    session.sign_out(store, request, response, settings)
    return response


# --- alert queue -----------------------------------------------------------------------------


def _day_start_us(text: str) -> int:
    moment = datetime.combine(date.fromisoformat(text), datetime.min.time(), UTC)
    return (moment - charts.EPOCH) // timedelta(microseconds=1)


def _alert_filters(
    min_score: str, date_from: str, date_to: str
) -> tuple[queries.AlertFilters, list[str]]:
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


def _queue_rows(found: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """One row per alert: the alert, its window's days and its strongest evidence."""
    return [
        {
            "alert": alert,
            "window_start": alert["window_start"][:10],
            "window_end": alert["window_end"][:10],
        }
        for alert in found
    ]


def _older_link(form: dict[str, str], next_cursor: int | None) -> str | None:
    """The link to the next page of older alerts (keeping the filled filters), or None."""
    if next_cursor is None:
        return None
    kept = {name: value for name, value in form.items() if value}
    return "/alerts?" + urlencode({**kept, "before": next_cursor})


@router.get("/alerts", response_class=HTMLResponse)
def alert_queue(
    request: Request,
    key: PageKey,
    store: StoreDep,
    min_score: str = "",
    date_from: str = "",
    date_to: str = "",
    before: str = "",
) -> HTMLResponse:
    filters, errors = _alert_filters(min_score, date_from, date_to)
    cursor = stored_integer(before, low=1)
    if before and cursor is None:
        errors.append(f"Page position “{before[:40]}” is not valid; showing the newest alerts.")
    found, next_cursor = queries.list_alerts(store, filters, limit=PAGE_SIZE, cursor=cursor)
    form = {"min_score": min_score, "date_from": date_from, "date_to": date_to}
    return _page(
        request,
        "alerts.html",
        key,
        {
            "section": "alerts",
            "rows": _queue_rows(found),
            "errors": errors,
            "form": form,
            "older": _older_link(form, next_cursor),
            "paged": cursor is not None,
        },
    )


# --- account page ----------------------------------------------------------------------------


def _role_order(engine: Engine, history: list[dict[str, Any]]) -> Roles:
    """Roles of the active basis (catalogue order), then any other role id the history holds."""
    active = [(role["id"], role["name"]) for role in queries.list_roles(engine)["roles"]]
    known = {role_id for role_id, _ in active}
    extra_ids = sorted({int(role_id) for entry in history for role_id in entry["mixture"]} - known)
    if extra_ids:
        names = queries.role_names(engine, {entry["basis_version"] for entry in history})
        by_id = {role_id: name for (_, role_id), name in names.items()}
        active += [(role_id, by_id.get(role_id, f"role {role_id}")) for role_id in extra_ids]
    return active


def _mixture_rows(mixture: Any, roles: Roles, names: dict[int, str]) -> list[dict[str, Any]]:
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


def _shift_rows(
    evidence: dict[str, Any], roles: Roles, names: dict[int, str]
) -> list[dict[str, Any]]:
    """The alert's mixture before and after, one row per role shown in either, catalogue order."""
    before = {r["role_id"]: r for r in _mixture_rows(evidence.get("mixture_before"), roles, names)}
    after = {r["role_id"]: r for r in _mixture_rows(evidence.get("mixture_after"), roles, names)}
    order = [role_id for role_id, _ in roles]
    shown = sorted(
        set(before) | set(after),
        key=lambda r: order.index(r) if r in order else len(order) + r,
    )
    rows = []
    for r in shown:
        either = after.get(r) or before[r]
        rows.append(
            {
                "name": either["name"],
                "style": either["style"],
                "before": before[r]["weight"] if r in before else 0.0,
                "after": after[r]["weight"] if r in after else 0.0,
            }
        )
    return rows


def _pick_window(
    asked: str | None,
    known_ids: set[int],
    alerts: dict[int, dict[str, Any]],
    history_list: list[dict[str, Any]],
) -> tuple[int | None, str | None]:
    """The window whose evidence the page shows, and a message when the asked one is unknown.

    Without a (valid) ``?window=``, the newest window with an alert is shown, else the
    account's latest active window, else none.
    """
    selected_id = None
    window_error = None
    if asked:
        selected_id = stored_integer(asked, low=1)
        if selected_id not in known_ids:
            window_error = "There is no closed window with that id; showing the latest one."
            selected_id = None
    if selected_id is None:
        if alerts:
            end_us = {entry["window_id"]: entry["window_end_us"] for entry in history_list}
            selected_id = max(alerts, key=lambda wid: end_us.get(wid, 0))
        elif history_list:
            selected_id = history_list[-1]["window_id"]
    return selected_id, window_error


def _selected_panel(
    selected_id: int | None,
    windows: list[dict[str, Any]],
    history: dict[int, dict[str, Any]],
    alerts: dict[int, dict[str, Any]],
    roles: Roles,
) -> dict[str, Any] | None:
    """The evidence panel of the selected window: its days, alert, mixture and shift rows."""
    if selected_id is None:
        return None
    names = dict(roles)
    meta = next((w for w in windows if w["id"] == selected_id), None)
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
        selected["shift_rows"] = _shift_rows(alert["evidence"], roles, names)
    return selected


def _table_rows(
    windows: list[dict[str, Any]],
    history: dict[int, dict[str, Any]],
    alerts: dict[int, dict[str, Any]],
    names: dict[int, str],
) -> list[dict[str, Any]]:
    """The "All windows" table, newest first."""
    return [
        {
            "window": w,
            "entry": history.get(w["id"]),
            "alert": alerts.get(w["id"]),
            "dominant": names.get(history[w["id"]]["dominant_role"])
            if w["id"] in history
            else None,
        }
        for w in reversed(windows)
    ]


def _account_context(
    engine: Engine, settings: Settings, account: str, window: str | None
) -> dict[str, Any]:
    """Everything the account page shows for a known ``account``."""
    history_list = archived_history.account_history(engine, settings, account)
    history = {entry["window_id"]: entry for entry in history_list}
    windows = summaries.windows_oldest_first(engine)
    alerts = summaries.alerts_by_window(engine, account)
    roles = _role_order(engine, history_list)
    names = dict(roles)
    known_ids = {w["id"] for w in windows}
    selected_id, window_error = _pick_window(window, known_ids, alerts, history_list)
    return {
        "section": "accounts",
        "account": account,
        "account_href": "/accounts/" + quote(account, safe=""),
        "history": history_list,
        "windows": windows,
        "alerts": alerts,
        "roles": roles,
        "names": names,
        "chart": charts.mixture_chart(windows, history, roles, alerts.keys(), selected_id),
        "activity": charts.activity_chart(windows, history, selected_id),
        "selected": _selected_panel(selected_id, windows, history, alerts, roles),
        "window_error": window_error,
        "table_rows": _table_rows(windows, history, alerts, names),
    }


@router.get("/accounts", response_class=HTMLResponse)
def account_jump(key: PageKey, account: str = "") -> RedirectResponse:
    """The header's account box: go to that account's page."""
    account = account.strip()
    if not account:
        return RedirectResponse("/alerts", status_code=303)
    return RedirectResponse("/accounts/" + quote(account, safe=""), status_code=303)


@router.get("/accounts/{account:path}", response_class=HTMLResponse)
def account_page(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    account: str,
    window: str | None = None,
    case: str | None = None,
    done: str = "",
) -> HTMLResponse:
    if not archived_history.account_known(store, settings, account):
        return _page(
            request, "missing.html", key, {"title": "Account not found", "account": account}, 404
        )
    context = _account_context(store, settings, account, window)
    # Review: the account's case with its notes and review forms (web/review_pages.py).
    from rolewatch.web.review_pages import account_case_context

    context.update(account_case_context(store, settings, key, account, case, done[:20]))
    return _page(request, "account.html", key, context)


def include_pages(app: FastAPI) -> None:
    """Add the pages, their sign-in redirect and the ``/static`` mount to ``app``."""
    from rolewatch.web.catalogue import router as catalogue_router

    app.include_router(router)
    app.include_router(catalogue_router)
    app.add_exception_handler(SignInRequired, redirect_to_signin)
    app.mount("/static", StaticFiles(directory=str(STATIC_DIR)), name="static")
