"""One window's numbers: snapshot → features → memberships → tie counts → scores → alerts.

No database access here: the closer loads the inputs and stores the result, so this step can
also run in the detection benchmark with the very same code.

Inputs beside the window's events: the earlier measured windows (``past``, what each left
in its memberships) and the known-pair history (:class:`rolewatch.engine.pairs.
KnownPairs`). What the window leaves for later ones is in the result: memberships with tie
counts and community labels, and the keys of its first-seen pairs.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import Protocol, runtime_checkable

import numpy as np
import scipy.sparse as sp

from rolewatch.config import Settings
from rolewatch.engine.activity import Activity
from rolewatch.engine.basis import Memberships
from rolewatch.engine.bridging import bridging_zscore, undirected_ties
from rolewatch.engine.calibration import SLICE_ROWS
from rolewatch.engine.features.recipe import FeatureTable
from rolewatch.engine.pairs import PairHistory
from rolewatch.engine.scoring import ShiftPolicy, TieEvidence, WindowScores, score_window
from rolewatch.engine.snapshot import Snapshot
from rolewatch.engine.ties import TieCounts, tie_counts
from rolewatch.pipeline.communities import CommunityJob, start_communities
from rolewatch.pipeline.evidence import REVIEW_NOTICE, AlertContext, alerts_with_evidence
from rolewatch.pipeline.history import AccountHistory, account_history, novelty_history
from rolewatch.pipeline.loading import ClosingEvents, PastWindow
from rolewatch.pipeline.model import FrozenModel
from rolewatch.pipeline.recent import RecentFeatures
from rolewatch.pipeline.stages import StageClock
from rolewatch.store.alerts import NewAlert, WindowRef
from rolewatch.store.memberships import MIXTURE_DECIMALS, MembershipColumns

__all__ = [
    "REVIEW_NOTICE",
    "Measured",
    "PastWindow",
    "ScoreInputs",
    "ScoringMeasure",
    "TieMeasure",
    "WindowRef",
    "WindowResult",
    "as_stored",
    "compute_window",
    "lookback_windows",
    "membership_columns",
    "past_from_result",
    "policy_from_settings",
    "start_window_communities",
]

# Reads the events of an earlier window (its start and end), or None when they are gone.
EventsOf = Callable[[WindowRef], ClosingEvents | None]
# A window's feature table and memberships against the frozen model, from its snapshot and
# events: in this process by default; rolewatch.scale.dispatch picks a Dask cluster instead.
Measure = Callable[[FrozenModel, Snapshot, ClosingEvents], tuple[FeatureTable, Memberships]]
# A window's feature table, memberships and tie cells.
Measured = tuple[FeatureTable, Memberships, TieCounts]


@runtime_checkable
class TieMeasure(Protocol):
    """A :data:`Measure` that also counts the window's tie cells where it computes the
    features (a cluster: one partitioned graph serves both, and the known-pair history is
    looked up there)."""

    def __call__(
        self, model: FrozenModel, snapshot: Snapshot, events: ClosingEvents
    ) -> tuple[FeatureTable, Memberships]: ...

    def with_ties(
        self, model: FrozenModel, snapshot: Snapshot, events: ClosingEvents, known: PairHistory
    ) -> Measured: ...


@runtime_checkable
class ScoringMeasure(Protocol):
    """A :data:`Measure` that also scores the window where it measured it (a cluster: the
    window's sums, medians and top-k computed over parts of its accounts, the details of
    the alerted accounts only: ``WindowScores.detail_rows``)."""

    def score(self, inputs: ScoreInputs, policy: ShiftPolicy) -> WindowScores: ...


def measure_locally(
    model: FrozenModel, snapshot: Snapshot, events: ClosingEvents
) -> tuple[FeatureTable, Memberships]:
    """The frozen recipe's features of ``snapshot`` and their memberships, in this process."""
    table = model.recipe.transform(snapshot)
    return table, model.basis.memberships(table)


