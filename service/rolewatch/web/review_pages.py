"""The review pages: the case queue (the home page), a case with its review forms, and the
case panel the account page shows.

Server-rendered forms, so everything works without JavaScript and from the keyboard. Every
form that changes something carries the sign-in form token; changing a case's state or
assignee needs a key with the review scope (checked here, on the server), notes need only
the read scope. A form sent against an older version of the case is refused with 409 and
the case as it is now, keeping what the reviewer typed. The suppression list and the review
figures are in :mod:`rolewatch.web.review_figures`.
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, date, datetime
from typing import Any
from urllib.parse import quote, urlencode

from fastapi import APIRouter, FastAPI, Form, Path, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from sqlalchemy.engine import Engine

from rolewatch.api.deps import PageKey, SettingsDep, StoreDep
from rolewatch.clock import EPOCH, MICROS
from rolewatch.config import Settings
from rolewatch.review import cases
from rolewatch.review.states import (
    DECIDED,
    DISMISS_REASONS,
    MOVES,
    STATE_LABELS,
    STATES,
    ReviewRuleError,
)
from rolewatch.store.keys import ApiKey
from rolewatch.store.review import CaseFilters
from rolewatch.web import session
from rolewatch.web.pages import NOTICE, templates

router = APIRouter(include_in_schema=False)
PAGE_SIZE = 50
CASE_ID = Path(ge=1, le=2**63 - 1)
VERSION = Form(..., ge=1, le=2**31 - 1)
DONE = {
    "in_review": "Review started: the case is yours unless it was assigned.",
    "open": "The case is open again.",
    "confirmed": "Case confirmed.",
    "dismissed": "Case dismissed.",
    "assigned": "Assignment saved.",
    "note": "Note added.",
}
STATE_CHOICES = {"active": "open or in review", "all": "any state"} | {
    state: STATE_LABELS[state] for state in STATES
}
ACTIVE = ("open", "in_review")


def review_time(seconds: Any) -> str:
    """A time to review in words: ``45 s``, ``12 min``, ``3 h 20 min``, ``2 d 4 h``."""
    if seconds is None:
        return "–"
    whole = int(round(float(seconds)))
    days, rest = divmod(whole, 86_400)
    hours, rest = divmod(rest, 3_600)
    minutes, secs = divmod(rest, 60)
    if days:
        return f"{days} d {hours} h"
    if hours:
        return f"{hours} h {minutes} min"
    if minutes:
        return f"{minutes} min"
    return f"{secs} s"


templates.env.filters.update(
    state_label=lambda state: STATE_LABELS.get(state, state), review_time=review_time
)


def render(
    request: Request, name: str, key: ApiKey, context: dict[str, Any], status_code: int = 200
) -> HTMLResponse:
    """A review page for a signed-in key (the header shows the key, forms carry its token)."""
    context = {
        "notice": NOTICE,
        "section": "",
        **context,
        "key": key,
        "form_token": session.form_token(request),
    }
    return templates.TemplateResponse(request, name, context, status_code=status_code)


def day_start_us(text: str) -> int:
    """Midnight UTC of an ISO date (``ValueError`` when it is not one)."""
    moment = datetime.combine(date.fromisoformat(text.strip()), datetime.min.time(), UTC)
    return int((moment - EPOCH).total_seconds()) * MICROS


def date_range(date_from: str, date_to: str) -> tuple[int | None, int | None, list[str]]:
    """The ``[from, to]`` day range of a filter form (to inclusive); bad dates are reported
    and ignored."""
    bounds: list[int | None] = [None, None]
    errors = []
    for index, (label, text) in enumerate((("From", date_from), ("To", date_to))):
        if text.strip():
            try:
                bounds[index] = day_start_us(text) + index * 86_400 * MICROS
            except ValueError:
                errors.append(f"{label} date “{text[:40]}” is not a date like 2026-02-12; ignored.")
    return bounds[0], bounds[1], errors


# --- the queue -------------------------------------------------------------------------------


def _queue_filters(
    key: ApiKey, people: list[dict[str, str]], form: dict[str, str]
) -> tuple[CaseFilters, list[str]]:
    errors = []
    state = form["state"] or "active"
    states: tuple[str, ...] = ()
    if state == "active":
        states = ACTIVE
    elif state in STATES:
        states = (state,)
    elif state != "all":
        errors.append("Unknown state; showing open and in-review cases.")
        states = ACTIVE
    assignee: str | None = None
    if form["assignee"] == "me":
        assignee = key.key_id
    elif form["assignee"] == "none":
        assignee = "none"
    elif form["assignee"]:
        if form["assignee"] in {person["key_id"] for person in people}:
            assignee = form["assignee"]
        else:
            errors.append("That reviewer is unknown; showing every assignee.")
    min_score = None
    if form["min_score"].strip():
        try:
            min_score = float(form["min_score"])
            if not min_score >= 0 or min_score == float("inf"):
                raise ValueError
        except ValueError:
            min_score = None
            errors.append(f"Minimum score “{form['min_score'][:40]}” is not a number ≥ 0; ignored.")
    from_us, to_us, date_errors = date_range(form["date_from"], form["date_to"])
    filters = CaseFilters(
        states=states, assignee=assignee, min_score=min_score, from_us=from_us, to_us=to_us
    )
    return filters, errors + date_errors


@router.get("/", response_class=HTMLResponse)
@router.get("/cases", response_class=HTMLResponse)
def case_queue(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    state: str = "",
    assignee: str = "",
    min_score: str = "",
    date_from: str = "",
    date_to: str = "",
    page: int = 1,
) -> HTMLResponse:
    people = cases.reviewers(store)
    form = {
        "state": state[:20],
        "assignee": assignee[:40],
        "min_score": min_score[:40],
        "date_from": date_from[:40],
        "date_to": date_to[:40],
    }
    filters, errors = _queue_filters(key, people, form)
    page = max(1, min(page, 10**6))
    found, total = cases.list_queue(
        store, settings, filters, limit=PAGE_SIZE, offset=(page - 1) * PAGE_SIZE
    )
    kept = {name: value for name, value in form.items() if value}
    pages = {
        "newer": "/cases?" + urlencode({**kept, "page": page - 1}) if page > 1 else None,
        "older": "/cases?" + urlencode({**kept, "page": page + 1})
        if page * PAGE_SIZE < total
        else None,
    }
    context = {
        "section": "cases",
        "rows": found,
        "total": total,
        "errors": errors,
        "form": form,
        "people": people,
        "state_choices": STATE_CHOICES,
        "pages": pages,
        "first": (page - 1) * PAGE_SIZE + 1,
    }
    return render(request, "cases.html", key, context)


# --- a case ----------------------------------------------------------------------------------


def case_href(case: dict[str, Any], back: str = "case") -> str:
    """Where a case is shown: its own page, or its account's page."""
    if back == "account":
        return "/accounts/" + quote(case["account"], safe="") + f"?case={case['id']}"
    return f"/cases/{case['id']}"


