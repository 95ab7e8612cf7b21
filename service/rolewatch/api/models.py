"""Pydantic v2 models of the wire format (README.md "Posting events", docs/CONTRACTS.md),
used for validation of small request bodies and for the OpenAPI document at /openapi.json.

Events themselves are validated one by one by :mod:`rolewatch.store.events` in plain Python
(one model per event would cost more than the whole insert, and a bad event must not lose
the good ones around it); :class:`EventBatch` is the source of the ``POST /v1/events``
request schema, with the store's field limits. Times are RFC 3339 strings in UTC with a "Z".
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, Field

from rolewatch.store.schema import MAX_ACCOUNT_CHARS, MAX_ID_CHARS, MAX_KIND_CHARS


class Event(BaseModel):
    """One interaction event."""

    model_config = ConfigDict(extra="forbid")
    id: str | None = Field(
        None,
        max_length=MAX_ID_CHARS,
        description="Idempotency key; absent: a hash of the other fields.",
    )
    time: str = Field(
        ...,
        description="RFC 3339 timestamp with an offset, e.g. 2026-02-12T09:30:00Z.",
        json_schema_extra={"format": "date-time"},
    )
    actor: str = Field(..., max_length=MAX_ACCOUNT_CHARS, description="The account that acted.")
    target: str = Field(
        ..., max_length=MAX_ACCOUNT_CHARS, description="The account acted upon; differs from actor."
    )
    kind: str | None = Field(None, max_length=MAX_KIND_CHARS, description="e.g. payment, message.")
    weight: float = Field(1.0, ge=0, description="Finite, ≥ 0, e.g. an amount.")


class EventBatch(BaseModel):
    """The JSON body of ``POST /v1/events``."""

    model_config = ConfigDict(extra="forbid")
    events: list[Event]


class Rejection(BaseModel):
    index: int = Field(
        ..., description="Position of the event in the batch (or NDJSON line, from 0)."
    )
    error: str


class IngestResponse(BaseModel):
    accepted: int = Field(..., description="Events newly stored.")
    duplicates: int = Field(
        ..., description="Events whose id was already stored with the same content."
    )
    late: int = Field(0, description="Accepted events whose window had already closed.")
    rejected: list[Rejection]
    conflicts: list[Rejection] = Field(
        default_factory=list,
        description="Events whose id is already stored with other content; the stored event "
        "is kept.",
    )


class Problem(BaseModel):
    detail: str


class RoleRef(BaseModel):
    id: int
    name: str


class Activity(BaseModel):
    events_out: int
    events_in: int
    counterparts: int
    new_counterparts: int


class HistoryEntry(BaseModel):
    window_id: int
    window_start: str
    window_end: str
    basis_version: str
    mixture: dict[str, float] = Field(
        ...,
        description="{role_id: weight}, sums to 1; empty when the account had too little "
        "activity in the window to fit a role (status too_little).",
    )
    dominant_role: RoleRef | None = Field(
        ..., description="Null when the account had too little activity to fit a role."
    )
    score: float | None = Field(
        ..., description="Shift score; null on first appearance or when not scored."
    )
    status: str = Field(
        ...,
        description="scored | new (no earlier window to compare with) | too_little (too "
        "little activity to fit a role: not scored, no role) | low_activity (fewer than "
        "min_events in either window)",
    )
    activity: Activity
    reconstruction_error: float


class AccountHistory(BaseModel):
    account: str
    windows: list[HistoryEntry]


class Role(BaseModel):
    id: int
    name: str
    description: str
    profile: dict[str, Any]


class RolesResponse(BaseModel):
    basis_version: str | None
    recipe_version: str | None = None
    created: str | None = None
    trained_from: str | None = None
    trained_to: str | None = None
    roles: list[Role]
    message: str | None = None


class RenameRole(BaseModel):
    model_config = ConfigDict(extra="forbid")
    name: str = Field(..., min_length=1, max_length=100, pattern=r"^[^\x00-\x1f\x7f-\x9f]+$")


class StageSeconds(BaseModel):
    """Seconds one window close spent in each stage, in the order they run."""

    load: float = Field(..., description="Reading the window's events and its history.")
    features: float = Field(..., description="The snapshot and its ReFeX features.")
    ties: float = Field(..., description="Tie cells against the known pairs, activity counts.")
    memberships: float = Field(..., description="Role memberships against the frozen basis.")
    history: float = Field(..., description="Each account's baseline and novelty history.")
    bridging: float = Field(..., description="Communities (Leiden) and the bridging z-score.")
    scoring: float = Field(..., description="The shift scores and the alert decision.")
    evidence: float = Field(..., description="The alerts' evidence.")
    store: float = Field(
        ..., description="Writing memberships, alerts and the window record (to the commit)."
    )


class ClosedWindow(BaseModel):
    id: int
    start: str
    end: str
    status: str
    closed: str
    event_count: int
    account_count: int
    late_count: int
    alert_count: int
    new_count: int | None = Field(None, description="Accounts seen without a baseline.")
    inactive_count: int | None = Field(
        None, description="Accounts active before, not in this window."
    )
    scored_count: int | None = Field(None, description="Accounts whose shift was scored.")
    training: bool
    recipe_version: str | None
    basis_version: str | None
    reconstruction_error: float | None
    close_seconds: float | None = Field(
        None, description="Seconds computing the window (features to evidence)."
    )
    stage_seconds: StageSeconds | None = Field(
        None, description="Seconds of each stage of the close; null for windows closed before."
    )


class OpenWindow(BaseModel):
    start: str
    end: str
    status: str = Field(..., description="open, or due: the closer will close it at its next tick.")
    event_count: int


class WindowsResponse(BaseModel):
    watermark: str | None = Field(
        ..., description="max(event time) - lateness; null before any event."
    )
    latest_event: str | None
    open: list[OpenWindow]
    closed: list[ClosedWindow]


class Alert(BaseModel):
    """An alert, in the form of docs/CONTRACTS.md (also the webhook ``json`` payload data)."""

    id: int
    account: str
    window_id: int
    window_start: str
    window_end: str
    created: str
    score: float
    basis_version: str
    role_before: RoleRef | None
    role_after: RoleRef
    headline: str = Field(
        ...,
        description="What changed in one line: both roles, or 'same role (name)', and the "
        "readable measure that moved most.",
    )
    evidence: dict[str, Any]


class AlertsPage(BaseModel):
    alerts: list[Alert]
    next_cursor: str | None = Field(..., description="Pass as cursor= for the next (older) page.")


class RefitRequest(BaseModel):
    model_config = ConfigDict(extra="forbid", populate_by_name=True)
    from_: str = Field(..., alias="from", description="Start of the reference period (RFC 3339).")
    to: str = Field(..., description="End of the reference period (RFC 3339), exclusive.")


class KeyInfo(BaseModel):
    key_id: str
    scopes: list[str]
    label: str | None
    created: str
    revoked: str | None


class Health(BaseModel):
    status: str
    database: str
