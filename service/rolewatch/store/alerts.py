"""Alerts: the typed record of a raised alert with its evidence, and the one API form.

A window close builds :class:`NewAlert` records (pipeline.compute); :func:`insert_alerts`
stores them and returns each one in the API form of docs/CONTRACTS.md ("Alert"), made by
:func:`alert_form` — the same function :mod:`rolewatch.store.queries` uses when it reads
alerts back, so a webhook body and ``GET /v1/alerts/{id}`` can never disagree.

The evidence is stored as JSON text; :meth:`Evidence.to_dict` gives its keys in the
documented order (docs/CONTRACTS.md "Alert evidence").
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, fields, is_dataclass, replace
from typing import Any

from sqlalchemy.engine import Connection

from rolewatch.clock import to_rfc3339
from rolewatch.engine.headline import compose_headline
from rolewatch.store.db import inserted_ids
from rolewatch.store.schema import alerts

_PLAIN = (str, int, float, bool, type(None))


def _json_ready(value: Any) -> Any:
    """Dataclasses as dicts (fields in declaration order), tuples as lists, the rest as is."""
    if isinstance(value, _PLAIN):
        return value
    if isinstance(value, (list, tuple)):
        return [_json_ready(item) for item in value]
    names = _field_names(type(value))
    if names is None:
        return value
    return {name: _json_ready(getattr(value, name)) for name in names}


_FIELD_NAMES: dict[type, tuple[str, ...] | None] = {}


def _field_names(kind: type) -> tuple[str, ...] | None:
    """A dataclass's field names in declaration order (None for any other type), looked up
    once per class: a window's thousand alerts hold about a hundred thousand values."""
    if kind not in _FIELD_NAMES:
        names = tuple(item.name for item in fields(kind)) if is_dataclass(kind) else None
        _FIELD_NAMES[kind] = names
    return _FIELD_NAMES[kind]


@dataclass(frozen=True)
class RoleShare:
    """One role's weight in a mixture, with the role's name when the alert was raised."""

    role_id: int
    name: str
    weight: float


@dataclass(frozen=True)
class ShiftComponents:
    """The parts of the shift score (None where a part is not finite or not computed).

    ``composition`` is the role-mixture distance, ``role`` its evidence-weighted z-score;
    ``novelty_out`` / ``novelty_in`` / ``ties`` / ``direction`` / ``bridging`` the tie-level
    z-scores (engine.components); ``strongest`` names the component that set the score.
    """

    composition: float | None
    magnitude: float | None
    error: float | None
    bridging: float | None
    role: float | None = None
    novelty_out: float | None = None
    novelty_in: float | None = None
    ties: float | None = None
    direction: float | None = None
    strongest: str | None = None


@dataclass(frozen=True)
class ActivityEvidence:
    """The account's activity in this window and in its baseline window (``*_before``;
    None where the baseline window did not record it). Counterparts are distinct accounts;
    *new* ones never dealt with the account in any earlier window."""

    events_out: int
    events_in: int
    counterparts: int
    new_counterparts: int
    events_out_before: int | None = 0
    events_in_before: int | None = 0
    counterparts_before: int | None = 0
    new_counterparts_before: int | None = None
    new_sent_to: int | None = None
    new_received_from: int | None = None
    new_sent_to_before: int | None = None
    new_received_from_before: int | None = None


@dataclass(frozen=True)
class MeasureValue:
    """One readable measure of the account (engine.readable) in its baseline window and in
    this one; ``before`` is None where the baseline window's events were purged."""

    measure: str
    label: str
    before: float | None
    after: float


@dataclass(frozen=True)
class WindowRef:
    """The window an alert belongs to (its id is known once the window is stored)."""

    id: int | None
    start: str
    end: str


@dataclass(frozen=True)
class Evidence:
    """Why an account was alerted: what a reviewer reads before acting."""

    threshold: float
    measure: str
    mode: str
    components: ShiftComponents
    mixture_before: tuple[RoleShare, ...]
    mixture_after: tuple[RoleShare, ...]
    feature_moves: tuple[dict[str, Any], ...]  # engine.shift.feature_moves entries
    activity: ActivityEvidence
    top_counterparts: tuple[dict[str, Any], ...]  # engine.activity.Counterparts.top entries
    sample_event_ids: tuple[str, ...]
    history_url: str
    page_url: str
    notice: str
    window: WindowRef
    basis_version: str
    # the baseline window every "before" value comes from (None: the account had none)
    baseline: WindowRef | None = None
    measures: tuple[MeasureValue, ...] = ()
    # what moved, in words (engine.headline.change_text); the API form's headline adds the
    # role names as they read when the alert is shown
    change: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """The JSON document stored with the alert and served under ``evidence``."""
        return _json_ready(self)


