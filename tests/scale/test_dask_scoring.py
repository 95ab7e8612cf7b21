"""A Dask close scores its window on the cluster: the window's sums, medians and top-k
computed over parts of its accounts give what the whole-window score gives.

Reference: :func:`rolewatch.engine.scoring.score_window` on the same accounts in this
process (its components are checked against scipy in tests/engine/test_calibration.py).
The accounts are random draws (invented data); the close uses the fictional marketplace
sample in fixtures/sample.
"""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.engine import scoring_parts
from rolewatch.engine.scoring import ShiftPolicy, TieEvidence
from rolewatch.pipeline.compute import ScoreInputs
from rolewatch.scale.dispatch import DaskMeasure
from rolewatch.scale.scoring import score_on_cluster

from .helpers import scheduler_transitions


def _inputs(rng, n: int = 5000, k: int = 4) -> ScoreInputs:
    baseline = rng.dirichlet(np.ones(k), n)
    baseline[:80] = np.nan
    baseline_cells = rng.poisson(5, (n, 4)).astype(float)
    baseline_cells[:90] = np.nan
    baseline_events = rng.poisson(15, (n, 2)).astype(float)
    baseline_events[:70] = np.nan
    cells = rng.poisson(5, (n, 4)).astype(float)
    cells[-15:, 1] += 50  # a few accounts meet many strangers
    ties = TieEvidence(
        cells=cells,
        baseline_cells=baseline_cells,
        events=rng.poisson(15, (n, 2)).astype(float),
        baseline_events=baseline_events,
        history_new=rng.poisson(8, (n, 2)).astype(float),
        history_windows=rng.integers(0, 5, n).astype(float),
    )
    return ScoreInputs(
        mixture=rng.dirichlet(np.ones(k), n),
        baseline=baseline,
        events=rng.integers(0, 200, n).astype(float),
        baseline_events=rng.integers(0, 200, n).astype(float),
        error=rng.random(n),
        F=np.eye(k),
        ties=ties,
        bridging=rng.normal(size=n),
        structured=rng.random(n) > 0.02,
        recent_new=np.zeros((n, 0, 2)),
        novelty_windows=ShiftPolicy().novelty_windows,
    )


@pytest.mark.parametrize("partitions", [1, 2, 5])
def test_scores_on_the_cluster_are_the_whole_window_scores(dask_cluster, partitions):
    inputs = _inputs(np.random.default_rng(partitions))
    policy = ShiftPolicy(floor=1.0)
    whole = inputs.score(policy)
    before = scheduler_transitions(dask_cluster.scheduler.address)
    on_cluster = score_on_cluster(dask_cluster, inputs, policy, partitions)
    assert scheduler_transitions(dask_cluster.scheduler.address) > before
    assert whole.alert.any(), "the draw raises alerts"
    np.testing.assert_array_equal(on_cluster.alert, whole.alert)
    assert (on_cluster.status == whole.status).all()
    np.testing.assert_allclose(on_cluster.score, whole.score, rtol=1e-9, atol=1e-12)
    rows = np.flatnonzero(whole.alert)
    for name, values in whole.components.items():
        np.testing.assert_allclose(on_cluster.components[name], values[rows], rtol=1e-9, atol=1e-12)
    # the parts' arrays do not stay on the workers
    assert not dask_cluster.run_on_scheduler(_scattered_parts)


def _scattered_parts(dask_scheduler) -> int:
    return sum(1 for key in dask_scheduler.tasks if str(key).startswith("dict-"))


def test_a_measure_on_the_cluster_scores_there_and_other_calibrations_here(
    dask_cluster, monkeypatch
):
    calls: list[int] = []
    original = scoring_parts.score_over_parts

    def counting(parts, policy, F):
        calls.append(1)
        return original(parts, policy, F)

    monkeypatch.setattr("rolewatch.scale.scoring.score_over_parts", counting)
    measure = DaskMeasure(dask_cluster, partitions=3)
    inputs = _inputs(np.random.default_rng(9), n=800)
    measure.score(inputs, ShiftPolicy())
    assert calls == [1]
    stratified = ShiftPolicy(calibration="stratified")
    here = measure.score(inputs, stratified)
    assert calls == [1]
    np.testing.assert_array_equal(here.score, inputs.score(stratified).score)
