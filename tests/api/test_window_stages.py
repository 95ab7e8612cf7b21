"""Every closed window shows how long each stage of its close took: in GET /v1/windows and
as the Prometheus histogram ``rolewatch_window_stage_seconds`` on GET /metrics.

The windows are closed by the real pipeline on the fictional marketplace sample
(fixtures/sample, invented data).
"""

from __future__ import annotations

import json
from datetime import datetime
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from rolewatch.pipeline.closer import close_due_windows
from rolewatch.pipeline.stages import STAGES
from rolewatch.store.events import ingest

SAMPLE = Path(__file__).resolve().parents[2] / "fixtures" / "sample" / "events.ndjson"
NOW = int(datetime(2026, 12, 1).timestamp() * 1_000_000)  # long after the sample's weeks
COMPUTE_STAGES = ("features", "ties", "memberships", "history", "bridging", "scoring", "evidence")


@pytest.fixture
def app_settings(store_url):
    from rolewatch.config import load_settings

    return load_settings(
        database_url=store_url,
        window_period="7d",
        window_span="7d",
        window_lateness="1h",
        training_windows=4,
        public_url="http://127.0.0.1:9",
    )


def test_closed_windows_show_their_stage_seconds_and_the_metric_counts_them(app_client):
    def stage_counts() -> dict[str, float]:
        text = app_client.client.get("/metrics", headers=app_client.headers("read")).text
        # Parsed with prometheus_client's parser of the Prometheus text exposition format.
        families = {family.name: family for family in text_string_to_metric_families(text)}
        return {
            sample.labels["stage"]: sample.value
            for sample in families["rolewatch_window_stage_seconds"].samples
            if sample.name.endswith("_count")
        }

    before = stage_counts()
    assert set(before) == set(STAGES)
    # the sample's first six weeks: four training windows, then two scored ones
    with open(SAMPLE, encoding="utf-8") as handle:
        events = [json.loads(line) for line in handle if line.strip()]
    early = [event for event in events if event["time"] < "2026-02-12"]
    ingest(app_client.engine, app_client.settings, early, NOW)
    closed = close_due_windows(app_client.engine, app_client.settings, now_us=NOW, drain=True)
    assert len(closed) == 6

    body = app_client.client.get("/v1/windows", headers=app_client.headers("read")).json()
    assert len(body["closed"]) == 6
    for window in body["closed"]:
        stages = window["stage_seconds"]
        assert list(stages) == list(STAGES)
        assert all(seconds >= 0 for seconds in stages.values()), stages
        # every measured window computed features and wrote its rows
        assert stages["features"] > 0 and stages["store"] > 0, stages
        # the computing stages lie inside the close's computing time (rounding aside)
        inside = sum(stages[name] for name in COMPUTE_STAGES)
        assert inside <= window["close_seconds"] + 0.01 * len(COMPUTE_STAGES), window
    scored = [window for window in body["closed"] if not window["training"]]
    assert len(scored) == 2 and all(w["stage_seconds"]["load"] > 0 for w in scored)

    after = stage_counts()
    # one observation per stage for each window closed (back-filled windows count once)
    assert {stage: after[stage] - before[stage] for stage in STAGES} == dict.fromkeys(STAGES, 6)