@dataclass(frozen=True, eq=False)
class ScoreInputs:
    """Exactly what :func:`score_window` took for one window, so the detection benchmark
    can score the window again under other policies without recomputing it."""

    mixture: np.ndarray
    baseline: np.ndarray
    events: np.ndarray
    baseline_events: np.ndarray
    error: np.ndarray
    F: np.ndarray
    ties: TieEvidence
    bridging: np.ndarray | None
    structured: np.ndarray
    recent_new: np.ndarray  # AccountHistory.recent_new: any novelty_windows can be re-scored
    novelty_windows: int  # the one ties.history_new was summed over

    def score(self, policy: ShiftPolicy) -> WindowScores:
        ties = self.ties
        if policy.novelty_windows != self.novelty_windows:
            summed, windows = novelty_history(self.recent_new, policy.novelty_windows)
            ties = replace(ties, history_new=summed, history_windows=windows)
        return score_window(
            self.mixture,
            self.baseline,
            self.events,
            self.baseline_events,
            self.error,
            self.F,
            policy,
            current_bridging=self.bridging,
            ties=ties,
            structured=self.structured,
        )


@dataclass
class WindowResult:
    """Every active account's measures in one window, and the alerts it raised.

    ``dominant`` is -1 and ``mixture`` NaN where the account had too little activity to fit
    a role (status ``too_little``).
    """

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
    ties: np.ndarray | None = None  # n x 4 (engine.ties.TIE_CELLS)
    community: np.ndarray | None = None  # n, -1 where none
    new_pairs: np.ndarray | None = None  # keys of the pairs first seen in this window
    inputs: ScoreInputs | None = None


def as_stored(mixture: np.ndarray) -> np.ndarray:
    """Mixtures exactly as they read back from the store (6 decimals, renormalised), so a
    baseline built in memory equals one loaded from stored memberships."""
    rounded = np.round(np.asarray(mixture, dtype=np.float64), MIXTURE_DECIMALS)
    totals = rounded.sum(axis=1, keepdims=True)
    return np.divide(rounded, totals, out=rounded, where=totals > 0)


def past_from_result(result: WindowResult, ref: WindowRef | None = None) -> PastWindow:
    """The history entry a measured window leaves for the windows after it (what the store
    gives back of its memberships)."""
    mixture = as_stored(np.nan_to_num(result.mixture))
    mixture[result.status == "too_little"] = np.nan
    return PastWindow(
        accounts=result.nodes,
        mixture=mixture,
        events=result.activity.events.astype(np.float64),
        events_out=result.activity.events_out.astype(np.float64),
        counterparts=result.activity.counterparts.astype(np.float64),
        new_counterparts=result.activity.new_counterparts.astype(np.float64),
        ties=None if result.ties is None else result.ties.astype(np.float64),
        community=result.community,
        ref=ref,
    )


def membership_columns(model: FrozenModel, result: WindowResult) -> MembershipColumns:
    """The window's per-account measures as the store and the Parquet outputs keep them."""
    return MembershipColumns(
        accounts=result.nodes,
        role_ids=tuple(int(role_id) for role_id in model.basis.role_ids),
        mixture=result.mixture,
        dominant=result.dominant,
        score=result.score,
        status=result.status,
        events_out=result.activity.events_out,
        events_in=result.activity.events_in,
        counterparts=result.activity.counterparts,
        new_counterparts=result.activity.new_counterparts,
        error=result.error,
        ties=result.ties,
        community=result.community,
    )


def lookback_windows(settings: Settings) -> int:
    """How many past windows the baseline may look back over."""
    return max(
        settings.baseline_windows,
        int(np.ceil(4 * settings.baseline_half_life)),
        settings.novelty_windows,
        8,
    )


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
        novelty_windows=settings.novelty_windows,
        tie_smoothing=settings.tie_smoothing,
        bridge_resolution=settings.bridge_resolution,
    )


