"""What a close hands the score: accounts with something to fit a role to."""

from __future__ import annotations

from datetime import datetime

import numpy as np

from rolewatch.engine.basis import Memberships
from rolewatch.pipeline import compute

NOW = int(datetime(2026, 12, 1).timestamp() * 1_000_000)  # long after the sample's weeks


def test_structured_accounts_in_slices_are_the_whole_window_rule(monkeypatch):
    # The rule read off its definition with numpy on all rows at once: finite loadings
    # with a positive sum; computed in slices of 3 accounts it must give the same.
    rng = np.random.default_rng(0)
    loadings = rng.random((11, 4))
    loadings[2] = 0.0  # an empty fit
    loadings[5, 1] = np.nan  # invalid input
    loadings[9] = [0.0, 0.0, 0.0, 1e-300]
    members = Memberships(loadings=loadings, mixture=loadings, error=np.zeros(11))
    expected = np.isfinite(loadings).all(axis=1) & (np.nan_to_num(loadings).sum(axis=1) > 0)
    monkeypatch.setattr(compute, "SLICE_ROWS", 3)
    got = compute._structured(members)
    np.testing.assert_array_equal(got, expected)
    assert got.tolist().count(False) == 2


def test_a_close_lets_the_score_inputs_go_before_the_evidence_and_the_write(
    make_settings, monkeypatch
):
    # The inputs hold every account's baselines and tie history (hundreds of MB at
    # millions of accounts); only a re-scoring under other policies reads them, and the
    # closer never re-scores. Counted among the objects the garbage collector tracks.
    # Events: the fictional marketplace sample (invented data).
    import gc

    from rolewatch.pipeline import closer
    from rolewatch.store.db import open_store
    from rolewatch.store.events import ingest

    from .conftest import sample_events

    live_at: dict[str, list[int]] = {"evidence": [], "store": []}

    def counting(stage, function):
        def wrapped(*args, **kwargs):
            gc.collect()
            live_at[stage].append(sum(isinstance(o, compute.ScoreInputs) for o in gc.get_objects()))
            return function(*args, **kwargs)

        return wrapped

    monkeypatch.setattr(
        compute, "alerts_with_evidence", counting("evidence", compute.alerts_with_evidence)
    )
    monkeypatch.setattr(closer, "_store_result", counting("store", closer._store_result))
    settings = make_settings()
    engine = open_store(settings)
    try:
        ingest(engine, settings, sample_events(), NOW)
        closer.close_due_windows(engine, settings, now_us=NOW, drain=True)
    finally:
        engine.dispose()
    assert live_at["evidence"] and live_at["store"]  # alerts were raised, windows stored
    assert set(live_at["evidence"]) == {0}
    assert set(live_at["store"]) == {0}
