"""One window's numbers: snapshot → features → memberships → shift scores → alert evidence.

No database access here: the closer loads the inputs and stores the result, so this step can
also run in the detection benchmark with the very same code.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any
from urllib.parse import quote

import numpy as np

from rolewatch.config import Settings
from rolewatch.engine.activity import Activity, Counterparts, activity_counts
from rolewatch.engine.basis import Memberships
from rolewatch.engine.bridging import bridging_zscore, community_labels, undirected_ties
from rolewatch.engine.features import FeatureTable
from rolewatch.engine.scoring import ShiftPolicy, WindowScores, score_window
from rolewatch.engine.shift import baseline_mixture, feature_moves
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.loading import PastWindow, WindowEvents
from rolewatch.pipeline.model import FrozenModel
from rolewatch.store.alerts import (
    ActivityEvidence,
    Evidence,
    NewAlert,
    RoleShare,
    ShiftComponents,
    WindowRef,
)
from rolewatch.store.memberships import MIXTURE_DECIMALS

__all__ = [
    "PastWindow",
    "WindowRef",
    "WindowResult",
    "as_stored",
    "compute_window",
    "lookback_windows",
    "past_from_result",
]

REVIEW_NOTICE = (
    "A lead for human review, not a verdict: check the evidence before acting on this "
    "account, and follow your data-protection obligations and your organisation's policy."
)


@dataclass
class WindowResult:
    """Every active account's measures in one window, and the alerts it raised."""

    nodes: np.ndarray
    mixture: np.ndarray
    dominant: np.ndarray
    score: np.ndarray
    status: np.ndarray
    error: np.ndarray
    activity: Activity
    alerts: list[NewAlert]
    reconstruction_error: float | None
    new_count: int
    inactive_count: int
    scored_count: int


def as_stored(mixture: np.ndarray) -> np.ndarray:
    """Mixtures exactly as they read back from the store (6 decimals, renormalised), so a
    baseline built in memory equals one loaded from stored memberships."""
    rounded = np.round(np.asarray(mixture, dtype=np.float64), MIXTURE_DECIMALS)
    totals = rounded.sum(axis=1, keepdims=True)
    return np.divide(rounded, totals, out=rounded, where=totals > 0)


def past_from_result(result: WindowResult) -> PastWindow:
    """The history entry a measured window leaves for the windows after it."""
    return PastWindow(
        accounts=result.nodes,
        mixture=as_stored(result.mixture),
        events=result.activity.events.astype(np.float64),
    )


def lookback_windows(settings: Settings) -> int:
    """How many past windows the baseline may look back over."""
    return max(settings.baseline_windows, int(np.ceil(4 * settings.baseline_half_life)), 8)


def policy_from_settings(settings: Settings) -> ShiftPolicy:
    return ShiftPolicy(
        measure=settings.shift_measure,
        baseline=settings.shift_baseline,
        last_k=settings.baseline_windows,
        half_life=settings.baseline_half_life,
        alert_mode=settings.alert_mode,
        threshold=settings.alert_threshold,
        budget=settings.alert_budget,
        floor=settings.alert_floor,
        min_events=settings.min_events,
    )


def history_tensor(
    snapshot: Snapshot, past: list[PastWindow], n_roles: int
) -> tuple[np.ndarray, np.ndarray]:
    """(t x n x k mixtures with NaN rows where inactive, t x n events) for the snapshot's nodes.

    ``past`` runs from the oldest window to the newest.
    """
    n = snapshot.n_nodes
    mixtures = np.full((len(past), n, n_roles), np.nan)
    events = np.full((len(past), n), np.nan)
    for step, window in enumerate(past):
        rows = snapshot.index_of(window.accounts)
        present = rows >= 0
        mixtures[step, rows[present]] = window.mixture[present]
        events[step, rows[present]] = window.events[present]
    return mixtures, events


