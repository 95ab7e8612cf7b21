"""The benchmark's counting rules, tuning choice, baseline budget and real-data checks,
on small hand-made inputs (invented data, worked by hand)."""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.evaluation.activity import WEEK_US
from rolewatch.evaluation.compare import baseline_alerts
from rolewatch.evaluation.figures import figures
from rolewatch.evaluation.ranking import AccountScores
from rolewatch.evaluation.realcheck import small_count_share, visible_bursts
from rolewatch.evaluation.tuning import Choice, choose


def _truth():
    return [
        {"account": "x", "change": "takeover", "window_index": 2},
        {"account": "y", "change": "contact_point", "window_index": 2},
        {"account": "v", "change": "volume_control", "window_index": 2},
        {"account": "s", "change": "season", "window_index": 3},
        {"account": "n", "change": "newcomer", "window_index": 1},
        {"account": "q", "change": "quiet", "window_index": 2},
    ]


def test_figures_count_by_the_documented_rules():
    alerts = [set(), set(), {"y"}, {"x", "s", "v"}, {"z"}]
    active = [10, 10, 10, 20, 10]
    training = [True, False, False, False, False]
    out = figures(_truth(), {"season_window": 3}, alerts, active, training)
    assert out["recall_takeover"] == 1.0  # one window late still counts
    assert out["recall_contact_point"] == 1.0
    assert np.isnan(out["recall_bridge"])
    assert out["precision"] == pytest.approx(2 / 5)  # x, y true; s, v, z false leads
    assert out["alert_share_max"] == pytest.approx(3 / 20)
    assert out["alert_share_mean"] == pytest.approx((0 + 0.1 + 0.15 + 0.1) / 4)
    assert out["control_volume_control"] == 1.0
    assert out["control_season"] == 1.0 and out["season_share"] == pytest.approx(3 / 20)
    assert out["control_newcomer"] == 0.0 and out["control_quiet"] == 0.0
    late = figures(
        _truth(), {"season_window": 3}, [set(), set(), set(), set(), {"x"}], active, training
    )
    assert late["recall_takeover"] == 0.0  # two windows late does not


def test_choose_prefers_recall_within_the_constraints_then_precision():
    good = {
        "recall_takeover": 1.0,
        "precision": 0.5,
        "control_volume_control": 0.0,
        "season_share": 0.005,
    }
    noisy = dict(good, control_volume_control=0.2)  # more recall bought with false alarms
    noisy["recall_takeover"] = 1.0
    precise = dict(good, precision=0.9)
    weak = dict(good, recall_takeover=0.5, precision=1.0)
    results = {
        Choice(8, 2.0, 3.5): [noisy],
        Choice(8, 2.0, 4.0): [good],
        Choice(8, 2.0, 4.5): [precise],
        Choice(8, 2.0, 6.0): [weak],
    }
    assert choose(results, [True], budget=0.01) == Choice(8, 2.0, 4.5)


def test_baseline_alerts_take_the_budget_or_the_given_counts():
    ends = [WEEK_US, 2 * WEEK_US]
    scores = AccountScores(
        window_end_us=np.repeat(ends, 200),
        account=np.array([f"a{i}" for i in range(200)] * 2),
        score=np.tile(np.arange(200.0), 2),
        tiebreak=np.zeros(400),
    )
    full = baseline_alerts(scores, ends, [False, False], budget=0.01)
    assert full == [{"a199", "a198"}, {"a199", "a198"}]  # floor(0.01 * 200) = 2
    matched = baseline_alerts(scores, ends, [True, False], budget=0.01, quotas=[5, 1])
    assert matched == [set(), {"a199"}]  # training windows never alert


def test_visible_bursts_and_small_count_share_from_raw_events():
    # window 0: "q" sends 2 messages (quiet); window 1: "q" writes 25 messages to 20
    # strangers, 3 answer; "b" writes 25 messages to 20 strangers but 12 answer (not one
    # sided); "r" was busy before (30 events) and bursts too (not quiet).
    rows = [("q", "k0"), ("k0", "q"), ("r", "k1")] + [("r", f"k{i}") for i in range(30)]
    t0 = [WEEK_US // 2] * len(rows)
    burst = [("q", f"s{i}") for i in range(20)] + [("q", "s0")] * 5
    burst += [(f"s{i}", "q") for i in range(3)]
    burst += [("b", f"t{i}") for i in range(20)] + [("b", "t0")] * 5
    burst += [(f"t{i}", "b") for i in range(12)]
    burst += [("b", "k0")]
    burst += [("r", f"u{i}") for i in range(25)]
    rows += burst
    times = np.array(t0 + [WEEK_US + WEEK_US // 2] * len(burst), dtype=np.int64)
    actor = np.array([a for a, _ in rows])
    target = np.array([b for _, b in rows])
    found = visible_bursts(times, actor, target, period_us=WEEK_US, first_end_us=2 * WEEK_US)
    assert [(b.account, b.messages, b.new_recipients, b.answered) for b in found] == [
        ("q", 25, 20, 3)
    ]
    small, total = small_count_share([{"q", "k0"}], [np.array(["k0", "q"])], [np.array([2, 28])])
    assert (small, total) == (1, 2)
