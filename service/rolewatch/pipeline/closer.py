"""Close due windows: load events, run the engine, store the results in one transaction.

Each close reads what it needs in read-only transactions, computes off any lock, then writes
the window record, memberships, alerts and delivery outbox rows in a single write
transaction. The write re-checks that the window is still open and that no event arrived in
its range meanwhile (otherwise it computes again), so a crash or a race never leaves a
partial or doubled window: the next tick simply redoes the work. On PostgreSQL a session
advisory lock makes one process the closer at a time, and the write transaction takes the
window lock exclusively (ingest takes it shared), so a batch either lands before the re-check
or sees the window closed and is stored as late.

This module holds the locking, the retries and the order of the steps; the numbers come from
:mod:`rolewatch.pipeline.compute` and every statement from :mod:`rolewatch.store`.
"""

from __future__ import annotations

import logging
import threading
import time
import weakref
from contextlib import AbstractContextManager
from dataclasses import asdict, dataclass, replace
from typing import Any

from rolewatch.clock import now_micros, to_rfc3339
from rolewatch.config import Settings
from rolewatch.engine.pairs import KnownPairs
from rolewatch.pipeline.communities import CommunityJob
from rolewatch.pipeline.compute import (
    Measure,
    PastWindow,
    WindowRef,
    WindowResult,
    compute_window,
    lookback_windows,
    membership_columns,
    past_from_result,
    start_window_communities,
)
from rolewatch.pipeline.loading import WindowEvents, read_with_ids_on_disk, stored_past_windows
from rolewatch.pipeline.model import FrozenModel, load_active_model, store_model
from rolewatch.pipeline.recent import RecentFeatures
from rolewatch.pipeline.stages import StageClock
from rolewatch.pipeline.windows import WindowGeometry, is_due, next_window_end
from rolewatch.review.intake import file_window_alerts, screen_alerts
from rolewatch.scale import source as event_source
from rolewatch.scale.dispatch import (
    fit_for,
    keeps_memberships,
    known_pairs_for,
    measure_for,
    record_outputs,
)
from rolewatch.store import windows as stored_windows
from rolewatch.store.alerts import Alert, insert_alerts
from rolewatch.store.db import (
    Connection,
    Engine,
    held_session_lock,
    lock_windows,
    write_transaction,
)
from rolewatch.store.memberships import insert_memberships
from rolewatch.store.pairs import insert_window_pairs
from rolewatch.store.windows import WindowMeasures, WindowSpan

log = logging.getLogger("rolewatch.pipeline")

CLOSER_LOCK_ID = 0x7277_636C  # "rwcl": the closer's advisory lock id within this store
MAX_RECOMPUTES = 5
# Set when the service shuts down: the closer finishes the window it is writing and stops
# before the next one (api/jobs.py sets it; start_scheduler clears it).
SHUTDOWN = threading.Event()


class WindowChanged(Exception):
    """Events arrived in the window's range while it was being computed: compute again."""


class WindowAlreadyClosed(Exception):
    """Another process closed this window first; nothing to do."""


@dataclass(frozen=True, kw_only=True)
class WindowSummary:
    """What one close wrote for one window (also the ``window`` field of its log line).

    ``new``, ``inactive``, ``scored`` and ``reconstruction_error`` are None for a training
    window recorded before the model exists; ``backfilled`` marks a training window measured
    when training ended (it was reported once already, when it was recorded).
    """

    id: int
    start: str
    end: str
    events: int
    accounts: int
    alert_count: int
    new: int | None = None
    inactive: int | None = None
    scored: int | None = None
    reconstruction_error: float | None = None
    training: bool
    backfilled: bool = False
    stage_seconds: dict[str, float] | None = None  # pipeline.stages.STAGES

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def closer_lock(engine: Engine) -> AbstractContextManager[bool]:
    """Yield True when this process may close windows now: on PostgreSQL one process at a
    time holds the closer's advisory lock; on SQLite always True (the write transaction's
    re-check is what prevents a double close there)."""
    return held_session_lock(engine, CLOSER_LOCK_ID)


