"""The suppression list page and the review figures page (with its CSV downloads).

Reading both needs the read scope; adding or lifting a suppression needs the review scope
and the form token, checked here on the server. The figures are those of
``GET /v1/review/stats`` (:mod:`rolewatch.review.stats`).
"""

from __future__ import annotations

from typing import Any
from urllib.parse import urlencode

from fastapi import APIRouter, Form, Path, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from sqlalchemy.engine import Engine

from rolewatch.api.deps import PageKey, SettingsDep, StoreDep
from rolewatch.clock import MICROS, now_micros
from rolewatch.config import Settings, format_duration
from rolewatch.review import stats, suppression_list
from rolewatch.review.suppression import SuppressionError
from rolewatch.store.keys import ApiKey
from rolewatch.web import session
from rolewatch.web.review_pages import date_range, day_start_us, render

router = APIRouter(include_in_schema=False)
SUPPRESSION_DONE = {"added": "Suppression added.", "lifted": "Suppression lifted."}


# --- suppressions ----------------------------------------------------------------------------


def _suppressions_page(
    request: Request,
    key: ApiKey,
    engine: Engine,
    settings: Settings,
    *,
    show_all: bool,
    done: str = "",
    error: str | None = None,
    kept: dict[str, str] | None = None,
    status_code: int = 200,
) -> HTMLResponse:
    entries = suppression_list.list_entries(engine, now_us=now_micros(), include_inactive=show_all)
    context = {
        "section": "suppressions",
        "entries": entries,
        "show_all": show_all,
        "can_review": key.allows("review"),
        "done": SUPPRESSION_DONE.get(done),
        "error": error,
        "kept": kept or {},
        "default_expiry": format_duration(settings.suppression_default_expiry),
    }
    return render(request, "suppressions.html", key, context, status_code)


@router.get("/suppressions", response_class=HTMLResponse)
def suppressions_page(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    all: str = "",
    done: str = "",
) -> HTMLResponse:
    return _suppressions_page(request, key, store, settings, show_all=bool(all), done=done[:20])


def _refusal(request: Request, key: ApiKey, token: str) -> str | None:
    if not key.allows("review"):
        return "Managing suppressions needs a key with the review scope; sign in with one."
    if not session.form_token_ok(request, token):
        return "The form expired; reload the page and try again."
    return None


@router.post("/suppressions", response_class=HTMLResponse)
def add_suppression(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    kind: str = Form("account"),
    value: str = Form(""),
    reason: str = Form(""),
    expires: str = Form(""),
    token: str = Form(""),
) -> Response:
    kept = {"kind": kind[:20], "value": value[:300], "reason": reason[:600], "expires": expires}
    error = _refusal(request, key, token)
    status_code = 403
    if error is None:
        status_code = 422
        try:
            # The expiry date is inclusive: the entry holds until the end of that day (UTC).
            expires_us = day_start_us(expires) + 86_400 * MICROS if expires.strip() else None
            suppression_list.add_entry(
                store,
                settings,
                key,
                kind=kind,
                value=value.strip(),
                reason=reason,
                expires_us=expires_us,
                now_us=now_micros(),
            )
        except SuppressionError as refused:
            error = str(refused)
        except ValueError:
            error = f"Expiry “{expires[:40]}” is not a date like 2026-06-30."
    if error is not None:
        return _suppressions_page(
            request,
            key,
            store,
            settings,
            show_all=False,
            error=error,
            kept=kept,
            status_code=status_code,
        )
    return RedirectResponse("/suppressions?done=added", status_code=303)


@router.post("/suppressions/{entry_id}/lift", response_class=HTMLResponse)
def lift_suppression(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    entry_id: int = Path(ge=1, le=2**63 - 1),
    token: str = Form(""),
) -> Response:
    error = _refusal(request, key, token)
    status_code = 403
    if error is None:
        try:
            suppression_list.lift_entry(store, key, entry_id, now_us=now_micros())
        except suppression_list.SuppressionNotFound as missing:
            error, status_code = str(missing).strip("'\""), 404
        except SuppressionError as refused:
            error, status_code = str(refused), 409
    if error is not None:
        return _suppressions_page(
            request, key, store, settings, show_all=True, error=error, status_code=status_code
        )
    return RedirectResponse("/suppressions?done=lifted", status_code=303)


# --- review figures --------------------------------------------------------------------------


def _period(date_from: str, date_to: str) -> tuple[dict[str, Any], list[str]]:
    from_us, to_us, errors = date_range(date_from[:40], date_to[:40])
    if from_us is not None and to_us is not None and from_us >= to_us:
        errors.append("The period ends before it starts; showing every window.")
        from_us = to_us = None
    return {"from_us": from_us, "to_us": to_us}, errors


@router.get("/review/stats", response_class=HTMLResponse)
def figures_page(
    request: Request, key: PageKey, store: StoreDep, date_from: str = "", date_to: str = ""
) -> HTMLResponse:
    period, errors = _period(date_from, date_to)
    figures = stats.review_figures(store, **period)
    form = {"date_from": date_from[:40], "date_to": date_to[:40]}
    query = urlencode({name: value for name, value in form.items() if value})
    context = {
        "section": "figures",
        "figures": figures,
        "errors": errors,
        "form": form,
        "csv_window": "/review/stats.csv?"
        + urlencode({"by": "window"})
        + ("&" + query if query else ""),
        "csv_transition": "/review/stats.csv?"
        + urlencode({"by": "transition"})
        + ("&" + query if query else ""),
    }
    return render(request, "review_stats.html", key, context)


@router.get("/review/stats.csv")
def figures_csv(
    key: PageKey, store: StoreDep, by: str = "window", date_from: str = "", date_to: str = ""
) -> Response:
    period, _errors = _period(date_from, date_to)
    by = by if by in ("window", "transition") else "window"
    body = stats.figures_csv(stats.review_figures(store, **period), by)
    return Response(
        body,
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="review-{by}.csv"'},
    )
