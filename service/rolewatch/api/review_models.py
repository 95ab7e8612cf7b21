"""Wire models of the review routes (cases, notes, reviewers, suppressions, figures), for
validating request bodies and for the OpenAPI document. The forms themselves are built by
:mod:`rolewatch.review.forms` (docs/CONTRACTS.md "Case")."""

from __future__ import annotations

from typing import Literal, get_args

from pydantic import BaseModel, ConfigDict, Field

from rolewatch.api.models import RoleRef
from rolewatch.review.states import DISMISS_REASONS, MAX_TEXT, STATES

State = Literal["open", "in_review", "confirmed", "dismissed"]
Reason = Literal["expected_behaviour", "known_account", "data_problem", "duplicate", "other"]
# The wire literals must list exactly the states and reasons of the review rules.
assert set(get_args(State)) == set(STATES) and set(get_args(Reason)) == set(DISMISS_REASONS)


class Person(BaseModel):
    key_id: str
    name: str


class Decision(BaseModel):
    state: Literal["confirmed", "dismissed"]
    reason: Reason | None
    reason_label: str | None
    text: str | None
    by: Person | None
    at: str


class Case(BaseModel):
    id: int
    account: str
    state: State
    version: int = Field(..., description="Send it back with a change; a stale one gets 409.")
    assignee: Person | None
    opened: str
    updated: str
    first_window_end: str
    last_window_end: str
    alert_count: int
    peak_score: float
    latest_score: float
    latest_alert_id: int
    role_before: RoleRef | None = Field(..., description="Newest alert's baseline role.")
    role_after: RoleRef | None = Field(..., description="Newest alert's new dominant role.")
    last_decision: Decision | None = Field(
        ..., description="The latest confirmation or dismissal; kept when the case is reopened."
    )
    url: str


class TimelineAlert(BaseModel):
    alert_id: int
    window_id: int
    window_start: str
    window_end: str
    raised: str
    joined: str
    score: float
    role_before: RoleRef | None
    role_after: RoleRef | None
    headline: str = Field(..., description="What changed (the alert's headline).")
    decision: Literal["confirmed", "dismissed"] | None
    reason: Reason | None


class HistoryEntry(BaseModel):
    id: int | None
    at: str
    action: Literal["opened", "alert_added", "reopened", "state", "assigned", "note", "viewed"]
    by: Person | None = Field(..., description="null: the window close.")
    from_state: State | None
    to_state: State | None
    reason: Reason | None
    text: str | None
    alert_id: int | None
    assignee: Person | None
    version: int


class CaseDetail(Case):
    alerts: list[TimelineAlert]
    history: list[HistoryEntry]


class CasePage(BaseModel):
    cases: list[Case]
    total: int
    next_cursor: str | None


class CaseConflict(BaseModel):
    detail: str
    case: CaseDetail


class CasePatch(BaseModel):
    model_config = ConfigDict(extra="forbid")
    version: int = Field(..., ge=1, le=2**31 - 1, description="The version you read.")
    state: State | None = Field(None, description="The state to move to.")
    reason: Reason | None = Field(None, description="Required when dismissing.")
    text: str | None = Field(None, max_length=MAX_TEXT, description="Why (kept in history).")
    assignee: str | None = Field(
        None,
        max_length=32,
        description="Key id of a reviewer (GET /v1/reviewers); null unassigns; left out "
        "keeps the assignee.",
    )


class NoteCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")
    text: str = Field(..., min_length=1, max_length=MAX_TEXT)


class Reviewers(BaseModel):
    reviewers: list[Person]


class SuppressionCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")
    kind: Literal["account", "pattern"] = Field(
        ..., description="account: one exact id; pattern: a shell-style glob (README)."
    )
    value: str = Field(..., min_length=1, max_length=200)
    reason: str = Field(..., min_length=1, max_length=500)
    expires: str | None = Field(
        None, description="RFC 3339; left out: now + ROLEWATCH_SUPPRESSION_DEFAULT_EXPIRY."
    )


class Suppression(BaseModel):
    id: int
    kind: Literal["account", "pattern"]
    value: str
    reason: str
    created: str
    created_by: Person | None
    expires: str
    lifted: str | None
    lifted_by: Person | None
    active: bool
    held_back: int = Field(..., description="Alerts this entry kept from being raised.")
    last_held_back_window_id: int | None


class SuppressionList(BaseModel):
    suppressions: list[Suppression]


class Figures(BaseModel):
    model_config = ConfigDict(extra="allow")  # dismissed_<reason> for every reason
    raised: int
    suppressed: int
    reviewed: int
    confirmed: int
    dismissed: int
    median_time_to_review_seconds: float | None
    precision: float | None


class WindowFigures(Figures):
    window_id: int
    window_start: str
    window_end: str


class TransitionFigures(Figures):
    role_before: str
    role_after: str


class ReviewStats(BaseModel):
    from_: str | None = Field(None, alias="from")
    to: str | None
    reasons: dict[str, str]
    totals: Figures
    windows: list[WindowFigures]
    transitions: list[TransitionFigures]