def window_bridging(snapshot: Snapshot | None, n_communities: int) -> np.ndarray | None:
    """Bridging z-score of every node of ``snapshot`` (None when off or no snapshot)."""
    if n_communities == 0 or snapshot is None or snapshot.n_nodes == 0:
        return None
    ties = undirected_ties(snapshot.counts)
    return bridging_zscore(ties, community_labels(ties, n_communities))


def bridging_inputs(
    snapshot: Snapshot, previous: Snapshot | None, n_communities: int
) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(current, baseline) bridging z-scores in ``snapshot``'s node order; the baseline is
    the previous window's value, NaN for accounts absent from it. (None, None) when off."""
    current = window_bridging(snapshot, n_communities)
    before = window_bridging(previous, n_communities)
    if current is None or before is None or previous is None:
        return None, None
    rows = previous.index_of(snapshot.nodes)
    baseline = np.where(rows >= 0, before[np.maximum(rows, 0)], np.nan)
    return current, baseline


def _latest_events(events_history: np.ndarray) -> np.ndarray:
    """Each node's event count in its most recent active past window (NaN when none)."""
    latest = np.full(events_history.shape[1], np.nan)
    for step in range(events_history.shape[0]):
        seen = ~np.isnan(events_history[step])
        latest[seen] = events_history[step, seen]
    return latest


def compute_window(
    model: FrozenModel,
    settings: Settings,
    current: WindowEvents,
    previous: WindowEvents | None,
    past: list[PastWindow],
    *,
    window: WindowRef,
    raise_alerts: bool,
) -> WindowResult:
    """Measure every active account of one window against its own history.

    Parameters
    ----------
    window
        The window's id (None until it is stored), start and end, copied into the evidence.
    raise_alerts
        False for training windows: they are scored for the record but never alert.
    """
    snapshot = current.snapshot()
    previous_snapshot = previous.snapshot() if previous is not None else None
    activity = activity_counts(snapshot, previous_snapshot)
    if snapshot.n_nodes == 0:
        return _empty_result(snapshot, activity, len(model.basis.role_ids), past)
    table = model.recipe.transform(snapshot)
    members = model.basis.memberships(table)
    policy = policy_from_settings(settings)
    baseline, baseline_events = _baselines(snapshot, past, policy, len(model.basis.role_ids))
    current_bridging, baseline_bridging = bridging_inputs(
        snapshot, previous_snapshot, policy.bridge_communities
    )
    scores = score_window(
        members.mixture,
        baseline,
        activity.events.astype(np.float64),
        baseline_events,
        members.error,
        model.basis.F,
        policy,
        current_bridging=current_bridging,
        baseline_bridging=baseline_bridging,
    )
    alerts: list[NewAlert] = []
    if raise_alerts and np.any(scores.alert):
        context = _AlertContext(
            model=model,
            policy=policy,
            threshold=float(
                settings.alert_threshold
                if policy.alert_mode == "threshold"
                else settings.alert_floor
            ),
            base_url=settings.public_url.rstrip("/"),
            window=window,
            snapshot=snapshot,
            table=table,
            mixture=members.mixture,
            baseline=baseline,
            scores=scores,
            activity=activity,
            counterparts=Counterparts(snapshot, previous_snapshot),
            previous=_previous_window(model, previous_snapshot),
        )
        alerts = _raise_alerts(context, current)
    return _measured_result(model, snapshot, members, scores, activity, alerts, past)


def _empty_result(
    snapshot: Snapshot, activity: Activity, n_roles: int, past: list[PastWindow]
) -> WindowResult:
    """The result of a window without events: nobody active, everyone before inactive."""
    return WindowResult(
        nodes=snapshot.nodes,
        mixture=np.zeros((0, n_roles)),
        dominant=np.zeros(0, dtype=np.int64),
        score=np.zeros(0),
        status=np.array([], dtype=object),
        error=np.zeros(0),
        activity=activity,
        alerts=[],
        reconstruction_error=None,
        new_count=0,
        inactive_count=len(past[-1].accounts) if past else 0,
        scored_count=0,
    )


