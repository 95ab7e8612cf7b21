"""One window's numbers: snapshot → features → memberships → shift scores → alert evidence.

No database access here: the closer loads the inputs and stores the result, so this step can
also run in the detection benchmark with the very same code.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from rolewatch.engine.activity import Activity, Counterparts, activity_counts
from rolewatch.engine.bridging import bridging_zscore, community_labels, undirected_ties
from rolewatch.engine.scoring import ShiftPolicy, score_window
from rolewatch.engine.shift import baseline_mixture, feature_moves
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.loading import WindowEvents
from rolewatch.pipeline.model import FrozenModel

REVIEW_NOTICE = (
    "A lead for human review, not a verdict: check the evidence before acting on this "
    "account, and follow your data-protection obligations and your organisation's policy."
)


@dataclass(frozen=True)
class PastWindow:
    """Stored memberships of one earlier window, mapped onto the model's role ids."""

    accounts: np.ndarray  # str
    mixture: np.ndarray  # m x k, columns in model.basis.role_ids order
    events: np.ndarray  # m


@dataclass
class WindowResult:
    nodes: np.ndarray
    mixture: np.ndarray
    dominant: np.ndarray
    score: np.ndarray
    status: np.ndarray
    error: np.ndarray
    activity: Activity
    alerts: list[dict]
    reconstruction_error: float | None
    new_count: int
    inactive_count: int
    scored_count: int


def as_stored(mixture: np.ndarray) -> np.ndarray:
    """Mixtures exactly as they read back from the store (6 decimals, renormalised), so a
    baseline built in memory equals one loaded from stored memberships."""
    rounded = np.round(np.asarray(mixture, dtype=np.float64), 6)
    totals = rounded.sum(axis=1, keepdims=True)
    return np.divide(rounded, totals, out=rounded, where=totals > 0)


def past_from_result(result: WindowResult) -> PastWindow:
    """The history entry a measured window leaves for the windows after it."""
    return PastWindow(
        accounts=result.nodes,
        mixture=as_stored(result.mixture),
        events=result.activity.events.astype(np.float64),
    )


def policy_from_settings(settings) -> ShiftPolicy:
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


def history_tensor(snapshot: Snapshot, past: list[PastWindow], n_roles: int):
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


