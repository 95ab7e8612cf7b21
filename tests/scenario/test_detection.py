"""Detection on the fictional marketplace through the real offline pipeline.

The scenario is invented, so the pipeline test is a regression guard on the ground truth
the generator plants (which accounts change and when), run with the service's default
settings through :func:`rolewatch.pipeline.offline.run_offline`, the code path the window
closer uses. The volume baseline's robust z-score is checked against hand-computed
numbers and against scipy's normal-consistent MAD.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import median_abs_deviation

from rolewatch.config import load_settings
from rolewatch.scenario.evaluate import (
    SeedRun,
    WindowRecord,
    format_table,
    main,
    robust_zscore,
    run_seed,
    score_alerts,
    summarise,
    volume_alerts,
    weighted_degree,
)


def test_robust_zscore_hand_computed():
    # Hand-computed. Account 0 history 10, 12, 11, 50: median 11.5; absolute deviations
    # 1.5, 0.5, 0.5, 38.5 -> MAD 1.0; scale 1.4826; current 20 -> z = 8.5 / 1.4826 = 5.7332.
    # Account 1 history 4, 4, NaN, 4: median 4, MAD 0 -> scale floored at min_scale = 1;
    # current 7 -> z = 3. Account 2 has one past window only -> not scored.
    history = np.array(
        [[10, 4, np.nan], [12, 4, np.nan], [11, np.nan, np.nan], [50, 4, 9]], dtype=float
    )
    z = robust_zscore(history, np.array([20.0, 7.0, 30.0]), min_history=2, min_scale=1.0)
    np.testing.assert_allclose(z[:2], [8.5 / 1.4826, 3.0], rtol=1e-12)
    assert np.isnan(z[2])


def test_robust_zscore_scale_matches_scipy():
    # Reference: scipy.stats.median_abs_deviation(..., scale="normal") is the MAD scaled to
    # estimate a normal standard deviation (factor 1/Phi^-1(3/4) = 1.4826).
    rng = np.random.default_rng(1)
    history = rng.lognormal(3.0, 0.5, (9, 50))
    current = rng.lognormal(3.0, 0.5, 50)
    z = robust_zscore(history, current, min_scale=1e-12)
    expected = (current - np.median(history, axis=0)) / median_abs_deviation(
        history, axis=0, scale="normal"
    )
    np.testing.assert_allclose(z, expected, rtol=1e-4)


def test_weighted_degree_sums_weight_in_and_out():
    nodes = np.array(["a", "b", "c"])
    strength = weighted_degree(nodes, ["a", "b", "a"], ["b", "c", "c"], [1.0, 2.0, 4.0])
    np.testing.assert_allclose(strength, [5.0, 3.0, 6.0])


def _toy_run() -> SeedRun:
    """Four windows, one training; 'x' takes over in window 2; 'v' is a volume control."""
    truth = [
        {"account": "x", "change": "takeover", "window_index": 2},
        {"account": "v", "change": "volume_control", "window_index": 2},
    ]
    run = SeedRun(seed=0, truth=truth, meta={"season_window": 3})
    nodes = np.array(["v", "x", "y", "z"])
    strength = {0: [10, 1, 5, 5], 1: [10, 1, 5, 5], 2: [30, 9, 5, 5], 3: [31, 9, 5, 6]}
    for index in range(4):
        run.windows.append(
            WindowRecord(index, index == 0, nodes, set(), np.array(strength[index], dtype=float))
        )
    return run


def test_scoring_rules_on_a_toy_run():
    run = _toy_run()
    alerts = [set(), set(), set(), {"x", "y"}]  # x one window late, y a false lead
    figures = score_alerts(run, alerts)
    assert figures["recall_takeover"] == 1.0 and figures["delay_takeover"] == 1.0
    assert figures["precision"] == 0.5
    assert figures["volume_control_fa"] == 0.0
    assert figures["season_share"] == 0.5
    # The volume baseline at one alert per window picks the tripled volume control.
    volume = volume_alerts(run, [0, 1, 1, 1])
    assert volume[0] == set() and volume[2] == {"v"}
    assert score_alerts(run, volume)["volume_control_fa"] == 1.0
    table = format_table(
        {
            "seeds": [0],
            "members": 4,
            "weeks": 4,
            "alert_budget": 0.01,
            **{
                name: {"summary": summarise([figures])}
                for name in ("role_shift", "volume_baseline", "volume_full_budget")
            },
        }
    )
    assert "| recall takeover (≤ 1 window) | 1.00 ± 0.00 [1.00–1.00]" in table


@pytest.fixture(scope="module")
def sample_run():
    """The committed sample's parameters (seed 7, 400 members, 10 weeks), default settings."""
    settings = load_settings(None)
    run, _ = run_seed(settings, seed=7, members=400, weeks=10)
    return settings, run


def test_planted_takeovers_are_caught_and_volume_controls_are_not(sample_run):
    settings, run = sample_run
    role = [w.alerts for w in run.windows]
    figures = score_alerts(run, role)
    takeovers = [r for r in run.truth if r["change"] == "takeover"]
    assert takeovers, "the sample plants takeovers"
    assert figures["recall_takeover"] == 1.0
    assert figures["volume_control_fa"] == 0.0
    for window in run.windows:
        assert not window.training or not window.alerts
        # budget mode: at most alert_budget of the scored accounts, and at least one slot
        assert len(window.alerts) <= max(1, int(settings.alert_budget * len(window.nodes)))


def test_role_shift_beats_volume_on_the_sample(sample_run):
    _settings, run = sample_run
    role = [w.alerts for w in run.windows]
    volume = volume_alerts(run, [len(a) for a in role])
    ours, theirs = score_alerts(run, role), score_alerts(run, volume)
    assert ours["recall_structural"] > theirs["recall_structural"]


def test_cli_entry_rejects_bad_seeds(capsys):
    assert main(["--seeds", "zero"]) == 2
    assert "--seeds" in capsys.readouterr().err
