"""What an alert shows: the evidence a reviewer reads, every "before" from one window.

The *baseline window* of an alerted account (:mod:`rolewatch.pipeline.history`) is the one
source of everything shown as "before": the mixture and dominant role, the activity and
tie counts, the features (recomputed from that window's events when they are still
stored) and, beside them, which of this window's counterparts are new over the account's
known history.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Any
from urllib.parse import quote

import numpy as np

from rolewatch.engine.activity import Activity, Counterparts
from rolewatch.engine.features import FeatureTable
from rolewatch.engine.headline import LEADS, change_text, measure_moves
from rolewatch.engine.pairs import PairHistory
from rolewatch.engine.readable import MEASURE_LABELS, MEASURES, feature_label, readable_measures
from rolewatch.engine.scoring import ShiftPolicy, WindowScores
from rolewatch.engine.shift import feature_moves
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.history import AccountHistory
from rolewatch.pipeline.loading import (
    ClosingEvents,
    EventsElsewhere,
    PastWindowFacts,
    WindowEvents,
)
from rolewatch.pipeline.model import FrozenModel
from rolewatch.pipeline.recent import RecentFeatures
from rolewatch.store.alerts import (
    ActivityEvidence,
    Evidence,
    MeasureValue,
    NewAlert,
    RoleShare,
    ShiftComponents,
    WindowRef,
)

__all__ = ["REVIEW_NOTICE", "AlertContext", "alerts_with_evidence"]

log = logging.getLogger("rolewatch.pipeline")

REVIEW_NOTICE = (
    "A lead for human review, not a verdict: check the evidence before acting on this "
    "account, and follow your data-protection obligations and your organisation's policy."
)


@dataclass(frozen=True)
class AlertContext:
    """What every alert of one window draws its evidence from."""

    model: FrozenModel
    policy: ShiftPolicy
    threshold: float
    base_url: str
    window: WindowRef
    snapshot: Snapshot
    table: FeatureTable
    mixture: np.ndarray
    scores: WindowScores
    activity: Activity
    ties: np.ndarray  # n x 4 tie cells of this window
    history: AccountHistory
    known: PairHistory
    events_of: Callable[[WindowRef], ClosingEvents | None] | None
    recent: RecentFeatures | None = None
    # Features of a baseline window recomputed from its events: None transforms it here;
    # a cluster close passes its own measure, so that window is computed on the workers too.
    features_of: Callable[[Snapshot, ClosingEvents], FeatureTable] | None = None


def alerts_with_evidence(context: AlertContext, current: ClosingEvents) -> list[NewAlert]:
    """One alert, with its evidence, per account the scores flagged."""
    rows = np.flatnonzero(context.scores.alert)
    samples = _sample_event_ids(context.snapshot, current, rows)
    before = _baseline_features(context, rows)
    now = readable_measures(
        context.snapshot.counts,
        rows=rows,
        new_counterparts=context.activity.new_counterparts,
        triangles=context.table.triangles,
    )
    tops = Counterparts(context.snapshot, known=context.known).top_of(rows, top=10)
    # One read of the alerted rows: a cluster close keeps a large window's values on its
    # workers, where each read is a round trip.
    raw_after = context.table.raw[rows]
    alerts = []
    for position, row in enumerate(rows):
        raw, measures_before = before.get(int(row), (None, None))
        alerts.append(
            _alert(
                context,
                int(row),
                samples.get(int(row), []),
                raw,
                raw_after[position],
                tops[position],
                _measures(context, int(row), measures_before, now.row(position)),
            )
        )
    return alerts


def _measures(
    context: AlertContext, row: int, before: dict[str, float] | None, after: dict[str, float]
) -> tuple[MeasureValue, ...]:
    """The readable measures before and after; without the baseline's events, the event
    counts and the share of new counterparts come from the stored baseline figures."""
    history = context.history
    if before is None:
        before = {name: float("nan") for name in MEASURES}
        before["events_out"] = float(history.events_out[row])
        before["events_in"] = float(history.events_in[row])
    counterparts = float(history.counterparts[row])
    if np.isfinite(counterparts):
        new = float(history.new_counterparts[row])
        before["new_share"] = new / counterparts if counterparts > 0 else 0.0
    return tuple(
        MeasureValue(
            measure=name,
            label=MEASURE_LABELS[name],
            before=round(before[name], 4) if np.isfinite(before[name]) else None,
            after=round(after[name], 4),
        )
        for name in MEASURES
        if np.isfinite(after[name])
    )


def _baseline_features(
    context: AlertContext, rows: np.ndarray
) -> dict[int, tuple[np.ndarray, dict[str, float]]]:
    """Raw features and readable measures of each alerted account in its baseline window:
    kept from that window's close when it was the last one measured here, else recomputed
    from its events while they are still stored (each window once)."""
    found: dict[int, tuple[np.ndarray, dict[str, float]]] = {}
    windows = context.history.window[rows]
    for step in np.unique(windows[windows >= 0]):
        wanted = rows[windows == step]
        found.update(_baseline_rows(context, context.history.windows[int(step)], wanted))
    return found


def _baseline_rows(
    context: AlertContext, past: PastWindowFacts, wanted: np.ndarray
) -> dict[int, tuple[np.ndarray, dict[str, float]]]:
    """:func:`_baseline_features` of the accounts ``wanted`` whose baseline is ``past``."""
    recent = context.recent
    kept = None if recent is None else recent.find(past, context.model.recipe.version)
    if recent is not None and kept is not None:
        try:
            return _rows_of(context, *kept, wanted)
        except Exception as error:  # noqa: BLE001 - kept values are a cache: recompute
            log.warning(
                "the kept features of the baseline window could not be read; computing them again",
                extra={"fields": {"window": past.ref and past.ref.end, "error": repr(error)}},
            )
            recent.forget()
    measured = _recomputed_features(context, past, context.snapshot.nodes[wanted])
    return {} if measured is None else _rows_of(context, *measured, wanted)


def _rows_of(
    context: AlertContext, snapshot: Snapshot, table: FeatureTable, wanted: np.ndarray
) -> dict[int, tuple[np.ndarray, dict[str, float]]]:
    """Raw features and readable measures in ``snapshot`` of the rows ``wanted`` of this
    window (those of its accounts that were there)."""
    at = snapshot.index_of(context.snapshot.nodes[wanted])
    present = at >= 0
    readable = readable_measures(snapshot.counts, rows=at[present], triangles=table.triangles)
    raw = table.raw[at[present]]
    return {
        int(row): (raw[position], readable.row(position))
        for position, row in enumerate(wanted[present])
    }


def _recomputed_features(
    context: AlertContext, past: PastWindowFacts, accounts: np.ndarray
) -> tuple[Snapshot, FeatureTable] | None:
    """An earlier window's snapshot and feature table from its stored events, or None when
    its events are gone. Events the workers hold give a snapshot of ``accounts``' own arcs
    only (what :func:`_rows_of` reads of them), not the whole window's graph here."""
    if context.events_of is None or past.ref is None:
        return None
    events = context.events_of(past.ref)
    if events is None or not len(events):
        return None
    if context.features_of is None:  # the whole graph here, for the transform
        snapshot = events.snapshot()
        return snapshot, context.model.recipe.transform(snapshot)
    # the measure reads a held window's events by the snapshot's node index, and builds
    # the graph of events the workers hold there
    if isinstance(events, WindowEvents):
        snapshot = events.snapshot()
    else:
        snapshot = events.snapshot_around(accounts)
    return snapshot, context.features_of(snapshot, events)