def compute_window(
    model: FrozenModel,
    settings: Settings,
    current: ClosingEvents,
    past: Sequence[PastWindow],
    known: PairHistory,
    *,
    window: WindowRef,
    raise_alerts: bool,
    events_of: EventsOf | None = None,
    clock: StageClock | None = None,
    measure: Measure = measure_locally,
    recent: RecentFeatures | None = None,
    communities: CommunityJob | None = None,
    keep_score_inputs: bool = True,
) -> WindowResult:
    """Measure every active account of one window against its own history.

    Parameters
    ----------
    past
        Earlier measured windows, oldest first (at most :func:`lookback_windows`), each
        taken once, newest first, in the history stage (the closer passes
        :class:`rolewatch.pipeline.loading.StoredPastWindows`, which reads each from the
        store when it is taken, so the look-back is never held whole).
    known
        Every account pair that interacted in an earlier window.
    window
        The window's id (None until it is stored), start and end, copied into the evidence.
    raise_alerts
        False for training windows: they are scored for the record but never alert.
    events_of
        Reads a baseline window's events for the features an alert shows as "before"
        (None: no feature moves are shown).
    clock
        Collects the seconds of each stage (features, ties, memberships, history, bridging,
        scoring, evidence).
    measure
        Computes the feature table and memberships (:func:`measure_locally` by default); a
        :class:`TieMeasure` counts the tie cells too (their seconds then count as features).
    recent
        Keeps this window's features for the next window's alerts, and gives an earlier
        window's when it holds them (instead of ``events_of`` and a recomputation).
    communities
        The window's communities, started earlier by the caller
        (:func:`start_window_communities`: the training close starts them before it fits
        the model, so they are ready when it measures); None starts them here.
    keep_score_inputs
        Keep the score inputs in the result (``WindowResult.inputs``) for a re-scoring under
        other policies (the detection benchmark). The closer never re-scores: without them
        they go once the window is scored, before the evidence, and take the look-back's
        baselines with them (hundreds of MB at millions of accounts).
    """
    clock = clock if clock is not None else StageClock()
    with clock.stage("features"):
        snapshot = current.snapshot()
    counts = None
    if snapshot.n_nodes == 0 or not isinstance(measure, TieMeasure):
        with clock.stage("ties"):
            counts = tie_counts(snapshot, known)
    if snapshot.n_nodes == 0:
        assert counts is not None
        return _empty_result(
            snapshot, _activity(snapshot, counts), len(model.basis.role_ids), past, counts
        )
    policy = policy_from_settings(settings)
    with clock.stage("bridging"):
        graph = undirected_ties(snapshot.counts)
    # Leiden holds the GIL: a large window's communities are computed in a child process
    # while this one computes the features, memberships and scores (same seed and input,
    # so the same communities). The bridging stage counts only the wait.
    if communities is None:
        communities = _start_communities(graph, snapshot, policy.bridge_resolution)
    # The baselines and the bridging z-score come first, so the tie graph is let go before
    # the features, scores and evidence (a large window's graph is hundreds of MB).
    with clock.stage("history"):
        history = _history(model, policy, snapshot, past)
    with clock.stage("bridging"):
        bridging = _bridging(graph, history, policy)
    del graph
    step = _Step(model, settings, policy, snapshot, clock, measure, recent, keep_score_inputs)
    return _measure(
        step,
        current,
        known,
        counts,
        communities,
        window,
        raise_alerts,
        events_of,
        history,
        bridging,
    )


def start_window_communities(settings: Settings, snapshot: Snapshot) -> CommunityJob:
    """Start computing a window's communities ahead of :func:`compute_window`."""
    graph = undirected_ties(snapshot.counts)
    return _start_communities(graph, snapshot, settings.bridge_resolution)


def _start_communities(graph: sp.csr_matrix, snapshot: Snapshot, resolution: float) -> CommunityJob:
    """The window's communities, started from its tie graph; should they be computed in
    this process after all, the graph is built again from the snapshot, so the job does not
    keep it."""
    return start_communities(graph, resolution, rebuild=lambda: undirected_ties(snapshot.counts))


