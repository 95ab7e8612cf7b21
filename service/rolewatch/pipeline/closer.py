"""Close due windows: load events, run the engine, store the results in one transaction.

Each close reads what it needs in read-only transactions, computes off any lock, then writes
the window record, memberships, alerts and delivery outbox rows in a single write
transaction. The write re-checks that the window is still open and that no event arrived in
its range meanwhile (otherwise it computes again), so a crash or a race never leaves a
partial or doubled window: the next tick simply redoes the work. On PostgreSQL a session
advisory lock makes one process the closer at a time, and the write transaction takes the
window lock exclusively (ingest takes it shared), so a batch either lands before the re-check
or sees the window closed and is stored as late.
"""

from __future__ import annotations

import json
import logging
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager

import numpy as np
import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine

from rolewatch.clock import now_micros, to_rfc3339
from rolewatch.pipeline.compute import PastWindow, WindowResult, compute_window, past_from_result
from rolewatch.pipeline.loading import WindowEvents, load_window_events
from rolewatch.pipeline.model import FrozenModel, fit_model, load_active_model, store_model
from rolewatch.pipeline.windows import StreamState, WindowGeometry, is_due, next_window_end
from rolewatch.store.db import lock_windows, store_lock_key, write_transaction
from rolewatch.store.schema import alerts, events, memberships, service_state, windows

log = logging.getLogger("rolewatch.pipeline")

CLOSER_LOCK_ID = 0x7277_636C  # "rwcl": the closer's advisory lock id within this store
MAX_RECOMPUTES = 5
# Set when the service shuts down: the closer finishes the window it is writing and stops
# before the next one (api/jobs.py sets it; start_scheduler clears it).
SHUTDOWN = threading.Event()


class WindowChanged(Exception):
    """Events arrived in the window's range while it was being computed: compute again."""


def read_stream_state(connection: Connection) -> StreamState:
    bounds = connection.execute(
        sa.select(sa.func.min(events.c.time_us), sa.func.max(events.c.time_us))
    ).one()
    last_end = connection.execute(sa.select(sa.func.max(windows.c.end_us))).scalar()
    last_ingest = connection.execute(
        sa.select(service_state.c.value).where(service_state.c.key == "last_ingest_us")
    ).scalar()
    return StreamState(
        min_event_us=bounds[0],
        max_event_us=bounds[1],
        last_closed_end_us=last_end,
        last_ingest_us=int(last_ingest) if last_ingest is not None else None,
    )


@contextmanager
def closer_lock(engine: Engine) -> Iterator[bool]:
    """Yield True when this process may close windows now.

    PostgreSQL: a session-level advisory lock held on a dedicated connection, so among
    several server processes exactly one closes at a time. SQLite: always True; the write
    transaction's re-check is what prevents a double close there.
    """
    if engine.dialect.name != "postgresql":
        yield True
        return
    with engine.connect() as connection:
        got = connection.exec_driver_sql(
            f"SELECT pg_try_advisory_lock({store_lock_key(CLOSER_LOCK_ID)})"
        ).scalar()
        connection.commit()
        try:
            yield bool(got)
        finally:
            if got:
                connection.exec_driver_sql(
                    f"SELECT pg_advisory_unlock({store_lock_key(CLOSER_LOCK_ID)})"
                )
                connection.commit()


def close_due_windows(
    engine: Engine, settings, *, now_us: int | None = None, drain: bool = False
) -> list[dict]:
    """Close every window that is due, oldest first; return a summary of each one closed.

    ``drain=True`` treats the stream as finished (used by ``rolewatch replay``): the trailing
    window closes as soon as the wall clock is past its end plus lateness.
    """
    geometry = WindowGeometry.from_settings(settings)
    closed: dict[int, dict] = {}
    with closer_lock(engine) as mine:
        if not mine:
            return []
        while not SHUTDOWN.is_set():
            now = now_us if now_us is not None else now_micros()
            with engine.connect() as connection:
                state = read_stream_state(connection)
            end_us = next_window_end(geometry, state)
            if end_us is None or not is_due(geometry, state, end_us, now, drain=drain):
                break
            for summary in close_window(engine, settings, end_us, now_us=now):
                # A training window is reported when it is recorded and again when the end
                # of training back-fills it: one summary per window, the latest.
                closed[summary["id"]] = summary
    return list(closed.values())