def _baselines(
    snapshot: Snapshot, past: list[PastWindow], policy: ShiftPolicy, n_roles: int
) -> tuple[np.ndarray, np.ndarray]:
    """Each account's baseline mixture (NaN rows without history) and its event count in
    its latest active past window (NaN when none)."""
    history, events_history = history_tensor(snapshot, past, n_roles)
    if len(past):
        baseline = baseline_mixture(
            history, mode=policy.baseline, last_k=policy.last_k, half_life=policy.half_life
        )
    else:
        baseline = np.full((snapshot.n_nodes, n_roles), np.nan)
    return baseline, _latest_events(events_history)


def _measured_result(
    model: FrozenModel,
    snapshot: Snapshot,
    members: Memberships,
    scores: WindowScores,
    activity: Activity,
    alerts: list[NewAlert],
    past: list[PastWindow],
) -> WindowResult:
    status = np.asarray(scores.status, dtype=object)
    inactive_count = 0
    if past:
        still_here = snapshot.index_of(past[-1].accounts) >= 0
        inactive_count = int((~still_here).sum())
    role_ids = np.asarray(model.basis.role_ids)
    return WindowResult(
        nodes=snapshot.nodes,
        mixture=members.mixture,
        dominant=role_ids[np.argmax(members.mixture, axis=1)],
        score=np.asarray(scores.score, dtype=np.float64),
        status=status,
        error=members.error,
        activity=activity,
        alerts=alerts,
        reconstruction_error=float(np.mean(members.error)),
        new_count=int(np.sum(status == "new")),
        inactive_count=inactive_count,
        scored_count=int(np.sum(status == "scored")),
    )


@dataclass(frozen=True)
class _PreviousWindow:
    """The span before the window, as the evidence shows it ("before" values)."""

    snapshot: Snapshot
    table: FeatureTable
    activity: Activity


def _previous_window(model: FrozenModel, snapshot: Snapshot | None) -> _PreviousWindow | None:
    if snapshot is None or not snapshot.n_nodes:
        return None
    return _PreviousWindow(
        snapshot=snapshot,
        table=model.recipe.transform(snapshot),
        activity=activity_counts(snapshot),
    )


@dataclass(frozen=True)
class _AlertContext:
    """What every alert of one window draws its evidence from."""

    model: FrozenModel
    policy: ShiftPolicy
    threshold: float
    base_url: str
    window: WindowRef
    snapshot: Snapshot
    table: FeatureTable
    mixture: np.ndarray
    baseline: np.ndarray
    scores: WindowScores
    activity: Activity
    counterparts: Counterparts
    previous: _PreviousWindow | None


def _raise_alerts(context: _AlertContext, current: WindowEvents) -> list[NewAlert]:
    """One alert, with its evidence, per account the scores flagged."""
    rows = np.flatnonzero(context.scores.alert)
    samples = _sample_event_ids(context.snapshot, current, rows)
    return [_alert(context, int(row), samples.get(int(row), [])) for row in rows]


def _alert(context: _AlertContext, row: int, sample_ids: list[str]) -> NewAlert:
    role_ids = context.model.basis.role_ids
    mixture, baseline = context.mixture[row], context.baseline[row]
    role_before = (
        int(role_ids[int(np.nanargmax(baseline))]) if np.all(np.isfinite(baseline)) else None
    )
    return NewAlert(
        account=str(context.snapshot.nodes[row]),
        score=float(context.scores.score[row]),
        role_before=role_before,
        role_after=int(role_ids[int(np.argmax(mixture))]),
        evidence=_evidence(context, row, sample_ids),
    )


