"""Events indexed by window and account: the common input of the comparison baselines.

Windows tumble and are aligned to the Unix epoch exactly as the service aligns them: a
window is named by its end, ends are multiples of the period, and an event at ``time``
belongs to the window ending at ``(time // period + 1) * period`` (the rule of
:meth:`rolewatch.pipeline.windows.WindowGeometry.end_after`, restated here so that the
baselines need nothing from the pipeline). An account is *active* in a window when it is
the actor or the target of at least one event there.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

WEEK_US = 7 * 24 * 3600 * 1_000_000
HOUR_US = 3600 * 1_000_000


@dataclass(frozen=True)
class IndexedEvents:
    """Events with dense integer codes for their window and both accounts.

    ``window`` indexes ``window_ends`` (only windows holding at least one event, in time
    order); ``actor`` and ``target`` index ``accounts`` (sorted account ids).
    """

    accounts: np.ndarray  # str, sorted, unique
    window_ends: np.ndarray  # int64 microseconds, sorted, unique
    window: np.ndarray  # int64 per event
    actor: np.ndarray  # int64 per event
    target: np.ndarray  # int64 per event
    weight: np.ndarray  # float64 per event

    @property
    def n_accounts(self) -> int:
        return len(self.accounts)

    @property
    def n_windows(self) -> int:
        return len(self.window_ends)


def window_end(time_us, period_us: int) -> np.ndarray:
    """End (microseconds since the epoch) of the tumbling window holding each time."""
    if period_us <= 0:
        raise ValueError(f"period_us must be positive, got {period_us}")
    t = np.asarray(time_us, dtype=np.int64)
    return (t // period_us + 1) * period_us


def index_events(time_us, actor, target, weight=None, *, period_us: int) -> IndexedEvents:
    """Code the events' windows and accounts as integers (see :class:`IndexedEvents`).

    ``weight`` defaults to 1 per event. Raises ``ValueError`` when the columns differ in
    length, so a caller never scores a misaligned table.
    """
    t = np.asarray(time_us, dtype=np.int64).reshape(-1)
    a = np.asarray(actor).astype(str).reshape(-1)
    b = np.asarray(target).astype(str).reshape(-1)
    w = np.ones(t.size) if weight is None else np.asarray(weight, dtype=np.float64).reshape(-1)
    if not (t.size == a.size == b.size == w.size):
        raise ValueError(
            f"event columns differ in length: time {t.size}, actor {a.size}, "
            f"target {b.size}, weight {w.size}"
        )
    accounts, codes = np.unique(np.concatenate([a, b]), return_inverse=True)
    ends, window = np.unique(window_end(t, period_us), return_inverse=True)
    return IndexedEvents(
        accounts=accounts,
        window_ends=ends.astype(np.int64),
        window=window.astype(np.int64),
        actor=codes[: t.size].astype(np.int64),
        target=codes[t.size :].astype(np.int64),
        weight=w,
    )


@dataclass(frozen=True)
class ActiveAccounts:
    """Every ``(window, account)`` pair with activity, sorted by window then account."""

    window: np.ndarray  # int64 codes into IndexedEvents.window_ends
    account: np.ndarray  # int64 codes into IndexedEvents.accounts
    keys: np.ndarray  # window * n_accounts + account, sorted

    def __len__(self) -> int:
        return len(self.keys)

    def rows(self, window, account, n_accounts: int) -> np.ndarray:
        """Row of each active ``(window, account)`` pair asked for (all must be active)."""
        n = max(n_accounts, 1)
        return np.searchsorted(self.keys, np.asarray(window) * n + np.asarray(account))


def active_accounts(events: IndexedEvents) -> ActiveAccounts:
    """The accounts active in each window (actor or target of at least one event)."""
    n = max(events.n_accounts, 1)
    keys = np.unique(
        np.concatenate([events.window * n + events.actor, events.window * n + events.target])
    )
    return ActiveAccounts(window=keys // n, account=keys % n, keys=keys)