def close_window(engine: Engine, settings, end_us: int, *, now_us: int) -> list[dict]:
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
            log.info("window closed", extra={"fields": {"window": summary}})
        return summaries
    raise RuntimeError(
        f"window ending {to_rfc3339(end_us)} kept receiving events during {MAX_RECOMPUTES} "
        "closes; it will be tried again on the next tick"
    )


def _record_metrics(summaries: list[dict], seconds: float) -> None:
    try:
        from rolewatch import metrics
    except ImportError:  # metrics are optional for the pure pipeline
        return
    recorder = getattr(metrics, "record_window_closed", None)
    if recorder is None:
        return
    for summary in summaries:
        if not summary["backfilled"]:  # a back-filled window was counted when it closed
            recorder(seconds=seconds, alerts=summary["alert_count"])


def _close_once(engine: Engine, settings, end_us: int, now_us: int) -> list[dict]:
    geometry = WindowGeometry.from_settings(settings)
    start_us = geometry.start_of(end_us)
    with engine.connect() as connection:
        model = load_active_model(connection)
        current = load_window_events(connection, start_us, end_us)
        previous = load_window_events(connection, start_us - geometry.span_us, start_us)
        training = _training_windows(connection) if model is None else []
    if model is None:
        return _close_training(engine, settings, geometry, end_us, now_us, current, training)
    with engine.connect() as connection:
        past = load_past_windows(
            connection, model, before_end_us=end_us, limit=lookback_windows(settings)
        )
    window = {"id": None, "start": to_rfc3339(start_us), "end": to_rfc3339(end_us)}
    started = time.perf_counter()
    result = compute_window(
        model, settings, current, previous, past, window=window, raise_alerts=True
    )
    seconds = time.perf_counter() - started
    with write_transaction(engine) as connection:
        _claim_window(connection, start_us, end_us, len(current))
        window_id = _insert_window(
            connection,
            start_us=start_us,
            end_us=end_us,
            now_us=now_us,
            event_count=len(current),
            training=False,
            model=model,
            result=result,
            seconds=seconds,
        )
        api_alerts = _store_result(
            connection, settings, model, window_id, start_us, end_us, now_us, result
        )
        if api_alerts:
            from rolewatch.delivery.outbox import enqueue_alerts

            enqueue_alerts(connection, settings, api_alerts)
    return [_summary(window_id, start_us, end_us, len(current), result, training=False)]


def lookback_windows(settings) -> int:
    """How many past windows the baseline may look back over."""
    return max(settings.baseline_windows, int(np.ceil(4 * settings.baseline_half_life)), 8)


def _training_windows(connection: Connection) -> list:
    return connection.execute(
        sa.select(windows.c.id, windows.c.start_us, windows.c.end_us, windows.c.event_count)
        .where(windows.c.training, windows.c.basis_version.is_(None))
        .order_by(windows.c.end_us)
    ).all()


def _claim_window(connection: Connection, start_us: int, end_us: int, loaded: int) -> None:
    """Inside the window's write transaction: order it against ingest, then make sure the
    window is still open and holds exactly the events that were computed on."""
    lock_windows(connection, exclusive=True)
    _check_still_open(connection, end_us)
    _check_unchanged(connection, start_us, end_us, loaded)


def _check_still_open(connection: Connection, end_us: int) -> None:
    exists = connection.execute(sa.select(windows.c.id).where(windows.c.end_us == end_us)).first()
    if exists is not None:
        raise WindowAlreadyClosed(end_us)


class WindowAlreadyClosed(Exception):
    """Another process closed this window first; nothing to do."""


def _check_unchanged(connection: Connection, start_us: int, end_us: int, loaded: int) -> None:
    count = connection.execute(
        sa.select(sa.func.count())
        .select_from(events)
        .where(events.c.time_us >= start_us, events.c.time_us < end_us)
    ).scalar_one()
    if count != loaded:
        raise WindowChanged()


