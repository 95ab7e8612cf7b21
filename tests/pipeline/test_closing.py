"""Closing windows end to end on a real store: training, back-fill, scoring, late events,
crash safety, and the same results whether events come in bulk, trickle or by file.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import json
from datetime import datetime

import pytest
import sqlalchemy as sa

from rolewatch.config import load_settings
from rolewatch.pipeline import closer as closer_module
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest
from rolewatch.store.review_schema import case_alerts, case_history, cases, suppressed_alerts
from rolewatch.store.schema import alerts, deliveries, events, memberships, pair_history, windows

from .conftest import sample_events, sample_truth

NOW = int(datetime(2026, 12, 1).timestamp() * 1_000_000)  # long after the sample's weeks


def _time_us(event: dict) -> int:
    return int(datetime.fromisoformat(event["time"].replace("Z", "+00:00")).timestamp() * 1_000_000)


def _snapshot_of_results(engine) -> dict:
    """Everything a close writes, without ids and wall-clock times, for comparisons."""
    with engine.connect() as connection:
        window_rows = connection.execute(
            sa.select(
                windows.c.start_us,
                windows.c.end_us,
                windows.c.event_count,
                windows.c.account_count,
                windows.c.alert_count,
                windows.c.training,
                windows.c.basis_version,
                windows.c.reconstruction_error,
                windows.c.new_count,
                windows.c.inactive_count,
            ).order_by(windows.c.end_us)
        ).all()
        member_rows = connection.execute(
            sa.select(
                windows.c.end_us,
                memberships.c.account,
                memberships.c.mixture,
                memberships.c.score,
                memberships.c.status,
                memberships.c.dominant_role,
                memberships.c.new_counterparts,
            )
            .join(windows, windows.c.id == memberships.c.window_id)
            .order_by(windows.c.end_us, memberships.c.account)
        ).all()
        alert_rows = connection.execute(
            sa.select(
                alerts.c.window_end_us,
                alerts.c.account,
                alerts.c.score,
                alerts.c.role_before,
                alerts.c.role_after,
            ).order_by(alerts.c.window_end_us, alerts.c.account)
        ).all()
    return {
        "windows": [tuple(row) for row in window_rows],
        "memberships": [tuple(row) for row in member_rows],
        "alerts": [tuple(row) for row in alert_rows],
    }


def test_sample_closes_into_training_then_scored_windows(store):
    from rolewatch import metrics

    engine, settings = store
    result = ingest(engine, settings, sample_events(), NOW)
    assert result.accepted > 10_000 and not result.rejected
    counted_before = metrics.WINDOWS_CLOSED._value.get()
    closed = close_due_windows(engine, settings, now_us=NOW, drain=True)
    truth = sample_truth()
    # one summary per window: a back-filled training window is reported once, measured,
    # and counted once in rolewatch_windows_closed_total
    assert [summary.id for summary in closed] == sorted({s.id for s in closed})
    assert len(closed) == truth["meta"]["weeks"]
    assert metrics.WINDOWS_CLOSED._value.get() - counted_before == truth["meta"]["weeks"]
    with engine.connect() as connection:
        rows = connection.execute(sa.select(windows).order_by(windows.c.end_us)).all()
        assert [row.training for row in rows] == [True] * 4 + [False] * (len(rows) - 4)
        # training windows were back-filled: every window carries the basis version
        assert all(row.basis_version for row in rows)
        assert sum(row.event_count for row in rows) == result.accepted
        mixtures = connection.execute(sa.select(memberships.c.mixture)).scalars().all()
        for mixture in mixtures[:500]:
            assert sum(json.loads(mixture).values()) == pytest.approx(1.0, abs=1e-4)
        statuses = set(connection.execute(sa.select(memberships.c.status).distinct()).scalars())
        assert {"new", "scored"} <= statuses
        # training windows never alert
        training_ids = [row.id for row in rows if row.training]
        assert not connection.execute(
            sa.select(alerts).where(alerts.c.window_id.in_(training_ids))
        ).first()
    # closing again is a no-op
    assert close_due_windows(engine, settings, now_us=NOW, drain=True) == []


def test_bulk_trickle_and_out_of_order_give_identical_windows(tmp_path):
    # the arrival patterns are compared on SQLite files; the PostgreSQL variants of the
    # other tests cover the same closing code on the other database
    every = sample_events()
    stores = {}
    for mode in ("bulk", "trickle", "shuffled"):
        settings = load_settings(
            database_url=f"sqlite:///{tmp_path / (mode + '.db')}",
            window_period="7d",
            window_span="7d",
            window_lateness="1h",
            training_windows=4,
            public_url="http://127.0.0.1:9",
        )
        engine = open_store(settings)
        if mode == "bulk":
            ingest(engine, settings, every, NOW)
            close_due_windows(engine, settings, now_us=NOW, drain=True)
        elif mode == "trickle":
            # a live stream: batches arrive in time order and the wall clock moves with them
            ordered = sorted(every, key=_time_us)
            for start in range(0, len(ordered), 500):
                batch = ordered[start : start + 500]
                arrival = _time_us(batch[-1]) + 1
                ingest(engine, settings, batch, arrival)
                close_due_windows(engine, settings, now_us=arrival)
            close_due_windows(engine, settings, now_us=NOW)  # idle long after the last event
        else:
            import random

            shuffled = list(every)
            random.Random(3).shuffle(shuffled)
            for start in range(0, len(shuffled), 2_000):
                ingest(engine, settings, shuffled[start : start + 2_000], NOW)
            close_due_windows(engine, settings, now_us=NOW, drain=True)
        stores[mode] = _snapshot_of_results(engine)
        engine.dispose()
    assert (
        stores["bulk"]["windows"] == stores["trickle"]["windows"] == stores["shuffled"]["windows"]
    )
    assert (
        stores["bulk"]["memberships"]
        == stores["trickle"]["memberships"]
        == stores["shuffled"]["memberships"]
    )
    assert stores["bulk"]["alerts"] == stores["trickle"]["alerts"] == stores["shuffled"]["alerts"]


def test_late_event_is_stored_and_counted_but_never_changes_a_closed_window(store):
    engine, settings = store
    every = sample_events()
    ingest(engine, settings, every, NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    before = _snapshot_of_results(engine)
    with engine.connect() as connection:
        first = connection.execute(sa.select(windows).order_by(windows.c.end_us)).first()
    straggler = {
        "id": "late-1",
        "time": "2026-01-02T12:00:00Z",
        "actor": "m-00001",
        "target": "m-00002",
        "weight": 5,
    }
    outcome = ingest(engine, settings, [straggler], NOW)
    assert outcome.accepted == 1 and outcome.late == 1
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    with engine.connect() as connection:
        stored = connection.execute(
            sa.select(events.c.late).where(events.c.event_id == "late-1")
        ).scalar_one()
        late_count = connection.execute(
            sa.select(windows.c.late_count).where(windows.c.id == first.id)
        ).scalar_one()
    assert stored is True and late_count == 1
    assert _snapshot_of_results(engine) == before


def test_a_crash_mid_close_leaves_no_partial_window_and_the_next_tick_redoes_it(store, monkeypatch):
    engine, settings = store
    ingest(engine, settings, sample_events(), NOW)
    # close the training windows and one more, then make the next close fail inside its
    # write transaction (after memberships and alerts were inserted)
    closed = close_due_windows(engine, settings, now_us=NOW, drain=True)
    assert closed
    with engine.begin() as connection:
        last = connection.execute(sa.select(sa.func.max(windows.c.id))).scalar_one()
        connection.execute(deliveries.delete())
        # review cases point at alerts; drop them so the window's alerts can go
        connection.execute(case_history.delete())
        connection.execute(case_alerts.delete())
        connection.execute(cases.delete())
        connection.execute(suppressed_alerts.delete().where(suppressed_alerts.c.window_id == last))
        connection.execute(alerts.delete().where(alerts.c.window_id == last))
        connection.execute(memberships.delete().where(memberships.c.window_id == last))
        connection.execute(pair_history.delete().where(pair_history.c.window_id == last))
        connection.execute(windows.delete().where(windows.c.id == last))
    original_store = closer_module._store_result

    def store_then_crash(*args, **kwargs):
        original_store(*args, **kwargs)
        raise RuntimeError("simulated crash inside the window transaction")

    monkeypatch.setattr(closer_module, "_store_result", store_then_crash)
    with pytest.raises(RuntimeError, match="simulated crash"):
        close_due_windows(engine, settings, now_us=NOW, drain=True)
    with engine.connect() as connection:
        assert connection.execute(sa.select(sa.func.max(windows.c.id))).scalar_one() < last
        assert not connection.execute(
            sa.select(memberships).where(memberships.c.window_id >= last)
        ).first()
    monkeypatch.setattr(closer_module, "_store_result", original_store)
    redone = close_due_windows(engine, settings, now_us=NOW, drain=True)
    assert len(redone) == 1
    with engine.connect() as connection:
        count = connection.execute(
            sa.select(sa.func.count())
            .select_from(memberships)
            .where(memberships.c.window_id == redone[0].id)
        ).scalar_one()
    assert count == redone[0].accounts > 0


def test_refit_on_a_named_period_keeps_persisting_role_ids_and_their_names(store):
    from rolewatch.pipeline.lifecycle import RefitError, refit_basis
    from rolewatch.pipeline.model import load_active_model
    from rolewatch.store.queries import rename_role

    engine, settings = store
    with pytest.raises(RefitError, match="no basis has been trained yet"):
        refit_basis(engine, settings, 0, NOW, now_us=NOW)
    ingest(engine, settings, sample_events(), NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    with engine.connect() as connection:
        before = load_active_model(connection)
        ends = connection.execute(
            sa.select(windows.c.start_us, windows.c.end_us).order_by(windows.c.end_us)
        ).all()
    for info in before.roles:  # an operator names every role
        rename_role(engine, info.role_id, f"desk name {info.role_id}")
    with pytest.raises(RefitError, match="no closed window"):
        refit_basis(engine, settings, NOW, NOW + 1, now_us=NOW)
    summary = refit_basis(engine, settings, ends[4].start_us, ends[-1].end_us, now_us=NOW)
    with engine.connect() as connection:
        after = load_active_model(connection)
    assert summary["basis_version"] == after.basis.version != before.basis.version
    assert summary["windows"] == len(ends) - 4
    assert summary["roles_kept"], "no role persisted across the refit"
    assert set(summary["roles_kept"]) | set(summary["roles_added"]) == set(after.basis.role_ids)
    for role_id in summary["roles_kept"]:
        assert after.role_name(role_id) == f"desk name {role_id}"
    for role_id in summary["roles_added"]:
        assert not after.role_name(role_id).startswith("desk name")
    # the stored history keeps the basis version each window was measured with
    with engine.connect() as connection:
        versions = set(
            connection.execute(sa.select(memberships.c.basis_version).distinct()).scalars()
        )
    assert versions == {before.basis.version}


def test_the_window_closed_log_line_carries_the_window_summary(make_settings):
    """The JSON log line of each closed window holds its summary (it was dropped before)."""
    import io
    import logging

    from rolewatch.logs import JsonFormatter

    settings = make_settings(training_windows=4)
    engine = open_store(settings)
    # the sample's first two weeks: two training windows, recorded without a model fit
    early = [e for e in sample_events() if e["time"] < "2026-01-15"]
    ingest(engine, settings, early, NOW)
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonFormatter())
    pipeline_log = logging.getLogger("rolewatch.pipeline")
    level = pipeline_log.level
    pipeline_log.addHandler(handler)
    pipeline_log.setLevel(logging.INFO)
    try:
        closed = close_due_windows(engine, settings, now_us=NOW, drain=True)
    finally:
        pipeline_log.removeHandler(handler)
        pipeline_log.setLevel(level)
        engine.dispose()
    lines = [json.loads(line) for line in stream.getvalue().splitlines()]
    logged = [line["window"] for line in lines if line["message"] == "window closed"]
    assert len(closed) == 2
    assert [
        (entry["id"], entry["end"], entry["events"], entry["training"]) for entry in logged
    ] == [(summary.id, summary.end, summary.events, True) for summary in closed]
    assert sum(entry["events"] for entry in logged) == len(early)
