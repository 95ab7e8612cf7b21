import numpy as np
import pytest

from rolewatch.engine.scoring import ShiftPolicy, score_window
from rolewatch.engine.shift import hellinger, role_aware_distance

F = np.array([[1.0, 0.0, 0.5], [0.0, 1.0, 0.5], [0.2, 0.2, 1.0]])


def _case():
    cur = np.array([[1, 0, 0], [0, 1, 0], [0.3, 0.3, 0.4], [1, 0, 0], [np.nan] * 3], dtype=float)
    base = np.array([[0, 1, 0], [0, 1, 0], [np.nan] * 3, [0, 0, 1], [1, 0, 0]], dtype=float)
    act_now = np.array([10, 10, 10, 1, 0], dtype=float)
    act_before = np.array([10, 10, np.nan, 10, 5], dtype=float)
    err = np.array([0.1, 0.2, 0.3, 0.4, np.nan])
    return cur, base, act_now, act_before, err


def test_statuses_and_threshold_alerts():
    cur, base, a, b, err = _case()
    out = score_window(
        cur,
        base,
        a,
        b,
        err,
        F,
        ShiftPolicy(threshold=0.5, min_events=3, calibration="none", alert_mode="threshold"),
    )
    assert list(out.status) == ["scored", "scored", "new", "low_activity", "inactive"]
    np.testing.assert_allclose(out.score[:2], role_aware_distance(cur[:2], base[:2], F))
    assert np.isnan(out.score[2:]).all()
    assert list(out.alert) == [True, False, False, False, False]
    assert np.isfinite(out.composition[3]) and np.isnan(out.composition[2])


def test_other_measures_and_component_weights():
    cur, base, a, b, err = _case()
    pol = ShiftPolicy(
        measure="hellinger",
        magnitude_weight=0.5,
        error_weight=1.0,
        min_events=3,
        calibration="none",
    )
    out = score_window(cur, base, a, b, err, F, pol)
    expected = hellinger(cur[:2], base[:2]) + err[:2]  # equal activity: magnitude 0
    np.testing.assert_allclose(out.score[:2], expected)


def test_budget_mode_alerts_top_share_above_floor():
    rng = np.random.default_rng(0)
    n = 200
    cur = rng.dirichlet(np.ones(3), n)
    base = rng.dirichlet(np.ones(3), n)
    act = np.full(n, 10.0)
    pol = ShiftPolicy(
        measure="total_variation", alert_mode="budget", budget=0.05, floor=0.0, calibration="none"
    )
    out = score_window(cur, base, act, act, np.zeros(n), F, pol)
    assert out.alert.sum() == 10
    assert out.score[out.alert].min() >= np.nanmax(out.score[~out.alert])
    high_floor = score_window(
        cur,
        base,
        act,
        act,
        np.zeros(n),
        F,
        ShiftPolicy(
            measure="total_variation",
            alert_mode="budget",
            budget=0.05,
            floor=2.0,
            calibration="none",
        ),
    )
    assert not high_floor.alert.any()


def test_policy_rejects_unknown_settings():
    with pytest.raises(ValueError, match="measure"):
        ShiftPolicy(measure="euclid")
    with pytest.raises(ValueError, match="budget"):
        ShiftPolicy(budget=0.0)
    assert ShiftPolicy().to_dict()["measure"] == "role_aware"


def test_shape_mismatch_is_a_clear_error():
    cur, base, a, b, err = _case()
    with pytest.raises(ValueError, match="one shape"):
        score_window(cur, base[:3], a, b, err, F)
