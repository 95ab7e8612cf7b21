"""The alert budget shared by the baselines: quota per window and deterministic ranking."""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.evaluation import AccountScores, budget_quota, top_budget


def scores(window, account, score, tiebreak=None) -> AccountScores:
    score = np.asarray(score, dtype=float)
    return AccountScores(
        window_end_us=np.asarray(window, dtype=np.int64),
        account=np.asarray(account, dtype=str),
        score=score,
        tiebreak=np.zeros_like(score) if tiebreak is None else np.asarray(tiebreak, float),
    )


def test_quota_is_the_floor_of_the_budget_share_of_active_accounts():
    # floor(0.01 * n) as the scenario benchmark computes it (0.01 * 300 is 3, not 2.999...)
    assert budget_quota(np.array([99, 100, 300, 1999]), 0.01).tolist() == [0, 1, 3, 19]
    assert budget_quota(np.array([40]), 0.05).tolist() == [2]
    with pytest.raises(ValueError, match="budget"):
        budget_quota(np.array([10]), 0.0)


def test_top_budget_takes_the_best_scored_accounts_of_each_window():
    rng = np.random.default_rng(3)
    n = 250
    s = rng.random(n)
    s[[5, 17]] = np.nan  # not scored: never alerted, still counted as active
    table = scores(
        np.r_[np.full(n, 100), np.full(n, 200)],
        np.r_[[f"a{i:03d}" for i in range(n)], [f"a{i:03d}" for i in range(n)]],
        np.r_[s, s[::-1]],
    )
    alert = top_budget(table, 0.01)  # floor(0.01 * 250) = 2 per window
    assert alert.sum() == 4
    for end, values in ((100, s), (200, s[::-1])):
        rows = np.flatnonzero(table.window_end_us == end)
        best = rows[np.argsort(-np.nan_to_num(values, nan=-1))[:2]]
        assert set(np.flatnonzero(alert)) & set(rows) == set(best)


def test_ties_break_on_tiebreak_then_account_and_quotas_override_the_share():
    table = scores(
        [1, 1, 1, 1, 2, 2],
        ["d", "c", "b", "a", "x", "y"],
        [5.0, 5.0, 5.0, 1.0, 3.0, np.nan],
        tiebreak=[0.1, 0.9, 0.1, 0.0, 0.0, 0.0],
    )
    alert = top_budget(table, quotas={1: 2, 2: 5})
    # window 1: c (higher tiebreak), then b before d by account id; window 2: y has no score
    assert table.account[alert].tolist() == ["c", "b", "x"]
    assert not top_budget(table, quotas={}).any()