@dataclass(frozen=True)
class NewAlert:
    """An alert a window close raised, before it is stored."""

    account: str
    score: float
    role_before: int | None  # the baseline's dominant role; None without a baseline
    role_after: int
    evidence: Evidence


@dataclass(frozen=True)
class StoredAlert:
    """An alert as the store holds it (``window_start_us`` comes from its window)."""

    id: int
    window_id: int
    account: str
    created_us: int
    window_end_us: int
    window_start_us: int
    score: float
    basis_version: str
    role_before: int | None
    role_after: int
    evidence: str  # JSON text


@dataclass(frozen=True)
class RoleRef:
    id: int
    name: str


@dataclass(frozen=True)
class Alert:
    """An alert in its API form (also the ``data`` of a ``json`` webhook body)."""

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
    headline: str
    evidence: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        return _json_ready(self)


def _role_name(
    names: Mapping[tuple[str, int], str],
    basis_version: str,
    role_id: int,
    evidence_mixture: Iterable[dict[str, Any]] | None,
) -> str:
    name = names.get((basis_version, role_id))
    if name is not None:
        return name
    # the basis' roles are gone: fall back on the name stored with the alert
    stored = next(
        (m.get("name") for m in evidence_mixture or () if m.get("role_id") == role_id), None
    )
    return stored if isinstance(stored, str) else f"role {role_id}"


def _headline(row: StoredAlert, before: RoleRef | None, after: RoleRef, evidence: dict) -> str:
    """The alert's headline with the roles' current names (alerts stored before headlines
    existed read "role mixture shifted")."""
    return compose_headline(
        before.name if before else None,
        after.name,
        same_role=row.role_before == row.role_after,
        change=str(evidence.get("change") or "role mixture shifted"),
        baseline=evidence.get("baseline") is not None,
    )


def alert_form(row: StoredAlert, names: Mapping[tuple[str, int], str]) -> Alert:
    """A stored alert in the API form; ``names`` maps ``(basis_version, role_id)`` to the
    role's current name."""
    evidence = json.loads(row.evidence)
    role_before = None
    if row.role_before is not None:
        role_before = RoleRef(
            id=row.role_before,
            name=_role_name(
                names, row.basis_version, row.role_before, evidence.get("mixture_before")
            ),
        )
    role_after = RoleRef(
        id=row.role_after,
        name=_role_name(names, row.basis_version, row.role_after, evidence.get("mixture_after")),
    )
    return Alert(
        id=row.id,
        account=row.account,
        window_id=row.window_id,
        window_start=to_rfc3339(row.window_start_us),
        window_end=to_rfc3339(row.window_end_us),
        created=to_rfc3339(row.created_us),
        score=row.score,
        basis_version=row.basis_version,
        role_before=role_before,
        role_after=role_after,
        headline=_headline(row, role_before, role_after, evidence),
        evidence=evidence,
    )


def insert_alerts(
    connection: Connection,
    raised: Sequence[NewAlert],
    *,
    window_id: int,
    window_start_us: int,
    window_end_us: int,
    created_us: int,
    basis_version: str,
    names: Mapping[tuple[str, int], str],
) -> list[Alert]:
    """Store the alerts of one window (their evidence gets the window's id, all rows in a
    few batched statements); return them in the API form, in ``raised`` order."""
    texts = [
        json.dumps(
            replace(alert.evidence, window=replace(alert.evidence.window, id=window_id)).to_dict()
        )
        for alert in raised
    ]
    rows: list[dict[str, Any]] = [
        {
            "window_id": window_id,
            "account": alert.account,
            "created_us": created_us,
            "window_end_us": window_end_us,
            "score": alert.score,
            "basis_version": basis_version,
            "role_before": alert.role_before,
            "role_after": alert.role_after,
            "evidence": text,
        }
        for alert, text in zip(raised, texts, strict=True)
    ]
    ids = inserted_ids(connection, alerts.insert(), rows)
    return [
        alert_form(StoredAlert(id=alert_id, window_start_us=window_start_us, **row), names)
        for alert_id, row in zip(ids, rows, strict=True)
    ]