def move_buttons(state: str) -> list[tuple[str, str]]:
    """The state buttons of a case in ``state`` (dismissing has its own form): target state
    and label."""
    labels = {
        "in_review": "Start review",
        "confirmed": "Confirm",
        "open": "Reopen" if state in DECIDED else "Back to open",
    }
    return [(target, labels[target]) for target in MOVES[state] if target in labels]


def panel_context(
    engine: Engine,
    key: ApiKey,
    detail: dict[str, Any],
    *,
    back: str,
    others: list[dict[str, Any]] | None = None,
    done: str = "",
    error: str | None = None,
    kept: dict[str, str] | None = None,
) -> dict[str, Any]:
    """What ``case_panel.html`` shows: the case, the moves this key may make, the forms."""
    moves = MOVES[detail["state"]]
    return {
        "case": detail,
        "back": back,
        "others": others or [],
        "can_review": key.allows("review"),
        "reviewers": cases.reviewers(engine),
        "reasons": DISMISS_REASONS,
        "buttons": move_buttons(detail["state"]),
        "can_dismiss": "dismissed" in moves,
        "done": DONE.get(done),
        "error": error,
        "kept": kept or {},
    }


def account_case_context(
    engine: Engine,
    settings: Settings,
    key: ApiKey,
    account: str,
    asked: str | None,
    done: str = "",
) -> dict[str, Any]:
    """The account page's case panel (``{"panel": None}`` when the account has no case): the
    asked case (``?case=``) or the newest, with the account's other cases listed. The view
    is recorded in the case's history."""
    found = cases.account_cases(engine, settings, account)
    if not found:
        return {"panel": None}
    chosen = next((case for case in found if asked and str(case["id"]) == asked), found[0])
    detail = cases.case_detail(engine, settings, chosen["id"], viewer=key)
    others = [case for case in found if case["id"] != chosen["id"]]
    return {"panel": panel_context(engine, key, detail, back="account", others=others, done=done)}


def _case_page(
    request: Request,
    key: ApiKey,
    engine: Engine,
    settings: Settings,
    case_id: int,
    *,
    done: str = "",
    error: str | None = None,
    kept: dict[str, str] | None = None,
    status_code: int = 200,
) -> HTMLResponse:
    try:
        detail = cases.case_detail(engine, settings, case_id, viewer=key)
    except cases.CaseNotFound:
        context = {"title": "Case not found", "case_id": case_id}
        return render(request, "case_missing.html", key, context, 404)
    others = [
        case
        for case in cases.account_cases(engine, settings, detail["account"])
        if case["id"] != case_id
    ]
    panel = panel_context(
        engine, key, detail, back="case", others=others, done=done, error=error, kept=kept
    )
    context = {"section": "cases", "panel": panel, "case": detail}
    return render(request, "case.html", key, context, status_code)


