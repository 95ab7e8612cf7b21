"""The default ("evidence") shift score on a synthetic population with planted changes.

Invented data (common practice for property tests, no source): ordinary accounts draw
their tie counts from Poisson laws around their own rates; a few accounts change.
"""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.engine.components import COMPONENTS
from rolewatch.engine.scoring import STATUSES, ShiftPolicy, TieEvidence, score_window

N, K = 3000, 4


def _population(seed: int = 0):
    rng = np.random.default_rng(seed)
    rate = rng.gamma(1.5, 4.0, N)  # usual counterparts a window, heavy-tailed
    new_share = rng.beta(2, 5, N)
    out_share = rng.beta(3, 3, N)

    def cells(scale=1.0):
        known = rng.poisson(rate * (1 - new_share) * scale)
        new = rng.poisson(rate * new_share * scale)
        out_k = rng.binomial(known, out_share)
        out_n = rng.binomial(new, out_share)
        return np.column_stack([out_k, out_n, known - out_k, new - out_n]).astype(float)

    now, before = cells(), cells()
    history_new = np.column_stack(
        [
            rng.poisson(rate * new_share * out_share * 4),
            rng.poisson(rate * new_share * (1 - out_share) * 4),
        ]
    ).astype(float)
    mixture = rng.dirichlet(np.ones(K) * 2, N)
    return rng, now, before, history_new, mixture


def _evidence(now, before, history_new, events_now=None, events_before=None):
    events_now = now.reshape(N, 2, 2).sum(axis=2) * 1.5 if events_now is None else events_now
    events_before = (
        before.reshape(N, 2, 2).sum(axis=2) * 1.5 if events_before is None else events_before
    )
    return (
        TieEvidence(
            cells=now,
            baseline_cells=before,
            events=events_now,
            baseline_events=events_before,
            history_new=history_new,
            history_windows=np.full(N, 4.0),
        ),
        events_now.sum(axis=1),
        events_before.sum(axis=1),
    )


def test_fan_out_contact_point_and_reversal_alert_but_volume_and_small_moves_do_not():
    rng, now, before, history_new, mixture = _population()
    fan, contact, reversal, volume, small = 10, 11, 12, 13, 14
    before[fan] = [2, 1, 2, 1]
    history_new[fan] = [4, 4]
    now[fan] = [2, 70, 1, 4]  # seventy strangers, few answers
    before[contact] = [1, 1, 2, 1]
    history_new[contact] = [4, 4]
    now[contact] = [1, 2, 2, 55]
    before[volume] = [3, 0, 3, 0]
    now[volume] = [3, 0, 3, 0]  # the same counterparts, three times the events
    ev_now = now.reshape(N, 2, 2).sum(axis=2) * 1.5
    ev_before = before.reshape(N, 2, 2).sum(axis=2) * 1.5
    ev_before[volume] = [10, 10]
    ev_now[volume] = [30, 30]
    ev_before[reversal] = [4, 40]
    ev_now[reversal] = [38, 5]  # the main direction flips, the volume stays
    ev_before[small], ev_now[small] = [1, 1], [1, 1]
    ties, a, b = _evidence(now, before, history_new, ev_now, ev_before)
    current = mixture.copy()
    current[small] = np.eye(K)[np.argmin(mixture[small])]  # a two-event account switches role
    out = score_window(current, mixture, a, b, np.zeros(N), np.eye(K), ShiftPolicy(), ties=ties)
    assert out.alert[[fan, contact, reversal]].all()
    assert not out.alert[[volume, small]].any()
    assert out.strongest[fan] == "novelty_out" and out.strongest[contact] == "novelty_in"
    assert out.strongest[reversal] == "direction"
    assert np.isfinite(out.score[out.status == "scored"]).all()
    assert out.alert.sum() <= int(0.01 * N)
    assert out.score[fan] > 8 and out.score[small] < 3


def test_statuses_too_little_and_new_are_not_scored():
    rng, now, before, history_new, mixture = _population(1)
    before[[0, 1]] = np.nan
    ties, a, b = _evidence(now, before, history_new)
    b = np.where(np.isfinite(b), b, np.nan)
    ties = TieEvidence(
        cells=ties.cells,
        baseline_cells=ties.baseline_cells,
        events=ties.events,
        baseline_events=np.where(np.isfinite(before[:, :2]), ties.baseline_events, np.nan),
        history_new=ties.history_new,
        history_windows=ties.history_windows,
    )
    structured = np.ones(N, dtype=bool)
    structured[[1, 2]] = False
    out = score_window(
        mixture,
        mixture,
        a,
        b,
        np.zeros(N),
        np.eye(K),
        ShiftPolicy(),
        ties=ties,
        structured=structured,
    )
    assert (
        out.status[0] == "new" and out.status[1] == "too_little" and out.status[2] == "too_little"
    )
    assert np.isnan(out.score[[0, 1, 2]]).all() and not out.alert[[0, 1, 2]].any()
    # the label arrays refer to a handful of shared strings (8 bytes an account), not one
    # fixed-width text cell or one string object per account
    for labels, allowed in ((out.status, STATUSES), (out.strongest, (*COMPONENTS, ""))):
        assert labels.dtype == object and set(labels.tolist()) <= set(allowed)
        assert len({id(label) for label in labels}) <= len(allowed)


def test_scores_do_not_saturate_when_a_stratum_sits_still():
    # Everybody's mixture is unchanged except one quiet account's small move: the old
    # stratified z-score divided it by a floored spread (0.76 / 0.02 = 38); here the move
    # is weighed by the account's events and stays small.
    rng, now, before, history_new, mixture = _population(2)
    ties, a, b = _evidence(now, before, history_new)
    current = mixture.copy()
    current[7] = 0.8 * mixture[7] + 0.2 * np.eye(K)[0]
    a[7], b[7] = 3, 3
    out = score_window(current, mixture, a, b, np.zeros(N), np.eye(K), ShiftPolicy(), ties=ties)
    assert out.components["role"][7] < 3
    stratified = score_window(
        current, mixture, a, b, np.zeros(N), np.eye(K), ShiftPolicy(calibration="stratified")
    )
    assert stratified.score[7] > 5  # what the old rule made of it: its spread was floored


def test_policy_rejects_unknown_components():
    with pytest.raises(ValueError, match="components"):
        ShiftPolicy(components=("novelty_out", "gossip"))
    with pytest.raises(ValueError, match="novelty_windows"):
        ShiftPolicy(novelty_windows=0)