def _evidence(context: _AlertContext, row: int, sample_ids: list[str]) -> Evidence:
    model, scores, activity = context.model, context.scores, context.activity
    account = str(context.snapshot.nodes[row])
    before_raw = np.zeros(context.table.raw.shape[1])
    before = ActivityEvidence(
        events_out=int(activity.events_out[row]),
        events_in=int(activity.events_in[row]),
        counterparts=int(activity.counterparts[row]),
        new_counterparts=int(activity.new_counterparts[row]),
    )
    previous = context.previous
    if previous is not None:
        previous_row = previous.snapshot.index_of([account])[0]
        if previous_row >= 0:
            before_raw = previous.table.raw[previous_row]
            before = ActivityEvidence(
                events_out=before.events_out,
                events_in=before.events_in,
                counterparts=before.counterparts,
                new_counterparts=before.new_counterparts,
                events_out_before=int(previous.activity.events_out[previous_row]),
                events_in_before=int(previous.activity.events_in[previous_row]),
                counterparts_before=int(previous.activity.counterparts[previous_row]),
            )
    quoted = quote(account, safe="")
    return Evidence(
        threshold=context.threshold,
        measure=context.policy.measure,
        mode=context.policy.alert_mode,
        components=ShiftComponents(
            composition=_finite(scores.composition[row]),
            magnitude=_finite(scores.magnitude[row]),
            error=_finite(scores.error[row]),
            bridging=_finite(scores.bridging[row]) if scores.bridging is not None else None,
        ),
        mixture_before=_mixture_list(model, np.nan_to_num(context.baseline[row])),
        mixture_after=_mixture_list(model, context.mixture[row]),
        feature_moves=tuple(
            _readable_moves(context.table.names, before_raw, context.table.raw[row])
        ),
        activity=before,
        top_counterparts=tuple(context.counterparts.top(row, top=10)),
        sample_event_ids=tuple(sample_ids),
        history_url=f"{context.base_url}/v1/accounts/{quoted}/roles",
        page_url=f"{context.base_url}/accounts/{quoted}",
        notice=REVIEW_NOTICE,
        window=context.window,
        basis_version=model.basis.version,
    )


def _sample_event_ids(
    snapshot: Snapshot, current: WindowEvents, rows: np.ndarray, per_account: int = 5
) -> dict[int, list[str]]:
    """The first few event ids (in time order) that involve each of ``rows``."""
    if len(rows) == 0:
        return {}
    wanted = np.zeros(snapshot.n_nodes, dtype=bool)
    wanted[rows] = True
    actor_rows = snapshot.index_of(current.actor)
    target_rows = snapshot.index_of(current.target)
    samples: dict[int, list[str]] = {}
    for position in np.flatnonzero(wanted[actor_rows] | wanted[target_rows]):
        for node in (int(actor_rows[position]), int(target_rows[position])):
            if wanted[node]:
                found = samples.setdefault(node, [])
                if len(found) < per_account:
                    found.append(str(current.event_id[position]))
    return samples


def _mixture_list(model: FrozenModel, mixture: np.ndarray) -> tuple[RoleShare, ...]:
    """The mixture as role shares, largest first (weights to 4 decimals)."""
    entries = [
        RoleShare(
            role_id=int(role_id), name=model.role_name(int(role_id)), weight=round(float(w), 4)
        )
        for role_id, w in zip(model.basis.role_ids, mixture, strict=True)
    ]
    return tuple(sorted(entries, key=lambda entry: -entry.weight))


def _readable_moves(
    names: Sequence[str], before: np.ndarray, after: np.ndarray, top: int = 5
) -> list[dict[str, Any]]:
    """The features that moved most, base features first: an analyst reads "out_degree 2 →
    37" at once, while a third-round recursive aggregate needs a manual to decode. Recursive
    features fill the list only when fewer than ``top`` base features moved."""
    depth = np.array([name.count("(") for name in names])
    moves: list[dict[str, Any]] = []
    for level in range(int(depth.max(initial=0)) + 1):
        columns = np.flatnonzero(depth == level)
        if len(columns) == 0:
            continue
        picked = feature_moves(
            [names[int(c)] for c in columns], before[columns], after[columns], top=top
        )
        moves.extend(picked[: top - len(moves)])
        if len(moves) >= top:
            break
    return moves


def _finite(value: float) -> float | None:
    number = float(value)
    return number if np.isfinite(number) else None
