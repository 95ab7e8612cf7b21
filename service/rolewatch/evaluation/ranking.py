"""Per-account, per-window baseline scores and the alert budget applied to them.

Every baseline returns an :class:`AccountScores` table with one row per account active in
a window. :func:`top_budget` then alerts, in each window, on the ``floor(budget * active)``
best-scored accounts (``active`` counts every active account, scored or not), the share of
active accounts the role-shift detector may alert on, so that all detectors are compared
at the same number of alerts per window.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class AccountScores:
    """One row per active ``(window, account)``, sorted by window end then account.

    ``score`` ranks accounts within a window (higher = more suspicious; NaN = not scored,
    for example an account without enough history); ``tiebreak`` orders equal scores
    (higher first). ``detail`` holds the baseline's own columns, aligned with the rows.
    """

    window_end_us: np.ndarray  # int64
    account: np.ndarray  # str
    score: np.ndarray  # float64
    tiebreak: np.ndarray  # float64
    detail: dict[str, np.ndarray] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.account)

    def window(self, end_us: int) -> AccountScores:
        """The rows of the window ending at ``end_us``."""
        keep = self.window_end_us == end_us
        return AccountScores(
            window_end_us=self.window_end_us[keep],
            account=self.account[keep],
            score=self.score[keep],
            tiebreak=self.tiebreak[keep],
            detail={name: column[keep] for name, column in self.detail.items()},
        )


def budget_quota(active: np.ndarray, budget: float) -> np.ndarray:
    """Alerts allowed per window: ``floor(budget * active)`` (a tiny epsilon absorbs
    floating-point error, e.g. 0.01 * 300 = 3 exactly)."""
    if not 0 < budget <= 1:
        raise ValueError(f"budget must be a share in (0, 1], got {budget}")
    return np.floor(budget * np.asarray(active, dtype=np.float64) + 1e-9).astype(np.int64)


def top_budget(
    scores: AccountScores,
    budget: float = 0.01,
    *,
    quotas: Mapping[int, int] | None = None,
) -> np.ndarray:
    """Boolean mask of the rows alerted: per window, the best-ranked scored accounts.

    Parameters
    ----------
    scores : AccountScores
    budget : float
        Share in (0, 1] of the window's active accounts that may alert.
    quotas : mapping of window end (us) to int, optional
        Exact number of alerts per window instead of the budget share (for example the
        number the role-shift detector raised); windows not named get none.

    Notes
    -----
    Rows are ranked by score (descending), then tiebreak (descending, NaN last), then
    account id, so the choice is deterministic. Rows with a NaN score never alert.
    """
    n = len(scores)
    if n == 0:
        return np.zeros(0, dtype=bool)
    ends, window = np.unique(scores.window_end_us, return_inverse=True)
    if quotas is None:
        quota = budget_quota(np.bincount(window, minlength=len(ends)), budget)
    else:
        quota = np.array([int(quotas.get(int(end), 0)) for end in ends], dtype=np.int64)
    score = np.asarray(scores.score, dtype=np.float64)
    scored = np.isfinite(score)
    tie = np.nan_to_num(np.asarray(scores.tiebreak, dtype=np.float64), nan=-np.inf)
    primary = np.where(scored, -score, np.inf)
    order = np.lexsort((scores.account, -tie, primary, window))
    sorted_window = window[order]
    starts = np.searchsorted(sorted_window, np.arange(len(ends)))
    rank = np.arange(n) - starts[sorted_window]
    alert = np.zeros(n, dtype=bool)
    alert[order] = (rank < quota[sorted_window]) & scored[order]
    return alert