@dataclass(frozen=True)
class _Step:
    """What the measuring steps of one window share."""

    model: FrozenModel
    settings: Settings
    policy: ShiftPolicy
    snapshot: Snapshot
    clock: StageClock
    measure: Measure
    recent: RecentFeatures | None
    keep_score_inputs: bool


def _features_by(step: _Step) -> Callable[[Snapshot, ClosingEvents], FeatureTable]:
    """The feature table of another window by the close's own ``measure``."""

    def features(snapshot: Snapshot, events: ClosingEvents) -> FeatureTable:
        return step.measure(step.model, snapshot, events)[0]

    return features


def _measure(
    step: _Step,
    current: ClosingEvents,
    known: PairHistory,
    counts: TieCounts | None,
    communities: CommunityJob,
    window: WindowRef,
    raise_alerts: bool,
    events_of: EventsOf | None,
    history: AccountHistory,
    bridging: np.ndarray | None,
) -> WindowResult:
    """Features to alerts, once the snapshot, baselines and bridging are there (and the
    tie cells, unless ``counts`` is None: the measure counts them with the features)."""
    model, policy, snapshot, clock = step.model, step.policy, step.snapshot, step.clock
    table, members, counts = _features(step, current, known, counts)
    with clock.stage("ties"):
        activity = _activity(snapshot, counts)
    with clock.stage("scoring"):
        inputs = _score_inputs(model, members, activity, counts, history, policy, bridging)
        if isinstance(step.measure, ScoringMeasure):  # where the features were measured
            scores = step.measure.score(inputs, policy)
        else:
            scores = inputs.score(policy)
        kept_inputs = inputs if step.keep_score_inputs else None
        del inputs
    alerts: list[NewAlert] = []
    if raise_alerts and np.any(scores.alert):
        settings = step.settings
        context = AlertContext(
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
            scores=scores,
            activity=activity,
            ties=counts.cells,
            history=history,
            known=known,
            events_of=events_of,
            recent=step.recent,
            features_of=None if step.measure is measure_locally else _features_by(step),
        )
        with clock.stage("evidence"):
            alerts = alerts_with_evidence(context, current)
    if step.recent is not None:  # after the evidence, which may use the window before
        step.recent.remember(window, snapshot, table)
    with clock.stage("bridging"):
        community = communities.result()
    return _measured_result(
        model,
        snapshot,
        members,
        scores,
        activity,
        alerts,
        history,
        counts,
        community,
        kept_inputs,
    )


def _features(
    step: _Step, current: ClosingEvents, known: PairHistory, counts: TieCounts | None
) -> Measured:
    """The window's feature table and memberships, and its tie cells (``counts``, or
    counted by the measure with the features when None)."""
    model, snapshot, clock = step.model, step.snapshot, step.clock
    if counts is None:  # on a cluster all come back together; their seconds count as features
        assert isinstance(step.measure, TieMeasure)
        with clock.stage("features"):
            return step.measure.with_ties(model, snapshot, current, known)
    if step.measure is measure_locally:
        with clock.stage("features"):
            table = model.recipe.transform(snapshot)
        with clock.stage("memberships"):
            members = model.basis.memberships(table)
    else:
        with clock.stage("features"):
            table, members = step.measure(model, snapshot, current)
    return table, members, counts


def _activity(snapshot: Snapshot, counts: TieCounts) -> Activity:
    """Events out/in and counterparts (new ones over the known history) per node."""
    events_out = np.asarray(snapshot.counts.sum(axis=1)).ravel().round().astype(np.int64)
    events_in = np.asarray(snapshot.counts.sum(axis=0)).ravel().round().astype(np.int64)
    return Activity(events_out, events_in, counts.counterparts, counts.new_counterparts)