def close_due_windows(
    engine: Engine, settings: Settings, *, now_us: int | None = None, drain: bool = False
) -> list[WindowSummary]:
    """Close every window that is due, oldest first; return one summary per window closed.

    ``drain=True`` treats the stream as finished (used by ``rolewatch replay``): the trailing
    window closes as soon as the wall clock is past its end plus lateness.
    """
    geometry = WindowGeometry.from_settings(settings)
    closed: dict[int, WindowSummary] = {}
    with closer_lock(engine) as mine:
        if not mine:
            return []
        while not SHUTDOWN.is_set():
            now = now_us if now_us is not None else now_micros()
            with engine.connect() as connection:
                state = event_source.stream_state(connection, settings)
            end_us = next_window_end(geometry, state)
            if end_us is None or not is_due(geometry, state, end_us, now, drain=drain):
                break
            end_us = _first_window_with_events(engine, settings, geometry, end_us)
            if end_us is None or not is_due(geometry, state, end_us, now, drain=drain):
                break
            for summary in close_window(engine, settings, end_us, now_us=now):
                # A training window is reported when it is recorded and again when the end
                # of training back-fills it: one summary per window, the latest.
                closed[summary.id] = summary
    return list(closed.values())


def _first_window_with_events(
    engine: Engine, settings: Settings, geometry: WindowGeometry, end_us: int
) -> int | None:
    """``end_us``, or the end of the first later window holding an event when the window
    ending at ``end_us`` holds none: a run of empty windows (one stray old event, a pause in
    the stream) is skipped, never recorded, so training never fits on empty windows. None
    when no event lies at or after the window's start."""
    with engine.connect() as connection:
        first = event_source.first_event_time_from(connection, settings, geometry.start_of(end_us))
    if first is None:
        return None
    found = max(end_us, geometry.end_after(first))
    if found != end_us:
        skipped = (found - end_us) // geometry.period_us
        log.info(
            "skipped empty windows",
            extra={"fields": {"skipped": skipped, "next_window_end": to_rfc3339(found)}},
        )
    return found


def close_window(
    engine: Engine, settings: Settings, end_us: int, *, now_us: int
) -> list[WindowSummary]:
    """Close the window ending at ``end_us`` (and back-fill training windows when it ends
    training). Returns the summaries of the windows written."""
    from threadpoolctl import threadpool_limits

    started = time.perf_counter()
    log.info("closing window", extra={"fields": {"window_end": to_rfc3339(end_us)}})
    for _attempt in range(MAX_RECOMPUTES):
        try:
            # The engine's dense products are small: one BLAS thread is much faster than two
            # threads competing with the API for this machine's cores.
            with threadpool_limits(limits=1, user_api="blas"):
                summaries = _close_once(engine, settings, end_us, now_us)
        except WindowAlreadyClosed:
            return []
        except WindowChanged:
            log.info(
                "events arrived during the close; computing again",
                extra={"fields": {"window_end": to_rfc3339(end_us)}},
            )
            continue
        _record_metrics(summaries, time.perf_counter() - started)
        for summary in summaries:
            log.info("window closed", extra={"fields": {"window": summary.to_dict()}})
        return summaries
    raise RuntimeError(
        f"window ending {to_rfc3339(end_us)} kept receiving events during {MAX_RECOMPUTES} "
        "closes; it will be tried again on the next tick"
    )


def _record_metrics(summaries: list[WindowSummary], seconds: float) -> None:
    try:
        from rolewatch import metrics
    except ImportError:  # metrics are optional for the pure pipeline
        return
    recorder = getattr(metrics, "record_window_closed", None)
    if recorder is None:
        return
    for summary in summaries:
        if not summary.backfilled:  # a back-filled window was counted when it closed
            recorder(seconds=seconds, alerts=summary.alert_count, stages=summary.stage_seconds)


