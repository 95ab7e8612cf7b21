"""Label-free checks of the alerts on a real message network (no planted truth there).

Two questions an analyst would ask of any detector on real data:

* **small-count alerts**: what share of the alerts falls on accounts with
  :data:`SMALL_EVENTS` or fewer events in the alert window (a detector that ranks noise
  first alerts mostly there);
* **visible bursts**: are the one-sided fan-out bursts from quiet accounts that anybody can
  see in the raw events alerted (in the window or the next)?

A *visible one-sided fan-out burst from a quiet account* is defined from the events alone,
independently of any detector: in one window after training the account sends at least
:data:`BURST_MESSAGES` messages to at least :data:`BURST_NEW` distinct accounts it never
exchanged a message with in any earlier window, at most :data:`BURST_ANSWERED` of those
new recipients write back to it in the same window, and in its earlier active windows
(at least one) it had a median of at most :data:`QUIET_EVENTS` events.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .activity import index_events

__all__ = [
    "BURST_ANSWERED",
    "BURST_MESSAGES",
    "BURST_NEW",
    "QUIET_EVENTS",
    "SMALL_EVENTS",
    "Burst",
    "small_count_share",
    "visible_bursts",
]

SMALL_EVENTS = 4
BURST_MESSAGES = 20
BURST_NEW = 15
BURST_ANSWERED = 1 / 3
QUIET_EVENTS = 5


@dataclass(frozen=True)
class Burst:
    """One visible burst: the account, its window (end, microseconds) and what it did."""

    account: str
    window_end_us: int
    messages: int
    new_recipients: int
    answered: int
    earlier_median_events: float


def small_count_share(
    alerts: Sequence[set[str]], nodes: Sequence[np.ndarray], events: Sequence[np.ndarray]
) -> tuple[int, int]:
    """(alerts on accounts with at most :data:`SMALL_EVENTS` events, all alerts)."""
    small = total = 0
    for alerted, ids, counts in zip(alerts, nodes, events, strict=True):
        if not alerted:
            continue
        lookup = dict(
            zip(np.asarray(ids).astype(str).tolist(), np.asarray(counts).tolist(), strict=True)
        )
        total += len(alerted)
        small += sum(1 for account in alerted if lookup.get(account, 0) <= SMALL_EVENTS)
    return small, total


def visible_bursts(time_us, actor, target, *, period_us: int, first_end_us: int) -> list[Burst]:
    """Every visible one-sided fan-out burst from a quiet account (module docstring) in the
    windows ending at or after ``first_end_us``."""
    ev = index_events(time_us, actor, target, period_us=period_us)
    n, w = max(ev.n_accounts, 1), ev.n_windows
    keep = ev.actor != ev.target
    sender, receiver, window = ev.actor[keep], ev.target[keep], ev.window[keep]
    pair = np.minimum(sender, receiver) * n + np.maximum(sender, receiver)
    first_seen = np.full(pair.size, w)
    pairs, inverse = np.unique(pair, return_inverse=True)
    first = np.full(pairs.size, w)
    np.minimum.at(first, inverse, window)
    first_seen = first[inverse]
    # distinct directed (window, sender, receiver) triples, and whether each was new then
    directed, index = np.unique((window * n + sender) * n + receiver, return_index=True)
    new = first_seen[index] == window[index]
    back = np.isin((window[index] * n + receiver[index]) * n + sender[index], directed)
    key = window[index] * n + sender[index]
    cells, where = np.unique(key, return_inverse=True)
    new_count = np.bincount(where, weights=new, minlength=cells.size)
    answered = np.bincount(where, weights=new & back, minlength=cells.size)
    messages = np.bincount(
        np.searchsorted(cells, window * n + sender), minlength=cells.size
    )  # every sender's key is in cells
    activity = _activity_table(ev, w, n)
    found = []
    for cell in np.flatnonzero((new_count >= BURST_NEW) & (messages >= BURST_MESSAGES)):
        win, account = divmod(int(cells[cell]), n)
        if ev.window_ends[win] < first_end_us or answered[cell] > BURST_ANSWERED * new_count[cell]:
            continue
        earlier = activity[:win, account]
        earlier = earlier[earlier > 0]
        if earlier.size == 0 or np.median(earlier) > QUIET_EVENTS:
            continue
        found.append(
            Burst(
                account=str(ev.accounts[account]),
                window_end_us=int(ev.window_ends[win]),
                messages=int(messages[cell]),
                new_recipients=int(new_count[cell]),
                answered=int(answered[cell]),
                earlier_median_events=float(np.median(earlier)),
            )
        )
    return found


def _activity_table(ev, windows: int, n: int) -> np.ndarray:
    """Events (sent + received) per window and account, dense."""
    table = np.zeros((windows, n))
    np.add.at(table, (ev.window, ev.actor), 1.0)
    np.add.at(table, (ev.window, ev.target), 1.0)
    return table
