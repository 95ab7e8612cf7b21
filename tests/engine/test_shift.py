import numpy as np
import pytest

from rolewatch.engine.shift import (
    activity_change,
    baseline_mixture,
    cosine_distance,
    feature_moves,
    hellinger,
    jensen_shannon,
    role_aware_distance,
    total_variation,
)

ALL = [hellinger, jensen_shannon, total_variation, cosine_distance]


@pytest.mark.parametrize("dist", ALL)
def test_identical_is_zero_and_disjoint_is_one(dist):
    # Worked values from the definitions (recalled from memory): identical -> 0,
    # disjoint supports -> 1 for Hellinger, JS (base 2), TV and cosine.
    p = np.array([[0.2, 0.8, 0.0], [1.0, 0.0, 0.0]])
    q = np.array([[0.2, 0.8, 0.0], [0.0, 0.5, 0.5]])
    d = dist(p, q)
    assert d[0] == pytest.approx(0.0, abs=1e-12)
    assert d[1] == pytest.approx(1.0)


@pytest.mark.parametrize("dist", ALL)
def test_nan_rows_stay_local_and_results_are_bounded(dist):
    rng = np.random.default_rng(0)
    p, q = rng.dirichlet(np.ones(4), 50), rng.dirichlet(np.ones(4), 50)
    p[7] = np.nan
    d = dist(p, q)
    assert np.isnan(d[7]) and np.isfinite(np.delete(d, 7)).all()
    assert ((np.delete(d, 7) >= 0) & (np.delete(d, 7) <= 1)).all()
    assert dist(p[0], q[0]) == pytest.approx(d[0])


def test_role_aware_distance_costs_little_between_similar_roles():
    F = np.array(
        [
            [1.0, 1.0, 0.0, 0.0],
            [1.0, 0.9, 0.0, 0.0],  # nearly the same role as 0
            [0.0, 0.0, 1.0, 1.0],
        ]
    )
    p = np.array([[1.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.3, 0.3, 0.4]])
    q = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [0.3, 0.3, 0.4]])
    d = role_aware_distance(p, q, F)
    assert d[0] < 0.1 and d[1] == pytest.approx(1.0) and d[2] == pytest.approx(0.0, abs=1e-12)
    # never above plain Hellinger (data-processing inequality)
    rng = np.random.default_rng(1)
    P, Q = rng.dirichlet(np.ones(3), 200), rng.dirichlet(np.ones(3), 200)
    assert (role_aware_distance(P, Q, F) <= hellinger(P, Q) + 1e-12).all()


def test_role_aware_distance_of_a_row_without_a_valid_mixture_is_nan():
    # Definition (recalled from memory): the image of a mixture is p F with F's rows scaled
    # to sum 1, and the distance is the Hellinger distance of the images.
    F = np.array([[1.0, 2.0, 0.0], [0.0, 1.0, 3.0]])
    p = np.array([[0.5, 0.5], [np.nan, np.nan], [1.0, 0.0], [0.0, 0.0]])
    q = np.array([[1.0, 0.0], [0.5, 0.5], [np.nan, 1.0], [0.2, 0.8]])
    d = role_aware_distance(p, q, F)
    assert np.isnan(d[1:]).all()
    R = F / F.max(axis=0)
    R = R / R.sum(axis=1, keepdims=True)
    a, b = np.array([0.5, 0.5]) @ R, np.array([1.0, 0.0]) @ R
    expected = np.sqrt(0.5 * np.sum((np.sqrt(a / a.sum()) - np.sqrt(b / b.sum())) ** 2))
    assert d[0] == pytest.approx(expected)


def test_activity_change_is_symmetric_log_ratio():
    assert activity_change(3, 3) == 0
    assert activity_change(7, 3) == pytest.approx(np.log(8 / 4))
    assert activity_change(3, 7) == pytest.approx(np.log(2))


def test_baseline_previous_mean_and_ewm():
    nan = [np.nan, np.nan]
    history = np.array(
        [
            [[1.0, 0.0], [0.5, 0.5], nan],
            [[0.0, 1.0], nan, nan],
            [nan, nan, nan],
        ]
    )
    prev = baseline_mixture(history, mode="previous")
    np.testing.assert_allclose(prev[0], [0.0, 1.0])
    np.testing.assert_allclose(prev[1], [0.5, 0.5])
    assert np.isnan(prev[2]).all()
    mean = baseline_mixture(history, mode="mean", last_k=3)
    np.testing.assert_allclose(mean[0], [0.5, 0.5])
    only_last = baseline_mixture(history, mode="mean", last_k=1)
    assert np.isnan(only_last).all()
    ewm = baseline_mixture(history, mode="ewm", half_life=1.0)
    # weights 0.25 (t=0) and 0.5 (t=1): (0.25*[1,0] + 0.5*[0,1]) / 0.75
    np.testing.assert_allclose(ewm[0], [1 / 3, 2 / 3])
    np.testing.assert_allclose(ewm[1], [0.5, 0.5])
    with pytest.raises(ValueError, match="baseline mode"):
        baseline_mixture(history, mode="median")


def test_feature_moves_ranks_by_log_ratio_and_keeps_raw_values():
    names = ["out_degree", "in_degree", "weight_out", "triangles"]
    moves = feature_moves(names, [0, 100, 5, np.nan], [3, 103, 5, 2], top=5)
    assert [m["feature"] for m in moves] == ["out_degree", "in_degree"]
    assert moves[0] == {
        "feature": "out_degree",
        "before": 0.0,
        "after": 3.0,
        "log_ratio": pytest.approx(np.log(4)),
    }
    assert feature_moves(names, [0, 0, 0, 0], [1, 2, 3, 4], top=2)[0]["feature"] == "triangles"
    with pytest.raises(ValueError):
        feature_moves(names, [1, 2], [1, 2])


def test_role_aware_distance_in_blocks_is_the_definition_row_by_row(monkeypatch):
    # Definition (recalled from memory, as above): the Hellinger distance of the images
    # p F and q F, F's columns scaled to their largest value and rows to sum 1; mixtures
    # that are not valid give NaN. Blocks of 3 rows, with invalid rows in some.
    import rolewatch.engine.shift as shift

    monkeypatch.setattr(shift, "_ROWS_PER_BLOCK", 3)
    rng = np.random.default_rng(5)
    F = rng.random((4, 6))
    p, q = rng.dirichlet(np.ones(4), 20) * 2.0, rng.dirichlet(np.ones(4), 20)
    p[[2, 9]] = np.nan
    q[13, 0] = -0.5
    d = role_aware_distance(p, q, F)
    R = F / F.max(axis=0)
    R = R / R.sum(axis=1, keepdims=True)
    for i in range(20):
        if i in (2, 9, 13):
            assert np.isnan(d[i])
            continue
        a, b = (p[i] / p[i].sum()) @ R, q[i] @ R
        expected = np.sqrt(0.5 * np.sum((np.sqrt(a / a.sum()) - np.sqrt(b / b.sum())) ** 2))
        assert d[i] == pytest.approx(expected, rel=1e-12)