def _close_once(
    engine: Engine, settings: Settings, end_us: int, now_us: int
) -> list[WindowSummary]:
    geometry = WindowGeometry.from_settings(settings)
    start_us = geometry.start_of(end_us)
    clock = StageClock()
    with clock.stage("load"), engine.connect() as connection:
        # a large window's events are read by a helper process while this one reads the rest
        finish_events = event_source.start_window_events(connection, settings, start_us, end_us)
        model = load_active_model(connection)
        if model is None:
            training = stored_windows.unmeasured_training_windows(connection)
            loaded = read_with_ids_on_disk(finish_events, settings.close_scratch_dir)
        else:
            # listed now, each read in the history stage (one at a time, not all held)
            past = stored_past_windows(
                connection,
                engine,
                model,
                before_end_us=end_us,
                limit=lookback_windows(settings),
                outputs=settings.output_archive,
            )
            measure = measure_for(settings)
            known = known_pairs_for(connection, settings, measure, before_end_us=end_us)
            current = event_source.closing_events(
                connection, settings, measure, finish_events, start_us, end_us
            )
    if model is None:
        return _close_training(engine, settings, geometry, end_us, now_us, loaded, training, clock)
    window = WindowRef(id=None, start=to_rfc3339(start_us), end=to_rfc3339(end_us))
    started = time.perf_counter()
    result = compute_window(
        model,
        settings,
        current,
        past,
        known,
        window=window,
        raise_alerts=True,
        events_of=event_source.stored_events_reader(engine, settings, measure),
        clock=clock,
        measure=measure,
        recent=_recent_features(engine),
        keep_score_inputs=False,
    )
    seconds = time.perf_counter() - started
    with clock.stage("store"), write_transaction(engine) as connection:
        _claim_window(connection, start_us, end_us, event_source.stored_part(current))
        # Review: suppressed accounts raise no alert (their memberships are still stored).
        screened = screen_alerts(connection, result.alerts, now_us=now_us)
        result = replace(result, alerts=screened.kept)
        window_id = stored_windows.insert_window(
            connection,
            start_us=start_us,
            end_us=end_us,
            closed_us=now_us,
            event_count=len(current),
            training=False,
            measures=_measures(model, result, seconds),
        )
        api_alerts = _store_result(
            connection, settings, model, window_id, (start_us, end_us), now_us, result
        )
        # Review: file the alerts into cases and count what the suppressions held back.
        filed = file_window_alerts(
            connection,
            settings,
            window_id=window_id,
            window_end_us=end_us,
            basis_version=model.basis.version,
            alerts=api_alerts,
            screened=screened,
            now_us=now_us,
        )
        if api_alerts:
            from rolewatch.delivery.outbox import enqueue_alerts

            enqueue_alerts(
                connection,
                settings,
                [alert.to_dict() for alert in api_alerts],
                case_urls=filed.case_urls,
            )
        # The write's time so far: everything but this update and the commit.
        stages = clock.seconds()
        stored_windows.set_stage_seconds(connection, window_id, stages)
    summary = _summary(window_id, start_us, end_us, len(current), result, training=False)
    return [replace(summary, stage_seconds=stages)]


# The last measured window's features, per store (an engine's entry goes with the engine).
_RECENT: weakref.WeakKeyDictionary[Engine, RecentFeatures] = weakref.WeakKeyDictionary()


def _recent_features(engine: Engine) -> RecentFeatures:
    """The features this process kept of the store's last measured window."""
    recent = _RECENT.get(engine)
    if recent is None:
        recent = _RECENT.setdefault(engine, RecentFeatures())
    return recent


def _claim_window(connection: Connection, start_us: int, end_us: int, loaded: int) -> None:
    """Inside the window's write transaction: order it against ingest, then make sure the
    window is still open and holds exactly the events that were computed on."""
    lock_windows(connection, exclusive=True)
    if stored_windows.is_closed(connection, end_us):
        raise WindowAlreadyClosed(end_us)
    if stored_windows.count_events_between(connection, start_us, end_us) != loaded:
        raise WindowChanged()


# --- training --------------------------------------------------------------------------------