def _alert(
    context: AlertContext,
    row: int,
    sample_ids: list[str],
    before_raw: np.ndarray | None,
    after_raw: np.ndarray,
    top_counterparts: list[dict],
    measures: tuple[MeasureValue, ...],
) -> NewAlert:
    role_ids = context.model.basis.role_ids
    baseline = context.history.window_mixture[row]
    role_before = (
        int(role_ids[int(np.nanargmax(baseline))]) if np.all(np.isfinite(baseline)) else None
    )
    role_after = int(role_ids[int(np.argmax(context.mixture[row]))])
    evidence = _evidence(context, row, sample_ids, before_raw, after_raw, top_counterparts)
    activity = evidence.activity
    moves = measure_moves(
        {m.measure: m.before for m in measures},
        {m.measure: m.after for m in measures},
        new_counterparts=activity.new_counterparts,
        new_counterparts_before=activity.new_counterparts_before,
        lead=LEADS.get(evidence.components.strongest or ""),
    )
    change = change_text(moves, same_role=role_before == role_after)
    return NewAlert(
        account=str(context.snapshot.nodes[row]),
        score=float(context.scores.score[row]),
        role_before=role_before,
        role_after=role_after,
        evidence=replace(evidence, measures=measures, change=change),
    )


def _count(value: float) -> int | None:
    return int(value) if np.isfinite(value) else None


def _activity_evidence(context: AlertContext, row: int) -> ActivityEvidence:
    activity, history, ties = context.activity, context.history, context.ties
    return ActivityEvidence(
        events_out=int(activity.events_out[row]),
        events_in=int(activity.events_in[row]),
        counterparts=int(activity.counterparts[row]),
        new_counterparts=int(activity.new_counterparts[row]),
        events_out_before=_count(history.events_out[row]),
        events_in_before=_count(history.events_in[row]),
        counterparts_before=_count(history.counterparts[row]),
        new_counterparts_before=_count(history.new_counterparts[row]),
        new_sent_to=int(ties[row, 1]),
        new_received_from=int(ties[row, 3]),
        new_sent_to_before=_count(history.cells[row, 1]),
        new_received_from_before=_count(history.cells[row, 3]),
    )