@router.get("/cases/{case_id}", response_class=HTMLResponse)
def case_page(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    case_id: int = CASE_ID,
    done: str = "",
) -> HTMLResponse:
    return _case_page(request, key, store, settings, case_id, done=done[:20])


def _refusal(request: Request, key: ApiKey, token: str, scope: str) -> str | None:
    if not key.allows(scope):
        return (
            "Changing a case needs a key with the review scope; sign in with one. "
            "You can still add notes."
        )
    if not session.form_token_ok(request, token):
        return "The form expired; reload the page and try again."
    return None


def _after(
    request: Request,
    key: ApiKey,
    store: Engine,
    settings: Settings,
    case_id: int,
    back: str,
    done: str,
    work: Callable[[], dict[str, Any]],
    kept: dict[str, str],
) -> Response:
    """Run a case change; redirect to where the form came from, or show the case page with
    the reason it was refused (and what was typed)."""
    try:
        detail = work()
    except cases.CaseNotFound:
        return _case_page(request, key, store, settings, case_id, status_code=404)
    except cases.VersionConflict as conflict:
        current = conflict.current
        who = ""
        latest = [entry for entry in current["history"] if entry["action"] != "viewed"]
        if latest and latest[-1]["by"]:
            who = f" by {latest[-1]['by']['name']}"
        message = (
            f"Someone changed this case while you were looking{who}: it is now "
            f"{STATE_LABELS[current['state']]}. Nothing of yours was applied; check the "
            "current state below and decide again."
        )
        return _case_page(
            request, key, store, settings, case_id, error=message, kept=kept, status_code=409
        )
    except ReviewRuleError as error:
        return _case_page(
            request, key, store, settings, case_id, error=str(error), kept=kept, status_code=422
        )
    target = case_href(detail, "account" if back == "account" else "case")
    joiner = "&" if "?" in target else "?"
    return RedirectResponse(f"{target}{joiner}done={done}#case", status_code=303)


@router.post("/cases/{case_id}/state", response_class=HTMLResponse)
def change_state(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    case_id: int = CASE_ID,
    version: int = VERSION,
    state: str = Form(""),
    reason: str = Form(""),
    text: str = Form(""),
    token: str = Form(""),
    back: str = Form("case"),
) -> Response:
    kept = {"text": text[:4000], "reason": reason[:40], "form": "dismiss" if reason else "state"}
    refusal = _refusal(request, key, token, "review")
    if refusal is not None:
        return _case_page(
            request, key, store, settings, case_id, error=refusal, kept=kept, status_code=403
        )
    change = cases.CaseChange(
        version=version, state=state or None, reason=reason or None, text=text or None
    )

    def work():
        return cases.change_case(store, settings, case_id, key, change)

    return _after(request, key, store, settings, case_id, back, state, work, kept)


@router.post("/cases/{case_id}/assign", response_class=HTMLResponse)
def assign(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    case_id: int = CASE_ID,
    version: int = VERSION,
    assignee: str = Form(""),
    token: str = Form(""),
    back: str = Form("case"),
) -> Response:
    refusal = _refusal(request, key, token, "review")
    if refusal is not None:
        return _case_page(request, key, store, settings, case_id, error=refusal, status_code=403)
    change = cases.CaseChange(version=version, assignee=assignee or None)

    def work():
        return cases.change_case(store, settings, case_id, key, change)

    return _after(request, key, store, settings, case_id, back, "assigned", work, {})


@router.post("/cases/{case_id}/notes", response_class=HTMLResponse)
def add_note(
    request: Request,
    key: PageKey,
    store: StoreDep,
    settings: SettingsDep,
    case_id: int = CASE_ID,
    text: str = Form(""),
    token: str = Form(""),
    back: str = Form("case"),
) -> Response:
    kept = {"note": text[:4000]}
    if not session.form_token_ok(request, token):
        error = "The form expired; reload the page and try again."
        return _case_page(
            request, key, store, settings, case_id, error=error, kept=kept, status_code=403
        )

    def work():
        cases.add_note(store, settings, case_id, key, text)
        return cases.case_detail(store, settings, case_id)

    return _after(request, key, store, settings, case_id, back, "note", work, kept)


def include_review_pages(app: FastAPI) -> None:
    """Add the review pages (queue, case, suppressions, figures) to ``app``."""
    from rolewatch.web.review_figures import router as figures_router

    app.include_router(router)
    app.include_router(figures_router)
