"""Baseline 2: how many counterparts an account meets for the first time in a window.

A *counterpart* of an account in a window is any other account it sent an event to or
received one from. A counterpart is *new* when the two never exchanged an event, in
either direction, in any earlier window of the table (the account's known history). The
score is the number of new counterparts; their share of all the window's counterparts
breaks ties (40 new out of 40 ranks above 40 new out of 400). This is the simplest rule
for the fan-out of a taken-over account, a mule's collection from strangers, or a new
contact point: it looks at novelty only, not at volume or structure.
"""

from __future__ import annotations

import numpy as np

from .activity import active_accounts, index_events
from .ranking import AccountScores


def new_counterpart_scores(
    time_us, actor, target, *, period_us: int, min_history: int = 1
) -> AccountScores:
    """Score every active account of every window by its number of new counterparts.

    Parameters
    ----------
    time_us, actor, target : array-like
        The events (UTC microseconds, account ids).
    period_us : int
        Window length (tumbling windows aligned to the epoch).
    min_history : int
        Accounts active in fewer earlier windows are not scored (NaN): with no history
        every counterpart of a newcomer is new, which says nothing about a change.

    Returns
    -------
    AccountScores
        ``score`` = new counterparts, ``tiebreak`` = their share; details
        ``counterparts``, ``new`` and ``history`` (earlier active windows).

    Notes
    -----
    Self-events (actor == target) are no counterpart. Vectorised: the first window of
    every unordered pair is found with one ``np.minimum.at`` over the pairs' codes.
    """
    ev = index_events(time_us, actor, target, period_us=period_us)
    active = active_accounts(ev)
    n = max(ev.n_accounts, 1)
    keep = ev.actor != ev.target
    own = np.concatenate([ev.actor[keep], ev.target[keep]])
    other = np.concatenate([ev.target[keep], ev.actor[keep]])
    win = np.concatenate([ev.window[keep], ev.window[keep]])
    # distinct (account, counterpart, window) triples
    triples = np.unique((own * n + other) * ev.n_windows + win)
    pair, win = np.divmod(triples, ev.n_windows)
    pairs, pair_code = np.unique(pair, return_inverse=True)
    first = np.full(len(pairs), ev.n_windows, dtype=np.int64)
    np.minimum.at(first, pair_code, win)
    new = (win == first[pair_code]).astype(np.float64)
    rows = active.rows(win, pair // n, ev.n_accounts)
    counterparts = np.bincount(rows, minlength=len(active)).astype(np.float64)
    new_count = np.bincount(rows, weights=new, minlength=len(active))
    history = _earlier_active_windows(active.account, ev.n_accounts)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(counterparts > 0, new_count / counterparts, 0.0)
    scored = history >= min_history
    return AccountScores(
        window_end_us=ev.window_ends[active.window],
        account=ev.accounts[active.account],
        score=np.where(scored, new_count, np.nan),
        tiebreak=np.where(scored, share, np.nan),
        detail={"counterparts": counterparts, "new": new_count, "history": history},
    )


def _earlier_active_windows(account: np.ndarray, n_accounts: int) -> np.ndarray:
    """For rows sorted by window, how many earlier rows share each row's account."""
    order = np.argsort(account, kind="stable")  # keeps window order within an account
    sorted_account = account[order]
    starts = np.searchsorted(sorted_account, np.arange(n_accounts))
    out = np.empty(len(account), dtype=np.int64)
    out[order] = np.arange(len(account)) - starts[sorted_account]
    return out