def _components(scores: WindowScores, row: int) -> ShiftComponents:
    at = scores.detail_index(row)  # the account's place among the details brought back
    parts = {name: _finite(values[at]) for name, values in scores.components.items()}
    strongest = str(scores.strongest[at]) if scores.strongest is not None else ""
    return ShiftComponents(
        composition=_finite(scores.composition[at]),
        magnitude=_finite(scores.magnitude[at]),
        error=_finite(scores.error[at]),
        bridging=_finite(scores.bridging[at]) if scores.bridging is not None else None,
        role=parts.get("role"),
        novelty_out=parts.get("novelty_out"),
        novelty_in=parts.get("novelty_in"),
        ties=parts.get("ties"),
        direction=parts.get("direction"),
        strongest=strongest or None,
    )


def _evidence(
    context: AlertContext,
    row: int,
    sample_ids: list[str],
    before_raw: np.ndarray | None,
    after_raw: np.ndarray,
    top_counterparts: list[dict],
) -> Evidence:
    model, history = context.model, context.history
    account = str(context.snapshot.nodes[row])
    step = int(history.window[row])
    baseline_ref = history.windows[step].ref if step >= 0 else None
    before_mixture = history.window_mixture[row]
    moves = (
        _readable_moves(context.table.names, before_raw, after_raw)
        if before_raw is not None
        else []
    )
    quoted = quote(account, safe="")
    return Evidence(
        threshold=context.threshold,
        measure=context.policy.measure,
        mode=context.policy.alert_mode,
        components=_components(context.scores, row),
        mixture_before=(
            _mixture_list(model, before_mixture) if np.isfinite(before_mixture).all() else ()
        ),
        mixture_after=_mixture_list(model, context.mixture[row]),
        feature_moves=tuple(moves),
        activity=_activity_evidence(context, row),
        top_counterparts=tuple(top_counterparts),
        sample_event_ids=tuple(sample_ids),
        history_url=f"{context.base_url}/v1/accounts/{quoted}/roles",
        page_url=f"{context.base_url}/accounts/{quoted}",
        notice=REVIEW_NOTICE,
        window=context.window,
        basis_version=model.basis.version,
        baseline=baseline_ref,
    )


# Events the sample search looks at once (its working arrays stay this long, whatever the
# window's size; common practice, no source).
SAMPLE_CHUNK_EVENTS = 1 << 22


def _sample_event_ids(
    snapshot: Snapshot, current: ClosingEvents, rows: np.ndarray, per_account: int = 5
) -> dict[int, list[str]]:
    """The first few event ids (in time order) that involve each of ``rows``, found over
    chunks of events in time order (an account's quota filled, later events skip it); of
    events the workers hold, looked up where they are."""
    if len(rows) == 0:
        return {}
    if isinstance(current, EventsElsewhere):
        return current.sample_event_ids(rows, per_account)
    wanted = np.zeros(snapshot.n_nodes, dtype=bool)
    wanted[rows] = True
    taken = np.zeros(snapshot.n_nodes, dtype=np.int64)
    actor_rows, target_rows = current.rows_in(snapshot)
    samples: dict[int, list[str]] = {}
    for start in range(0, len(actor_rows), SAMPLE_CHUNK_EVENTS):
        actor = actor_rows[start : start + SAMPLE_CHUNK_EVENTS]
        target = target_rows[start : start + SAMPLE_CHUNK_EVENTS]
        involved = np.flatnonzero(wanted[actor] | wanted[target])
        nodes = np.concatenate([actor[involved], target[involved]])
        positions = np.concatenate([involved, involved]) + start
        keep = wanted[nodes]
        nodes, positions = nodes[keep], positions[keep]
        order = np.lexsort((positions, nodes))
        nodes, positions = nodes[order], positions[order]
        # each node's events of the chunk in time order, after those taken before it
        starts = np.flatnonzero(np.r_[True, nodes[1:] != nodes[:-1]]) if nodes.size else nodes
        rank = np.arange(nodes.size) - np.repeat(starts, np.diff(np.r_[starts, nodes.size]))
        first = rank + taken[nodes] < per_account
        nodes, positions = nodes[first], positions[first]
        np.add.at(taken, nodes, 1)
        wanted[nodes[taken[nodes] >= per_account]] = False
        for node, position in zip(nodes.tolist(), positions.tolist(), strict=True):
            samples.setdefault(node, []).append(str(current.event_id[position]))
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
    """The features that moved most (each with its label in words), base features first: an
    analyst reads "out_degree 2 → 37" at once, while a third-round recursive aggregate needs
    its label to be read. Recursive features fill the list only when fewer than ``top`` base
    features moved."""
    depth = np.array([name.count("(") for name in names])
    moves: list[dict[str, Any]] = []
    for level in range(int(depth.max(initial=0)) + 1):
        columns = np.flatnonzero(depth == level)
        if len(columns) == 0:
            continue
        picked = feature_moves(
            [names[int(c)] for c in columns], before[columns], after[columns], top=top
        )
        moves.extend(
            {**move, "label": feature_label(move["feature"])} for move in picked[: top - len(moves)]
        )
        if len(moves) >= top:
            break
    return moves


def _finite(value: float) -> float | None:
    number = float(value)
    return number if np.isfinite(number) else None