@dataclass(frozen=True)
class _TrainingWindow:
    """A training window's events; ``window_id`` is None for the one closing now."""

    window_id: int | None
    start_us: int
    end_us: int
    events: WindowEvents


@dataclass(frozen=True)
class _Measured:
    window: _TrainingWindow
    result: WindowResult
    seconds: float
    clock: StageClock


def _close_training(
    engine: Engine,
    settings: Settings,
    geometry: WindowGeometry,
    end_us: int,
    now_us: int,
    current: WindowEvents,
    training: list[WindowSpan],
    clock: StageClock,
) -> list[WindowSummary]:
    """Close a window before any model exists: record it, or, when it completes the
    training period, fit the model on all training windows and measure (back-fill) every
    one of them, so account histories start at the beginning."""
    start_us = geometry.start_of(end_us)
    if len(training) + 1 < settings.training_windows:
        return [_record_training_window(engine, start_us, end_us, now_us, current, clock)]
    with clock.stage("load"):
        loaded = _load_training(engine, settings, training)
    loaded.append(_TrainingWindow(None, start_us, end_us, current))
    snapshots = [window.events.snapshot() for window in loaded]
    # The communities need only the events: they are computed while the model is fitted.
    communities = [start_window_communities(settings, snapshot) for snapshot in snapshots]
    measure = measure_for(settings)
    model = fit_for(settings, measure, snapshots, [window.events for window in loaded])
    measured = _measure_training(
        model, settings, loaded, communities, clock, _recent_features(engine), measure
    )
    with write_transaction(engine) as connection:
        _claim_window(connection, start_us, end_us, event_source.stored_part(current))
        store_model(
            connection,
            model,
            trained_from_us=loaded[0].start_us,
            trained_to_us=end_us,
            now_us=now_us,
        )
        return [
            _store_training_window(connection, settings, model, item, now_us) for item in measured
        ]


def _record_training_window(
    engine: Engine,
    start_us: int,
    end_us: int,
    now_us: int,
    current: WindowEvents,
    clock: StageClock,
) -> WindowSummary:
    """Record a training window closed; it is measured once training ends."""
    with clock.stage("store"), write_transaction(engine) as connection:
        _claim_window(connection, start_us, end_us, event_source.stored_part(current))
        window_id = stored_windows.insert_window(
            connection,
            start_us=start_us,
            end_us=end_us,
            closed_us=now_us,
            event_count=len(current),
            training=True,
            measures=None,
        )
        stages = clock.seconds()
        stored_windows.set_stage_seconds(connection, window_id, stages)
    return WindowSummary(
        id=window_id,
        start=to_rfc3339(start_us),
        end=to_rfc3339(end_us),
        events=len(current),
        accounts=current.account_count(),
        alert_count=0,
        training=True,
        stage_seconds=stages,
    )


def _load_training(
    engine: Engine, settings: Settings, training: list[WindowSpan]
) -> list[_TrainingWindow]:
    """The events of the recorded training windows."""
    with engine.connect() as connection:
        return [
            _TrainingWindow(
                span.id,
                span.start_us,
                span.end_us,
                event_source.read_window_events(connection, settings, span.start_us, span.end_us),
            )
            for span in training
        ]


def _measure_training(
    model: FrozenModel,
    settings: Settings,
    loaded: list[_TrainingWindow],
    communities: list[CommunityJob],
    clock: StageClock,
    recent: RecentFeatures,
    measure: Measure,
) -> list[_Measured]:
    """Measure the training windows in order, each against the history of those before it
    (the known pairs start empty at the first training window). ``clock`` holds the load
    of the window closing now (the last one); the others start their own."""
    measured = []
    past: list[PastWindow] = []
    known = KnownPairs.empty()
    for window, window_communities in zip(loaded, communities, strict=True):
        ref = WindowRef(
            id=window.window_id, start=to_rfc3339(window.start_us), end=to_rfc3339(window.end_us)
        )
        own = clock if window.window_id is None else StageClock()
        started = time.perf_counter()
        result = compute_window(
            model,
            settings,
            window.events,
            past,
            known,
            window=ref,
            raise_alerts=False,
            clock=own,
            recent=recent,
            communities=window_communities,
            keep_score_inputs=False,
            measure=measure,
        )
        measured.append(_Measured(window, result, time.perf_counter() - started, own))
        past = (past + [past_from_result(result, ref)])[-lookback_windows(settings) :]
        known = known.with_keys(result.new_pairs if result.new_pairs is not None else [])
    return measured


