"""The features kept from the last measured window give every alert the same evidence as
features recomputed from the stored events (no outside source: both are the product's own
computation, one cached). Events: the fictional marketplace sample in fixtures/sample."""

from __future__ import annotations

import json
from datetime import datetime

import numpy as np
import sqlalchemy as sa

from rolewatch.config import load_settings
from rolewatch.engine.features import FeatureRecipe
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline import closer
from rolewatch.pipeline.loading import PastWindow
from rolewatch.pipeline.recent import RecentFeatures
from rolewatch.store.alerts import WindowRef
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest
from rolewatch.store.schema import alerts

from .conftest import sample_events

NOW = int(datetime(2026, 12, 1).timestamp() * 1_000_000)


class _CountingRecent(RecentFeatures):
    hits = 0

    def find(self, past, recipe_version):
        found = super().find(past, recipe_version)
        type(self).hits += found is not None
        return found


def _alert_evidence(url: str, recent_factory, monkeypatch) -> list[tuple]:
    settings = load_settings(
        database_url=url,
        window_period="7d",
        window_span="7d",
        window_lateness="1h",
        training_windows=4,
        public_url="http://127.0.0.1:9",
    )
    engine = open_store(settings)
    monkeypatch.setattr(closer, "_recent_features", lambda _engine: recent_factory())
    try:
        ingest(engine, settings, sample_events(), NOW)
        closer.close_due_windows(engine, settings, now_us=NOW, drain=True)
        with engine.connect() as connection:
            rows = connection.execute(
                sa.select(alerts.c.account, alerts.c.window_end_us, alerts.c.evidence).order_by(
                    alerts.c.window_end_us, alerts.c.account
                )
            ).all()
    finally:
        engine.dispose()
    return [(account, end, json.loads(evidence)) for account, end, evidence in rows]


def test_kept_features_give_the_evidence_recomputed_features_give(tmp_path, monkeypatch):
    shared = _CountingRecent()
    kept = _alert_evidence(f"sqlite:///{tmp_path / 'kept.db'}", lambda: shared, monkeypatch)
    assert _CountingRecent.hits > 0  # the kept window was used
    recomputed = _alert_evidence(
        f"sqlite:///{tmp_path / 'recomputed.db'}",
        lambda: RecentFeatures(max_bytes=0),  # keeps nothing: every "before" recomputed
        monkeypatch,
    )
    assert kept
    assert [(a, e) for a, e, _ in kept] == [(a, e) for a, e, _ in recomputed]
    for (_, _, with_kept), (_, _, without) in zip(kept, recomputed, strict=True):
        with_kept["window"].pop("id"), without["window"].pop("id")
        assert with_kept == without
        assert with_kept["feature_moves"], "alerts show their feature moves"


def _window(seed: int) -> Snapshot:
    rng = np.random.default_rng(seed)
    actor = rng.integers(0, 30, 200)
    target = (actor + rng.integers(1, 30, 200)) % 30
    return Snapshot.from_events([f"m-{a}" for a in actor], [f"m-{t}" for t in target])


def test_a_kept_window_stands_only_for_the_stored_window_it_matches():
    snapshot = _window(0)
    recipe = FeatureRecipe.discover(snapshot)
    table = recipe.transform(snapshot)
    ref = WindowRef(id=3, start="2026-01-01T00:00:00Z", end="2026-01-08T00:00:00Z")
    recent = RecentFeatures()
    recent.remember(ref, snapshot, table)
    events = (
        np.asarray(snapshot.counts.sum(axis=1)).ravel()
        + np.asarray(snapshot.counts.sum(axis=0)).ravel()
    )

    def past(accounts=snapshot.nodes, counted=events, window=ref):
        mixture = np.zeros((len(accounts), 2))
        stored = PastWindow(accounts=accounts, mixture=mixture, events=counted, ref=window)
        return stored.facts()

    assert recent.find(past(), recipe.version) is not None
    assert recent.find(past(), "another-recipe") is None
    later = WindowRef(id=4, start="2026-01-08T00:00:00Z", end="2026-01-15T00:00:00Z")
    assert recent.find(past(window=later), recipe.version) is None
    assert recent.find(past(counted=events + 1), recipe.version) is None
    assert (
        recent.find(past(accounts=snapshot.nodes[:-1], counted=events[:-1]), recipe.version) is None
    )
    too_small = RecentFeatures(max_bytes=1)
    too_small.remember(ref, snapshot, table)
    assert too_small.find(past(), recipe.version) is None