def _structured(members: Memberships) -> np.ndarray:
    """Accounts whose membership fit holds something: a finite, non-empty loading (an
    account whose binned features are all zero gets an all-zero fit). Row by row in slices
    of :data:`~rolewatch.engine.calibration.SLICE_ROWS` accounts, so the NaN-free copy of
    the loadings is never as long as the window."""
    loadings = members.loadings
    out = np.empty(loadings.shape[0], dtype=bool)
    for start in range(0, loadings.shape[0], SLICE_ROWS):
        block = np.asarray(loadings[start : start + SLICE_ROWS], dtype=np.float64)
        out[start : start + SLICE_ROWS] = np.isfinite(block).all(axis=1) & (
            np.nan_to_num(block).sum(axis=1) > 0
        )
    return out


def _history(
    model: FrozenModel, policy: ShiftPolicy, snapshot: Snapshot, past: Sequence[PastWindow]
) -> AccountHistory:
    """Every account's baseline, novelty history and reference community."""
    return account_history(
        snapshot.nodes,
        past,
        n_roles=len(model.basis.role_ids),
        mode=policy.baseline,
        last_k=policy.last_k,
        half_life=policy.half_life,
        novelty_windows=policy.novelty_windows,
    )


def _bridging(
    graph: sp.csr_matrix, history: AccountHistory, policy: ShiftPolicy
) -> np.ndarray | None:
    """Each account's bridging z-score against the reference window's communities (None
    when bridging is off or no account has a reference community)."""
    if policy.bridge_resolution > 0 and (history.reference_community >= 0).any():
        return bridging_zscore(graph, history.reference_community)
    return None


def _score_inputs(
    model: FrozenModel,
    members: Memberships,
    activity: Activity,
    counts: TieCounts,
    history: AccountHistory,
    policy: ShiftPolicy,
    bridging: np.ndarray | None,
) -> ScoreInputs:
    """Assemble what :func:`score_window` takes for this window."""
    structured = _structured(members)
    events = np.column_stack([activity.events_out, activity.events_in]).astype(np.float64)
    baseline_events = np.column_stack([history.events_out, history.events_in])
    return ScoreInputs(
        mixture=members.mixture,
        baseline=history.mixture,
        events=events.sum(axis=1),
        baseline_events=baseline_events.sum(axis=1),
        error=members.error,
        F=model.basis.F,
        ties=TieEvidence(
            cells=counts.cells.astype(np.float64),
            baseline_cells=history.cells,
            events=events,
            baseline_events=baseline_events,
            history_new=history.history_new,
            history_windows=history.history_windows,
        ),
        bridging=bridging,
        structured=structured,
        recent_new=history.recent_new,
        novelty_windows=policy.novelty_windows,
    )


def _empty_result(
    snapshot: Snapshot,
    activity: Activity,
    n_roles: int,
    past: Sequence[PastWindow],
    counts: TieCounts,
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
        ties=counts.cells,
        community=np.zeros(0, dtype=np.int64),
        new_pairs=counts.new_pairs,
    )


def _measured_result(
    model: FrozenModel,
    snapshot: Snapshot,
    members: Memberships,
    scores: WindowScores,
    activity: Activity,
    alerts: list[NewAlert],
    history: AccountHistory,
    counts: TieCounts,
    community: np.ndarray,
    inputs: ScoreInputs | None,
) -> WindowResult:
    status = scores.status
    role_ids = np.asarray(model.basis.role_ids)
    fitted = status != "too_little"
    mixture = np.where(fitted[:, None], members.mixture, np.nan)
    dominant = np.where(fitted, role_ids[np.argmax(members.mixture, axis=1)], -1)
    return WindowResult(
        nodes=snapshot.nodes,
        mixture=mixture,
        dominant=dominant,
        score=np.asarray(scores.score, dtype=np.float64),
        status=status,
        error=members.error,
        activity=activity,
        alerts=alerts,
        reconstruction_error=float(np.mean(members.error)),
        new_count=int(np.sum(status == "new")),
        inactive_count=history.gone,
        scored_count=int(np.sum(status == "scored")),
        ties=counts.cells,
        community=community,
        new_pairs=counts.new_pairs,
        inputs=inputs,
    )