def _close_training(
    engine: Engine,
    settings,
    geometry: WindowGeometry,
    end_us: int,
    now_us: int,
    current: WindowEvents,
    training: list,
) -> list[dict]:
    start_us = geometry.start_of(end_us)
    if len(training) + 1 < settings.training_windows:
        with write_transaction(engine) as connection:
            _claim_window(connection, start_us, end_us, len(current))
            window_id = _insert_window(
                connection,
                start_us=start_us,
                end_us=end_us,
                now_us=now_us,
                event_count=len(current),
                training=True,
                model=None,
                result=None,
                seconds=0.0,
            )
        return [
            {
                "id": window_id,
                "start": to_rfc3339(start_us),
                "end": to_rfc3339(end_us),
                "events": len(current),
                "accounts": int(len(set(current.actor) | set(current.target))),
                "alert_count": 0,
                "training": True,
                "backfilled": False,
            }
        ]
    # The training period is complete: fit the model on all training windows, then measure
    # every training window against it so account histories start at the beginning.
    with engine.connect() as connection:
        loaded = [
            (
                row.id,
                row.start_us,
                row.end_us,
                load_window_events(connection, row.start_us, row.end_us),
            )
            for row in training
        ]
        before_first = load_window_events(
            connection,
            loaded[0][1] - geometry.span_us if loaded else start_us - geometry.span_us,
            loaded[0][1] if loaded else start_us,
        )
    loaded.append((None, start_us, end_us, current))
    snapshots = [window_events.snapshot() for *_ignored, window_events in loaded]
    model = fit_model(settings, snapshots)
    results: list[tuple] = []
    past: list[PastWindow] = []
    previous = before_first
    for window_id, w_start, w_end, window_events in loaded:
        window = {"id": window_id, "start": to_rfc3339(w_start), "end": to_rfc3339(w_end)}
        started = time.perf_counter()
        result = compute_window(
            model, settings, window_events, previous, past, window=window, raise_alerts=False
        )
        results.append(
            (window_id, w_start, w_end, window_events, result, time.perf_counter() - started)
        )
        past = (past + [past_from_result(result)])[-lookback_windows(settings) :]
        previous = window_events
    summaries = []
    with write_transaction(engine) as connection:
        _claim_window(connection, start_us, end_us, len(current))
        store_model(
            connection,
            model,
            trained_from_us=loaded[0][1],
            trained_to_us=end_us,
            now_us=now_us,
        )
        for window_id, w_start, w_end, window_events, result, seconds in results:
            if window_id is None:
                window_id = _insert_window(
                    connection,
                    start_us=w_start,
                    end_us=w_end,
                    now_us=now_us,
                    event_count=len(window_events),
                    training=True,
                    model=model,
                    result=result,
                    seconds=seconds,
                )
            else:
                connection.execute(
                    windows.update()
                    .where(windows.c.id == window_id)
                    .values(**_window_model_values(model, result, seconds))
                )
            _store_result(connection, settings, model, window_id, w_start, w_end, now_us, result)
            summaries.append(
                _summary(
                    window_id,
                    w_start,
                    w_end,
                    len(window_events),
                    result,
                    training=True,
                    backfilled=w_end != end_us,
                )
            )
    return summaries


def load_past_windows(
    connection: Connection, model: FrozenModel, *, before_end_us: int, limit: int
) -> list[PastWindow]:
    """Stored memberships of the last ``limit`` measured windows before ``before_end_us``,
    oldest first, with mixtures laid out in the model's role order (missing roles are 0)."""
    recent = (
        connection.execute(
            sa.select(windows.c.id)
            .where(windows.c.end_us < before_end_us, windows.c.basis_version.is_not(None))
            .order_by(windows.c.end_us.desc())
            .limit(limit)
        )
        .scalars()
        .all()
    )
    column_of = {str(role_id): column for column, role_id in enumerate(model.basis.role_ids)}
    k = len(column_of)
    past = []
    for window_id in reversed(recent):
        rows = connection.execute(
            sa.select(
                memberships.c.account,
                memberships.c.mixture,
                memberships.c.events_out + memberships.c.events_in,
            ).where(memberships.c.window_id == window_id)
        ).all()
        mixture = np.zeros((len(rows), k))
        accounts = np.empty(len(rows), dtype=object)
        counts = np.zeros(len(rows))
        for index, (account, mixture_json, count) in enumerate(rows):
            accounts[index] = account
            counts[index] = count
            for role_id, weight in json.loads(mixture_json).items():
                column = column_of.get(role_id)
                if column is not None:
                    mixture[index, column] = weight
        totals = mixture.sum(axis=1, keepdims=True)
        np.divide(mixture, totals, out=mixture, where=totals > 0)
        past.append(PastWindow(accounts=accounts, mixture=mixture, events=counts))
    return past


