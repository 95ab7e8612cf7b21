"""Stratified calibration of shift scores (robust z-scores within activity strata)."""

import numpy as np
import pytest
from scipy.stats import median_abs_deviation

from rolewatch.engine.scoring import (
    ShiftPolicy,
    activity_strata,
    score_window,
    stratified_zscore,
)


def test_zscore_of_one_stratum_hand_computed():
    # Hand-computed: median 0.3; absolute deviations 0.2, 0.1, 0, 0.1, 0.6 -> MAD 0.1;
    # scale 1.4826 * 0.1 = 0.14826; z(0.9) = 0.6 / 0.14826 = 4.0469...
    scores = np.array([0.1, 0.2, 0.3, 0.4, 0.9])
    z = stratified_zscore(scores, np.full(5, 10.0), stratum_size=5, min_scale=1e-6)
    np.testing.assert_allclose(z, [-1.34898, -0.67449, 0.0, 0.67449, 4.04694], atol=1e-5)


def test_scale_matches_scipy_normal_mad():
    # Reference: scipy.stats.median_abs_deviation(scale="normal") is the MAD divided by
    # Phi^-1(3/4), i.e. multiplied by 1.4826 (the consistency constant used here).
    rng = np.random.default_rng(3)
    scores = rng.gamma(2.0, 0.1, 400)
    z = stratified_zscore(scores, np.full(400, 7.0), stratum_size=10, min_scale=1e-9)
    expected = (scores - np.median(scores)) / median_abs_deviation(scores, scale="normal")
    np.testing.assert_allclose(z, expected, rtol=2e-4)


def test_strata_merge_thin_busy_levels_downwards():
    # activity 1 -> level 1, 3 -> 2, 100 -> 6, 1000 -> 9; each level's count given below
    activity = np.array([1] * 6 + [3] * 5 + [100] * 2 + [1000] * 1, dtype=float)
    valid = np.ones(activity.size, bool)
    valid[0] = False
    groups = activity_strata(activity, valid, stratum_size=4)
    assert groups[0] == -1
    # busiest first: levels 9 and 6 hold 3 accounts, too few, so they join level 2 (5);
    # level 1 keeps its 5 valid accounts as its own group
    assert len(set(groups[11:14]) | set(groups[6:11])) == 1
    assert set(groups[1:6]) == {1} and groups[6] == 0


def test_quiet_noise_no_longer_outranks_a_busy_shift():
    # Quiet accounts (1-2 events) swing widely by chance; one busy account moves less in
    # absolute terms but far more than its busy peers. Raw distance ranks it low;
    # stratified calibration ranks it first.
    rng = np.random.default_rng(0)
    n_quiet, n_busy = 300, 100
    k = 3
    F = np.eye(k)
    base = rng.dirichlet(np.ones(k), n_quiet + n_busy)
    cur = base.copy()
    cur[:n_quiet] = rng.dirichlet(np.ones(k) * 0.5, n_quiet)  # noisy quiet accounts
    cur[n_quiet:] = 0.97 * base[n_quiet:] + 0.03 * rng.dirichlet(np.ones(k), n_busy)
    busy = n_quiet  # the one busy account that really shifts
    cur[busy] = 0.4 * base[busy] + 0.6 * np.eye(k)[np.argmin(base[busy])]
    act = np.r_[rng.integers(1, 3, n_quiet), rng.integers(40, 80, n_busy)].astype(float)
    err = np.zeros(n_quiet + n_busy)
    raw = score_window(
        cur,
        base,
        act,
        act,
        err,
        F,
        ShiftPolicy(measure="total_variation", calibration="none", min_events=1),
    )
    calibrated = score_window(
        cur,
        base,
        act,
        act,
        err,
        F,
        ShiftPolicy(
            measure="total_variation", min_events=1, alert_mode="budget", budget=0.01, floor=5.0
        ),
    )
    assert np.sum(raw.score > raw.score[busy]) > 10
    assert np.nanargmax(calibrated.score) == busy
    assert calibrated.alert[busy] and calibrated.alert.sum() <= 4
    assert np.nanmin(calibrated.score) >= 0.0


def test_policy_rejects_unknown_calibration():
    with pytest.raises(ValueError, match="calibration"):
        ShiftPolicy(calibration="quantile")
    with pytest.raises(ValueError, match="stratum_size"):
        ShiftPolicy(stratum_size=0)
