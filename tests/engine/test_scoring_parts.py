"""The "evidence" score of a window split into parts, against the whole-window score.

Reference: :func:`rolewatch.engine.scoring.score_window` on the same accounts at once (its
tests check each component against scipy in test_calibration.py), and numpy's own mean and
variance for the merged moments. The accounts are random draws (invented data).
"""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.engine.calibration import merged_rate_moments, rate_moments
from rolewatch.engine.order_statistics import InProcessParts
from rolewatch.engine.scoring import ShiftPolicy, TieEvidence, score_window
from rolewatch.engine.scoring_parts import score_over_parts, split_score_inputs


def _window(rng, n: int = 6000, k: int = 5, bridging: bool = True) -> dict:
    cur = rng.dirichlet(np.ones(k), n)
    base = rng.dirichlet(np.ones(k), n)
    base[: n // 50] = np.nan  # new accounts
    cur[n // 50 : n // 25] = np.nan  # inactive ones
    baseline_cells = rng.poisson(6, (n, 4)).astype(float)
    baseline_cells[: n // 40] = np.nan
    baseline_events = rng.poisson(20, (n, 2)).astype(float)
    baseline_events[: n // 45] = np.nan
    ties = TieEvidence(
        cells=rng.poisson(6, (n, 4)).astype(float),
        baseline_cells=baseline_cells,
        events=rng.poisson(20, (n, 2)).astype(float),
        baseline_events=baseline_events,
        history_new=rng.poisson(10, (n, 2)).astype(float),
        history_windows=rng.integers(0, 6, n).astype(float),
    )
    # a few accounts really change: many new counterparts, a reversed direction
    ties.cells[-20:, 1] += 60
    ties.events[-40:-20] = ties.events[-40:-20, ::-1] * 4
    return {
        "mixture": cur,
        "baseline": base,
        "events": rng.integers(0, 300, n).astype(float),
        "baseline_events": rng.integers(0, 300, n).astype(float),
        "error": rng.random(n),
        "ties": ties,
        "bridging": rng.normal(size=n) if bridging else None,
        "structured": rng.random(n) > 0.03,
    }


def _whole(window: dict, policy: ShiftPolicy, F: np.ndarray):
    return score_window(
        window["mixture"],
        window["baseline"],
        window["events"],
        window["baseline_events"],
        window["error"],
        F,
        policy,
        ties=window["ties"],
        current_bridging=window["bridging"],
        structured=window["structured"],
    )


def _over_parts(window: dict, policy: ShiftPolicy, F: np.ndarray, bounds):
    pieces = split_score_inputs(
        bounds,
        window["mixture"],
        window["baseline"],
        window["events"],
        window["baseline_events"],
        window["error"],
        window["ties"],
        bridging=window["bridging"],
        structured=window["structured"],
    )
    return score_over_parts(InProcessParts(pieces), policy, F)


POLICIES = {
    "default": ShiftPolicy(),
    "wider budget, low floor": ShiftPolicy(budget=0.05, floor=1.0),
    "threshold": ShiftPolicy(alert_mode="threshold", threshold=2.5),
    "some components": ShiftPolicy(components=("ties", "role"), floor=1.0),
    "hellinger": ShiftPolicy(measure="hellinger", floor=1.0),
}


@pytest.mark.parametrize("name", list(POLICIES))
@pytest.mark.parametrize("parts", [1, 3, 7])
def test_parts_score_as_the_whole_window(name, parts):
    rng = np.random.default_rng(len(name) * 10 + parts)
    window = _window(rng, bridging=name != "hellinger")
    policy, F = POLICIES[name], np.eye(5)
    n = window["mixture"].shape[0]
    inner = np.sort(rng.choice(np.arange(1, n), parts - 1, replace=False))
    whole = _whole(window, policy, F)
    split = _over_parts(window, policy, F, np.r_[0, inner, n])
    assert whole.alert.any(), "the draw raises alerts"
    # statuses and alerts exactly; scores to the last bits (sums added in another order)
    assert (split.status == whole.status).all()
    np.testing.assert_array_equal(split.alert, whole.alert)
    np.testing.assert_allclose(split.score, whole.score, rtol=1e-9, atol=1e-12)
    rows = np.flatnonzero(whole.alert)
    np.testing.assert_array_equal(split.detail_rows, rows)
    assert split.components.keys() == whole.components.keys()
    for component, values in whole.components.items():
        np.testing.assert_allclose(split.components[component], values[rows], rtol=1e-9, atol=1e-12)
    np.testing.assert_array_equal(split.strongest, whole.strongest[rows])
    np.testing.assert_array_equal(split.composition, whole.composition[rows])
    np.testing.assert_array_equal(split.magnitude, whole.magnitude[rows])
    row = int(rows[-1])
    assert split.detail_index(row) == rows.size - 1
    with pytest.raises(KeyError, match="only alerted accounts"):
        split.detail_index(int(np.flatnonzero(~whole.alert)[0]))


def test_an_empty_part_and_a_part_without_scored_accounts_change_nothing():
    rng = np.random.default_rng(4)
    window = _window(rng)
    n = window["mixture"].shape[0]
    # rows 0..n/50 have no baseline: that part has nobody scored; one part is empty
    bounds = [0, n // 60, n // 60, n // 2, n]
    whole = _whole(window, ShiftPolicy(floor=1.0), np.eye(5))
    split = _over_parts(window, ShiftPolicy(floor=1.0), np.eye(5), bounds)
    np.testing.assert_array_equal(split.alert, whole.alert)
    np.testing.assert_allclose(split.score, whole.score, rtol=1e-9, atol=1e-12)


def test_merged_moments_are_numpys_mean_and_variance_of_the_union():
    # Reference: numpy's mean and variance of all the rates at once (np.var: population).
    rng = np.random.default_rng(2)
    totals = rng.poisson(8, 10_000).astype(float)
    windows = rng.integers(1, 9, 10_000).astype(float)
    cuts = [0, 10, 10, 4000, 9999, 10_000]
    parts = [
        rate_moments(totals[a:b], windows[a:b]) for a, b in zip(cuts[:-1], cuts[1:], strict=True)
    ]
    count, mean, variance, inverse, summed, _ = merged_rate_moments(parts)
    rates = totals / windows
    assert count == rates.size
    assert mean == pytest.approx(np.mean(rates), rel=1e-13)
    assert variance == pytest.approx(np.var(rates), rel=1e-12)
    assert inverse == pytest.approx(np.mean(1 / windows), rel=1e-13)
    assert summed == pytest.approx(np.sum(rates), rel=1e-13)
    # one part is numpy's own arithmetic, to the bit
    one = merged_rate_moments([rate_moments(totals, windows)])
    assert one[1] == np.mean(rates) and one[2] == np.var(rates)


def test_other_calibrations_are_refused():
    with pytest.raises(ValueError, match="only the 'evidence' calibration"):
        _over_parts(
            _window(np.random.default_rng(1)),
            ShiftPolicy(calibration="stratified"),
            np.eye(5),
            [0, 6000],
        )