def _window_model_values(model: FrozenModel, result: WindowResult | None, seconds: float) -> dict:
    if result is None:
        return {}
    return {
        "recipe_version": model.recipe.version,
        "basis_version": model.basis.version,
        "reconstruction_error": result.reconstruction_error,
        "account_count": len(result.nodes),
        "alert_count": len(result.alerts),
        "new_count": result.new_count,
        "inactive_count": result.inactive_count,
        "scored_count": result.scored_count,
        "close_seconds": round(seconds, 3),
    }


def _insert_window(
    connection: Connection,
    *,
    start_us: int,
    end_us: int,
    now_us: int,
    event_count: int,
    training: bool,
    model: FrozenModel | None,
    result: WindowResult | None,
    seconds: float,
) -> int:
    values = {
        "start_us": start_us,
        "end_us": end_us,
        "status": "closed",
        "closed_us": now_us,
        "event_count": event_count,
        "training": training,
        "late_count": 0,
    }
    if model is not None:
        values.update(_window_model_values(model, result, seconds))
    return int(connection.execute(windows.insert().values(**values)).inserted_primary_key[0])


def _store_result(
    connection: Connection,
    settings,
    model: FrozenModel,
    window_id: int,
    start_us: int,
    end_us: int,
    now_us: int,
    result: WindowResult,
) -> list[dict]:
    """Insert memberships and alerts; return the alerts in their API form."""
    if len(result.nodes):
        role_ids = [str(role_id) for role_id in model.basis.role_ids]
        rounded = np.round(result.mixture, 6)  # as_stored() applies the same rounding
        rows = []
        for index, account in enumerate(result.nodes):
            score = float(result.score[index])
            rows.append(
                {
                    "account": str(account),
                    "window_id": window_id,
                    "basis_version": model.basis.version,
                    "mixture": json.dumps(
                        {rid: float(w) for rid, w in zip(role_ids, rounded[index])}
                    ),
                    "dominant_role": int(result.dominant[index]),
                    "score": score if np.isfinite(score) else None,
                    "status": str(result.status[index]),
                    "events_out": int(result.activity.events_out[index]),
                    "events_in": int(result.activity.events_in[index]),
                    "counterparts": int(result.activity.counterparts[index]),
                    "new_counterparts": int(result.activity.new_counterparts[index]),
                    "error": float(result.error[index]),
                }
            )
        connection.execute(memberships.insert(), rows)
    api_alerts = []
    for alert in result.alerts:
        evidence = dict(alert["evidence"])
        evidence["window"] = {**evidence["window"], "id": window_id}
        alert_id = connection.execute(
            alerts.insert().values(
                window_id=window_id,
                account=alert["account"],
                created_us=now_us,
                window_end_us=end_us,
                score=alert["score"],
                basis_version=model.basis.version,
                role_before=alert["role_before"],
                role_after=alert["role_after"],
                evidence=json.dumps(evidence),
            )
        ).inserted_primary_key[0]
        api_alerts.append(
            {
                "id": int(alert_id),
                "account": alert["account"],
                "window_id": window_id,
                "window_start": to_rfc3339(start_us),
                "window_end": to_rfc3339(end_us),
                "created": to_rfc3339(now_us),
                "score": alert["score"],
                "basis_version": model.basis.version,
                "role_before": (
                    {"id": alert["role_before"], "name": model.role_name(alert["role_before"])}
                    if alert["role_before"] is not None
                    else None
                ),
                "role_after": {
                    "id": alert["role_after"],
                    "name": model.role_name(alert["role_after"]),
                },
                "evidence": evidence,
            }
        )
    return api_alerts


def _summary(
    window_id,
    start_us,
    end_us,
    event_count,
    result: WindowResult,
    *,
    training: bool,
    backfilled: bool = False,
) -> dict:
    return {
        "id": window_id,
        "start": to_rfc3339(start_us),
        "end": to_rfc3339(end_us),
        "events": event_count,
        "accounts": len(result.nodes),
        "alert_count": len(result.alerts),
        "new": result.new_count,
        "inactive": result.inactive_count,
        "scored": result.scored_count,
        "reconstruction_error": result.reconstruction_error,
        "training": training,
        "backfilled": backfilled,
    }
