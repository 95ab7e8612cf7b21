"""MIDAS-R (Bhatia, Hooi, Yoon, Shin & Faloutsos, AAAI 2020) against the paper's definitions.

The reference below is a plain-dict streaming implementation of the paper's definitions,
edge by edge, with exact counts:

* a_uv / s_uv: count of u -> v in the current tick / in all ticks so far, including the
  arriving edge (and likewise a_u, s_u for the source node and a_v, s_v for the
  destination node, the paper's relational extension);
* temporal extension: at the end of a tick the current counts are multiplied by the decay
  factor alpha instead of being reset (alpha = 0 is plain MIDAS); every elapsed tick
  decays once;
* score: the chi-squared statistic over "current tick" vs "earlier ticks" under the mean
  rate hypothesis E[a_uv] = s_uv / t, i.e. (a - s/t)^2 t^2 / (s (t - 1)); the MIDAS-R
  edge score is the largest of the edge, source and destination statistics.

(Quantities and formulas as defined in the paper; equation labels recalled, not checked.)
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from scipy.stats import chisquare

from rolewatch.evaluation import (
    HOUR_US,
    WEEK_US,
    MidasParams,
    chi_squared_score,
    midas_edge_scores,
    midas_scores,
    top_budget,
)
from rolewatch.evaluation.sketch import account_keys

T0 = 1_100_000_000 * 1_000_000 // WEEK_US * WEEK_US


def reference_stream(ticks, src, dst, decay: float):
    """Exact MIDAS-R counts, one edge at a time, with Python dicts."""
    current: dict = {}
    total: dict = {}
    last = None
    out = []
    for t, u, v in zip(ticks, src, dst, strict=True):
        if last is not None and t != last:
            for key in current:
                current[key] *= decay ** (t - last)
        last = t
        row = {}
        for kind, key in (("edge", (u, v)), ("source", u), ("target", v)):
            current[kind, key] = current.get((kind, key), 0.0) + 1.0
            total[kind, key] = total.get((kind, key), 0.0) + 1.0
            row[kind] = (current[kind, key], total[kind, key])
        out.append(row)
    return out


def paper_score(a: float, s: float, t: int) -> float:
    return 0.0 if t <= 1 or s == 0 else (a - s / t) ** 2 * t**2 / (s * (t - 1))


def random_stream(seed: int, n: int = 700, nodes: int = 25, ticks: int = 40):
    rng = np.random.default_rng(seed)
    tick = np.sort(rng.choice(np.arange(ticks), size=n))  # some ticks stay empty (gaps)
    time = T0 + tick * HOUR_US + rng.integers(0, HOUR_US, n)
    time.sort()
    src = rng.integers(0, nodes, n).astype(str)
    dst = rng.integers(0, nodes, n).astype(str)
    return time, src, dst


@pytest.mark.parametrize("decay", [0.0, 0.5, 0.9])
def test_wide_sketches_reproduce_exact_counts_and_scores(decay):
    time, src, dst = random_stream(5)
    wide = MidasParams(rows=4, width=2**16, decay=decay, seed=1)
    result = midas_edge_scores(time, src, dst, wide)
    ticks = time // HOUR_US - time[0] // HOUR_US + 1
    assert np.array_equal(result.tick, ticks)
    expected = reference_stream(ticks.tolist(), src.tolist(), dst.tolist(), decay)
    for kind in ("edge", "source", "target"):
        # a_uv, s_uv (edge), a_u, s_u (source), a_v, s_v (destination): sketch == exact
        a = np.array([row[kind][0] for row in expected])
        s = np.array([row[kind][1] for row in expected])
        assert np.allclose(result.estimates[f"{kind}_current"], a, rtol=1e-12, atol=1e-12)
        assert np.array_equal(result.estimates[f"{kind}_total"], s)
    # MIDAS-R score = max of the three chi-squared statistics
    want = [
        max(paper_score(*row[kind], t) for kind in ("edge", "source", "target"))
        for row, t in zip(expected, ticks.tolist(), strict=True)
    ]
    assert np.allclose(result.score, want, rtol=1e-9)


def test_narrow_sketches_never_undercount():
    # Count-min guarantee (Cormode & Muthukrishnan 2005): estimate >= true count
    time, src, dst = random_stream(6)
    narrow = midas_edge_scores(time, src, dst, MidasParams(rows=2, width=8, decay=0.5))
    ticks = time // HOUR_US - time[0] // HOUR_US + 1
    expected = reference_stream(ticks.tolist(), src.tolist(), dst.tolist(), 0.5)
    for kind in ("edge", "source", "target"):
        s = np.array([row[kind][1] for row in expected])
        a = np.array([row[kind][0] for row in expected])
        assert (narrow.estimates[f"{kind}_total"] >= s).all()
        assert (narrow.estimates[f"{kind}_current"] >= a - 1e-9).all()
        assert (narrow.estimates[f"{kind}_total"] > s).any()  # collisions did happen


def test_statistic_is_scipys_two_category_chi_squared_and_zero_at_the_mean_rate():
    rng = np.random.default_rng(2)
    for _ in range(50):
        t = int(rng.integers(2, 500))
        s = float(rng.integers(1, 1000))
        a = float(rng.uniform(0, s))
        # Reference: scipy's goodness-of-fit over (current tick, earlier ticks)
        reference = chisquare([a, s - a], f_exp=[s / t, s - s / t]).statistic
        assert np.isclose(chi_squared_score(a, s, t), reference, rtol=1e-9)
    # current count equal to its mean-rate expectation s / t: no evidence at all
    assert chi_squared_score(30 / 6, 30, 6) == 0.0
    assert chi_squared_score(1, 1, 1) == 0.0  # first tick: one category only


def test_a_steady_edge_scores_zero_in_plain_midas():
    # one event per tick for 12 ticks: a = 1 = s / t at every tick (no decay, no relation)
    time = T0 + np.arange(12) * HOUR_US + 60_000_000
    plain = MidasParams(decay=0.0, relational=False)
    result = midas_edge_scores(time, np.full(12, "p"), np.full(12, "q"), plain)
    assert np.allclose(result.score, 0.0)


def test_burst_of_a_new_edge_outscores_steady_edges():
    rows = []
    for tick in range(30):
        for k in range(6):
            rows.append((T0 + tick * HOUR_US + k, f"s{k}", f"r{k}"))
    for j in range(20):  # tick 30: a never-seen pair, 20 times
        rows.append((T0 + 30 * HOUR_US + 100 + j, "burst", "victim"))
    for k in range(6):
        rows.append((T0 + 30 * HOUR_US + 200 + k, f"s{k}", f"r{k}"))
    time, src, dst = (np.array(c) for c in zip(*rows, strict=True))
    result = midas_edge_scores(time, src, dst)
    burst = src == "burst"
    last_steady = ~burst & (time >= T0 + 30 * HOUR_US)
    assert result.score[burst][-1] > 10 * result.score[last_steady].max()
    assert np.all(np.diff(result.score[burst]) > 0)  # each repeat makes the burst surer


def test_decay_scales_current_counts_per_elapsed_tick_and_keeps_totals():
    alpha = 0.5
    time = T0 + np.array([0, 1, 2, 3, HOUR_US, 4 * HOUR_US]) + 7
    result = midas_edge_scores(
        time, np.full(6, "u"), np.full(6, "v"), MidasParams(decay=alpha, width=2**16)
    )
    a = result.estimates["edge_current"]
    s = result.estimates["edge_total"]
    assert a[:4].tolist() == [1, 2, 3, 4]  # tick 1: plain counting
    assert a[4] == pytest.approx(4 * alpha + 1)  # tick 2: decayed once, not reset
    assert a[5] == pytest.approx((4 * alpha + 1) * alpha**3 + 1)  # three ticks later
    assert s.tolist() == [1, 2, 3, 4, 5, 6]  # totals never decay
    reset = midas_edge_scores(time, np.full(6, "u"), np.full(6, "v"), MidasParams(decay=0.0))
    assert reset.estimates["edge_current"].tolist() == [1, 2, 3, 4, 1, 1]  # MIDAS resets


def test_seeded_hashing_is_repeatable():
    time, src, dst = random_stream(8)
    narrow = MidasParams(rows=2, width=16, seed=3)
    first = midas_edge_scores(time, src, dst, narrow)
    again = midas_edge_scores(time, src, dst, narrow)
    other = midas_edge_scores(time, src, dst, MidasParams(rows=2, width=16, seed=4))
    assert np.array_equal(first.score, again.score)
    assert not np.array_equal(first.estimates["edge_total"], other.estimates["edge_total"])
    # account keys are BLAKE2b digests (hashlib), not Python's per-process hash()
    digest = hashlib.blake2b(b"alice", digest_size=8).digest()
    assert account_keys(["alice"])[0] == int.from_bytes(digest, "little")


def test_account_scores_sum_log_edge_scores_per_window():
    time, src, dst = random_stream(9, n=400, ticks=24 * 21)
    result = midas_scores(time, src, dst, period_us=WEEK_US)
    edge = np.log1p(midas_edge_scores(time, src, dst).score)
    window = (time // WEEK_US + 1) * WEEK_US
    for end, account, score, largest in zip(
        result.window_end_us, result.account, result.score, result.tiebreak, strict=True
    ):
        here = window == end
        sent = here & (src == account)
        received = here & (dst == account) & (src != account)  # a self-event counts once
        assert np.isclose(score, edge[sent].sum() + edge[received].sum())
        assert np.isclose(largest, edge[sent | received].max())


def test_fan_out_to_new_accounts_tops_the_window():
    rng = np.random.default_rng(4)
    rows = []
    members = [f"m{i}" for i in range(60)]
    for tick in range(24 * 21):  # three weeks of ordinary chatter among members
        for _ in range(3):
            a, b = rng.choice(members, 2, replace=False)
            rows.append((T0 + tick * HOUR_US + int(rng.integers(HOUR_US)), a, b))
    for k in range(45):  # in the third week m0 writes to 45 new accounts within two hours
        rows.append((T0 + 24 * 16 * HOUR_US + k * 150_000_000, "m0", f"new{k}"))
    rows.sort()
    time, src, dst = (np.array(c) for c in zip(*rows, strict=True))
    result = midas_scores(time, src, dst, period_us=WEEK_US)
    last = result.window(T0 + 3 * WEEK_US)
    assert len(last) > 100
    alert = top_budget(last, 0.01)
    assert last.account[alert].tolist() == ["m0"]
