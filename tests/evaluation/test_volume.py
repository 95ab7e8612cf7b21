"""Volume baseline: robust z-score of weighted degree against the account's own history."""

from __future__ import annotations

import networkx as nx
import numpy as np
from scipy.stats import median_abs_deviation

from rolewatch.evaluation import WEEK_US, robust_zscore, volume_scores

T0 = 1_700_006_400 * 1_000_000 // WEEK_US * WEEK_US  # a window boundary


def test_robust_zscore_matches_scipy_normal_consistent_mad():
    # Reference: scipy.stats.median_abs_deviation(scale="normal") = MAD / 0.67449
    rng = np.random.default_rng(7)
    history = rng.gamma(2.0, 5.0, size=(9, 40))
    history[rng.random(history.shape) < 0.3] = np.nan
    current = rng.gamma(2.0, 8.0, size=40)
    z = robust_zscore(history, current, min_history=2, min_scale=1e-9)
    for j in range(40):
        h = history[:, j][np.isfinite(history[:, j])]
        if h.size < 2:
            assert np.isnan(z[j])
            continue
        scale = max(median_abs_deviation(h, scale="normal"), 1e-9)
        assert np.isclose(z[j], (current[j] - np.median(h)) / scale, rtol=1e-3)


def random_events(seed: int, n: int = 600, accounts: int = 30, windows: int = 6):
    rng = np.random.default_rng(seed)
    time = T0 + rng.integers(0, windows * WEEK_US, n)
    actor = rng.integers(0, accounts, n).astype(str)
    target = rng.integers(0, accounts, n).astype(str)
    weight = rng.integers(1, 20, n).astype(float)
    return time, actor, target, weight


def test_strength_and_history_match_networkx_weighted_degree():
    time, actor, target, weight = random_events(1)
    result = volume_scores(time, actor, target, weight, period_us=WEEK_US)
    window = (time // WEEK_US + 1) * WEEK_US
    seen: dict[str, list[float]] = {}
    for end in np.unique(window):
        # Reference: networkx weighted degree of the window's multigraph (in + out weight)
        g = nx.MultiDiGraph()
        keep = window == end
        g.add_weighted_edges_from(zip(actor[keep], target[keep], weight[keep], strict=True))
        rows = result.window(int(end))
        assert sorted(rows.account.tolist()) == sorted(g.nodes)
        for account, strength, z, history in zip(
            rows.account,
            rows.detail["strength"],
            rows.detail["z"],
            rows.detail["history"],
            strict=True,
        ):
            assert np.isclose(strength, g.degree(account, weight="weight"))
            past = seen.get(account, [])
            assert history == len(past)
            if len(past) < 2:
                assert np.isnan(z)
            else:
                scale = max(1.4826 * np.median(np.abs(np.array(past) - np.median(past))), 1.0)
                assert np.isclose(z, (strength - np.median(past)) / scale)
        for account in g.nodes:
            seen.setdefault(account, []).append(g.degree(account, weight="weight"))


def test_a_volume_jump_scores_far_above_steady_accounts():
    # Hand-computed: history 10, 12, 11 -> median 11, MAD 1; 40 -> z = 29 / 1.4826 = 19.56
    rows = []
    for w, amount in enumerate([10, 12, 11, 40]):
        rows.append((T0 + w * WEEK_US + 5, "jumper", "shop", amount))
        rows.append((T0 + w * WEEK_US + 9, "steady", "shop", 10 + w % 2))
    time, actor, target, weight = (np.array(c) for c in zip(*rows, strict=True))
    result = volume_scores(time, actor, target, weight, period_us=WEEK_US).window(T0 + 4 * WEEK_US)
    by_account = dict(zip(result.account, result.score, strict=True))
    assert np.isclose(by_account["jumper"], 29 / 1.4826)
    assert by_account["jumper"] > 5 * by_account["steady"]