def bridging_inputs(snapshot: Snapshot, previous: Snapshot | None, n_communities: int):
    """(current, baseline) bridging z-scores in ``snapshot``'s node order; the baseline is
    the previous window's value, NaN for accounts absent from it. (None, None) when off."""
    current = window_bridging(snapshot, n_communities)
    before = window_bridging(previous, n_communities)
    if current is None or before is None:
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
    settings,
    current: WindowEvents,
    previous: WindowEvents | None,
    past: list[PastWindow],
    *,
    window: dict,
    raise_alerts: bool,
) -> WindowResult:
    """Measure every active account of one window against its own history.

    Parameters
    ----------
    window
        ``{"id", "start", "end"}`` of the window (RFC 3339), copied into the evidence.
    raise_alerts
        False for training windows: they are scored for the record but never alert.
    """
    snapshot = current.snapshot()
    previous_snapshot = previous.snapshot() if previous is not None else None
    role_ids = np.asarray(model.basis.role_ids)
    k = len(role_ids)
    n = snapshot.n_nodes
    activity = activity_counts(snapshot, previous_snapshot)
    if n == 0:
        return WindowResult(
            nodes=snapshot.nodes,
            mixture=np.zeros((0, k)),
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
    table = model.recipe.transform(snapshot)
    members = model.basis.memberships(table)
    history, events_history = history_tensor(snapshot, past, k)
    policy = policy_from_settings(settings)
    if len(past):
        baseline = baseline_mixture(
            history, mode=policy.baseline, last_k=policy.last_k, half_life=policy.half_life
        )
    else:
        baseline = np.full((n, k), np.nan)
    baseline_events = _latest_events(events_history)
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
    dominant = role_ids[np.argmax(members.mixture, axis=1)]
    status = np.asarray(scores.status, dtype=object)
    inactive_count = 0
    if past:
        still_here = snapshot.index_of(past[-1].accounts) >= 0
        inactive_count = int((~still_here).sum())

    alerts: list[dict] = []
    if raise_alerts and np.any(scores.alert):
        previous_table = (
            model.recipe.transform(previous_snapshot)
            if previous_snapshot is not None and previous_snapshot.n_nodes
            else None
        )
        previous_activity = (
            activity_counts(previous_snapshot) if previous_table is not None else None
        )
        threshold = (
            settings.alert_threshold if policy.alert_mode == "threshold" else settings.alert_floor
        )
        alert_rows = np.flatnonzero(scores.alert)
        counterparts = Counterparts(snapshot, previous_snapshot)
        samples = _sample_event_ids(snapshot, current, alert_rows)
        for row in alert_rows:
            alerts.append(
                _alert_record(
                    model,
                    settings,
                    row=int(row),
                    snapshot=snapshot,
                    previous_snapshot=previous_snapshot,
                    table=table,
                    previous_table=previous_table,
                    previous_activity=previous_activity,
                    mixture=members.mixture[row],
                    baseline=baseline[row],
                    scores=scores,
                    activity=activity,
                    baseline_events=baseline_events[row],
                    counterparts=counterparts,
                    sample_ids=samples.get(int(row), []),
                    window=window,
                    threshold=threshold,
                    policy=policy,
                )
            )
    return WindowResult(
        nodes=snapshot.nodes,
        mixture=members.mixture,
        dominant=dominant,
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


def _mixture_list(model: FrozenModel, mixture: np.ndarray) -> list[dict]:
    entries = [
        {
            "role_id": int(role_id),
            "name": model.role_name(int(role_id)),
            "weight": round(float(w), 4),
        }
        for role_id, w in zip(model.basis.role_ids, mixture)
    ]
    return sorted(entries, key=lambda entry: -entry["weight"])


def _alert_record(
    model,
    settings,
    *,
    row,
    snapshot,
    previous_snapshot,
    table,
    previous_table,
    previous_activity,
    mixture,
    baseline,
    scores,
    activity,
    baseline_events,
    counterparts,
    sample_ids,
    window,
    threshold,
    policy,
) -> dict:
    account = str(snapshot.nodes[row])
    role_ids = model.basis.role_ids
    role_after = int(role_ids[int(np.argmax(mixture))])
    role_before = (
        int(role_ids[int(np.nanargmax(baseline))]) if np.all(np.isfinite(baseline)) else None
    )
    before_raw = np.zeros(table.raw.shape[1])
    before_counts = {"events_out_before": 0, "events_in_before": 0, "counterparts_before": 0}
    if previous_table is not None:
        previous_row = previous_snapshot.index_of([account])[0]
        if previous_row >= 0:
            before_raw = previous_table.raw[previous_row]
            before_counts = {
                "events_out_before": int(previous_activity.events_out[previous_row]),
                "events_in_before": int(previous_activity.events_in[previous_row]),
                "counterparts_before": int(previous_activity.counterparts[previous_row]),
            }
    base_url = settings.public_url.rstrip("/")
    from urllib.parse import quote

    evidence = {
        "threshold": float(threshold),
        "measure": policy.measure,
        "mode": policy.alert_mode,
        "components": {
            "composition": _finite(scores.composition[row]),
            "magnitude": _finite(scores.magnitude[row]),
            "error": _finite(scores.error[row]),
            "bridging": _finite(scores.bridging[row]) if scores.bridging is not None else None,
        },
        "mixture_before": _mixture_list(model, np.nan_to_num(baseline)),
        "mixture_after": _mixture_list(model, mixture),
        "feature_moves": _readable_moves(table.names, before_raw, table.raw[row]),
        "activity": {
            "events_out": int(activity.events_out[row]),
            "events_in": int(activity.events_in[row]),
            "counterparts": int(activity.counterparts[row]),
            "new_counterparts": int(activity.new_counterparts[row]),
            **before_counts,
        },
        "top_counterparts": counterparts.top(row, top=10),
        "sample_event_ids": sample_ids,
        "history_url": f"{base_url}/v1/accounts/{quote(account, safe='')}/roles",
        "page_url": f"{base_url}/accounts/{quote(account, safe='')}",
        "notice": REVIEW_NOTICE,
        "window": window,
        "basis_version": model.basis.version,
    }
    return {
        "account": account,
        "score": float(scores.score[row]),
        "role_before": role_before,
        "role_after": role_after,
        "evidence": evidence,
    }


def _readable_moves(names, before: np.ndarray, after: np.ndarray, top: int = 5) -> list[dict]:
    """The features that moved most, base features first: an analyst reads "out_degree 2 →
    37" at once, while a third-round recursive aggregate needs a manual to decode. Recursive
    features fill the list only when fewer than ``top`` base features moved."""
    depth = np.array([name.count("(") for name in names])
    moves: list[dict] = []
    for level in range(int(depth.max(initial=0)) + 1):
        columns = np.flatnonzero(depth == level)
        if len(columns) == 0:
            continue
        picked = feature_moves(
            [names[c] for c in columns], before[columns], after[columns], top=top
        )
        moves.extend(picked[: top - len(moves)])
        if len(moves) >= top:
            break
    return moves


def _finite(value) -> float | None:
    value = float(value)
    return value if np.isfinite(value) else None
