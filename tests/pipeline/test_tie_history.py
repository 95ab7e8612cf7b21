"""The closer and the in-memory pipeline agree, and alerts take every "before" from one
baseline window. Events: the fictional marketplace sample in fixtures/sample (invented)."""

from __future__ import annotations

import json
from datetime import datetime

import numpy as np
import sqlalchemy as sa

from rolewatch.pipeline.closer import close_due_windows
from rolewatch.pipeline.offline import run_offline
from rolewatch.store.events import ingest
from rolewatch.store.schema import alerts, memberships, pair_history, windows

from .conftest import sample_events

NOW = int(datetime(2026, 12, 1).timestamp() * 1_000_000)


def _offline(settings, events):
    def micros(text):
        return int(datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp() * 1_000_000)

    return list(
        run_offline(
            settings,
            event_id=np.array([e["id"] for e in events], dtype=object),
            time_us=np.array([micros(e["time"]) for e in events], dtype=np.int64),
            actor=np.array([e["actor"] for e in events], dtype=object),
            target=np.array([e["target"] for e in events], dtype=object),
            weight=np.array([float(e.get("weight", 1.0)) for e in events]),
        )
    )


def test_closer_and_offline_pipeline_give_the_same_scores_alerts_and_tie_counts(store):
    engine, settings = store
    events = sample_events()
    ingest(engine, settings, events, NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    offline = _offline(settings, events)
    with engine.connect() as connection:
        stored = connection.execute(
            sa.select(
                windows.c.end_us,
                memberships.c.account,
                memberships.c.score,
                memberships.c.status,
                memberships.c.ties_out_new,
                memberships.c.ties_in_new,
                memberships.c.new_counterparts,
                memberships.c.community,
            ).join(windows, windows.c.id == memberships.c.window_id)
        ).all()
        stored_alerts = connection.execute(
            sa.select(alerts.c.window_end_us, alerts.c.account)
        ).all()
        pair_counts = dict(
            connection.execute(
                sa.select(windows.c.end_us, pair_history.c.pair_count).join(
                    windows, windows.c.id == pair_history.c.window_id
                )
            ).all()
        )
    by_key = {(row.end_us, row.account): row for row in stored}
    assert len(by_key) == sum(len(w.result.nodes) for w in offline)
    for window in offline:
        result = window.result
        assert pair_counts[window.end_us] == len(result.new_pairs)
        for row, account in enumerate(result.nodes):
            mine = by_key[(window.end_us, str(account))]
            assert mine.status == result.status[row]
            assert mine.ties_out_new == result.ties[row, 1]
            assert mine.ties_in_new == result.ties[row, 3]
            assert mine.new_counterparts == result.activity.new_counterparts[row]
            assert mine.community == result.community[row]
            if np.isfinite(result.score[row]):
                assert abs(mine.score - result.score[row]) < 1e-9
            else:
                assert mine.score is None
    offline_alerts = {(w.end_us, a.account) for w in offline for a in w.result.alerts}
    assert {(row.window_end_us, row.account) for row in stored_alerts} == offline_alerts
    assert offline_alerts, "the sample raises alerts"


def test_every_before_value_of_an_alert_comes_from_its_baseline_window(store):
    engine, settings = store
    ingest(engine, settings, sample_events(), NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    with engine.connect() as connection:
        raised = connection.execute(
            sa.select(alerts.c.account, alerts.c.evidence, alerts.c.window_end_us)
        ).all()
        assert raised
        for account, text, end_us in raised:
            evidence = json.loads(text)
            baseline = evidence["baseline"]
            assert baseline is not None and baseline["id"] is not None
            row = connection.execute(
                sa.select(memberships).where(
                    memberships.c.window_id == baseline["id"], memberships.c.account == account
                )
            ).one()
            activity = evidence["activity"]
            assert activity["events_out_before"] == row.events_out
            assert activity["events_in_before"] == row.events_in
            assert activity["counterparts_before"] == row.counterparts
            assert activity["new_counterparts_before"] == row.new_counterparts
            assert activity["new_sent_to_before"] == row.ties_out_new
            stored_mixture = json.loads(row.mixture)
            shown = {str(m["role_id"]): m["weight"] for m in evidence["mixture_before"]}
            for role_id, weight in stored_mixture.items():
                assert abs(shown.get(role_id, 0.0) - weight) < 1e-4
            # no window between the baseline and the alert's window holds the account
            between = connection.execute(
                sa.select(sa.func.count())
                .select_from(memberships.join(windows, windows.c.id == memberships.c.window_id))
                .where(
                    memberships.c.account == account,
                    windows.c.start_us
                    >= sa.select(windows.c.end_us)
                    .where(windows.c.id == baseline["id"])
                    .scalar_subquery(),
                    windows.c.end_us < end_us,
                )
            ).scalar_one()
            assert between == 0


def test_accounts_with_too_little_activity_have_no_role(store):
    engine, settings = store
    ingest(engine, settings, sample_events(), NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    with engine.connect() as connection:
        rows = connection.execute(
            sa.select(
                memberships.c.mixture, memberships.c.dominant_role, memberships.c.score
            ).where(memberships.c.status == "too_little")
        ).all()
    for mixture, dominant, score in rows:
        assert json.loads(mixture) == {} and dominant is None and score is None
