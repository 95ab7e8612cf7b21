"""Baseline 1: robust z-score of each account's weighted degree against its own history.

The rule is the volume baseline of ``rolewatch evaluate`` (``volume_alerts`` in
:mod:`rolewatch.scenario.evaluate`), re-implemented here on a plain event table so that
every baseline shares one input and one output: an account's *strength* in a window is
the total weight of the events it sends or receives; its score is the absolute robust
z-score of that strength against the account's previous active windows (every earlier
window in which it had an event). Both a sudden rise and a sudden drop rank high, as in
the original rule.
"""

from __future__ import annotations

import numpy as np

from .activity import active_accounts, index_events
from .ranking import AccountScores

MAD_SCALE = 1.4826  # normal-consistency constant of the MAD (common practice; 1 / 0.6745)


def robust_zscore(
    history: np.ndarray, current: np.ndarray, *, min_history: int = 2, min_scale: float = 1.0
) -> np.ndarray:
    """``(x - median(h)) / max(1.4826 * MAD(h), min_scale)`` per column.

    Parameters
    ----------
    history : ndarray, shape (t, n)
        Past values, oldest first; NaN where the account was inactive.
    current : ndarray, shape (n,)
    min_history : int
        Accounts with fewer finite past values get NaN (not scored).
    min_scale : float
        Floor on the scale, so an account with identical past values does not get an
        infinite score for a small move.

    Notes
    -----
    The median absolute deviation times 1.4826 estimates the standard deviation of normal
    data (Rousseeuw & Croux, JASA 1993, as recalled; scipy's
    ``median_abs_deviation(scale="normal")`` is the same estimator).
    """
    H = np.asarray(history, dtype=np.float64)
    x = np.asarray(current, dtype=np.float64).reshape(-1)
    if H.ndim != 2 or H.shape[1] != x.size:
        raise ValueError(f"history must be t x n with n={x.size}, got shape {H.shape}")
    z = np.full(x.size, np.nan)
    ok = np.isfinite(H).sum(axis=0) >= min_history
    if not ok.any():
        return z
    h = H[:, ok]
    median = np.nanmedian(h, axis=0)
    mad = np.nanmedian(np.abs(h - median), axis=0)
    z[ok] = (x[ok] - median) / np.maximum(MAD_SCALE * mad, min_scale)
    return z


def volume_scores(
    time_us,
    actor,
    target,
    weight=None,
    *,
    period_us: int,
    min_history: int = 2,
    min_scale: float = 1.0,
) -> AccountScores:
    """Score every active account of every window by ``|z|`` of its strength.

    Returns an :class:`AccountScores` with ``score = |z|``, ``tiebreak = z`` (a rise before
    an equal drop) and details ``strength``, ``z`` and ``history`` (the number of
    previous active windows). Memory is one float per window and account (a dense
    window x account table).
    """
    ev = index_events(time_us, actor, target, weight, period_us=period_us)
    active = active_accounts(ev)
    strength = np.zeros(len(active))
    for ends in (ev.actor, ev.target):
        rows = active.rows(ev.window, ends, ev.n_accounts)
        strength += np.bincount(rows, weights=ev.weight, minlength=len(active))
    table = np.full((ev.n_windows, ev.n_accounts), np.nan)
    table[active.window, active.account] = strength
    z = np.full(len(active), np.nan)
    history = np.zeros(len(active), dtype=np.int64)
    bounds = np.searchsorted(active.window, np.arange(ev.n_windows + 1))
    for t in range(1, ev.n_windows):
        rows = np.arange(bounds[t], bounds[t + 1])
        cols = active.account[rows]
        past = table[:t, cols]
        history[rows] = np.isfinite(past).sum(axis=0)
        z[rows] = robust_zscore(past, strength[rows], min_history=min_history, min_scale=min_scale)
    return AccountScores(
        window_end_us=ev.window_ends[active.window],
        account=ev.accounts[active.account],
        score=np.abs(z),
        tiebreak=z,
        detail={"strength": strength, "z": z, "history": history},
    )