def _store_training_window(
    connection: Connection, settings: Settings, model: FrozenModel, item: _Measured, now_us: int
) -> WindowSummary:
    window, result = item.window, item.result
    measures = _measures(model, result, item.seconds)
    window_id = window.window_id
    with item.clock.stage("store"):
        if window_id is None:
            window_id = stored_windows.insert_window(
                connection,
                start_us=window.start_us,
                end_us=window.end_us,
                closed_us=now_us,
                event_count=len(window.events),
                training=True,
                measures=measures,
            )
        else:
            stored_windows.set_measures(connection, window_id, measures)
        span = (window.start_us, window.end_us)
        _store_result(connection, settings, model, window_id, span, now_us, result)
        stages = item.clock.seconds()
        stored_windows.set_stage_seconds(connection, window_id, stages)
    summary = _summary(
        window_id,
        window.start_us,
        window.end_us,
        len(window.events),
        result,
        training=True,
        backfilled=window.window_id is not None,
    )
    return replace(summary, stage_seconds=stages)


# --- what a close writes ---------------------------------------------------------------------


def _measures(model: FrozenModel, result: WindowResult, seconds: float) -> WindowMeasures:
    return WindowMeasures(
        recipe_version=model.recipe.version,
        basis_version=model.basis.version,
        reconstruction_error=result.reconstruction_error,
        account_count=len(result.nodes),
        alert_count=len(result.alerts),
        new_count=result.new_count,
        inactive_count=result.inactive_count,
        scored_count=result.scored_count,
        close_seconds=round(seconds, 3),
    )


def _store_result(
    connection: Connection,
    settings: Settings,
    model: FrozenModel,
    window_id: int,
    span: tuple[int, int],
    now_us: int,
    result: WindowResult,
) -> list[Alert]:
    """Write the memberships (to the Parquet outputs when set, and to the store unless the
    window is larger than ``store_memberships_max_accounts``), the window's new pairs and its
    alerts; return the alerts in their API form.

    The Parquet file is written inside the window's write transaction: if the transaction
    does not commit, the window stays open and the retried close rewrites the file, so a
    closed window always has its memberships somewhere."""
    start_us, end_us = span
    record_outputs(settings, end_us, model, result)
    if keeps_memberships(settings, len(result.nodes)):
        _insert_memberships(connection, model, window_id, result)
    if result.new_pairs is not None:
        insert_window_pairs(connection, window_id, result.new_pairs)
    return insert_alerts(
        connection,
        result.alerts,
        window_id=window_id,
        window_start_us=start_us,
        window_end_us=end_us,
        created_us=now_us,
        basis_version=model.basis.version,
        names={(model.basis.version, info.role_id): info.name for info in model.roles},
    )


def _insert_memberships(
    connection: Connection, model: FrozenModel, window_id: int, result: WindowResult
) -> None:
    insert_memberships(
        connection, window_id, model.basis.version, membership_columns(model, result)
    )


def _summary(
    window_id: int,
    start_us: int,
    end_us: int,
    event_count: int,
    result: WindowResult,
    *,
    training: bool,
    backfilled: bool = False,
) -> WindowSummary:
    return WindowSummary(
        id=window_id,
        start=to_rfc3339(start_us),
        end=to_rfc3339(end_us),
        events=event_count,
        accounts=len(result.nodes),
        alert_count=len(result.alerts),
        new=result.new_count,
        inactive=result.inactive_count,
        scored=result.scored_count,
        reconstruction_error=result.reconstruction_error,
        training=training,
        backfilled=backfilled,
    )
