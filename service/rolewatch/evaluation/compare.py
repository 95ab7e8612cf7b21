"""The three comparison baselines on a run's windows, at the same alert budget.

Each baseline (:mod:`rolewatch.evaluation.volume`, :mod:`.counterparts`, :mod:`.midas`)
scores every active account of every window from the raw events; :func:`baseline_alerts`
turns the scores into alerts per window in two ways:

* ``budget``: the best-scored ``floor(budget * active)`` accounts of every window after
  training - the whole budget the service may use;
* ``matched``: exactly as many alerts per window as the service raised - the fairest
  comparison of what the same analyst time buys.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .counterparts import new_counterpart_scores
from .midas import midas_scores
from .ranking import AccountScores, top_budget
from .volume import volume_scores

__all__ = ["BASELINES", "baseline_alerts", "baseline_scores"]

BASELINES = ("volume", "new_counterparts", "midas_r")


def baseline_scores(time_us, actor, target, weight, *, period_us: int) -> dict[str, AccountScores]:
    """Every baseline's per-account, per-window scores of one event table."""
    return {
        "volume": volume_scores(time_us, actor, target, weight, period_us=period_us),
        "new_counterparts": new_counterpart_scores(time_us, actor, target, period_us=period_us),
        "midas_r": midas_scores(time_us, actor, target, period_us=period_us),
    }


def baseline_alerts(
    scores: AccountScores,
    window_ends: Sequence[int],
    training: Sequence[bool],
    *,
    budget: float,
    quotas: Sequence[int] | None = None,
) -> list[set[str]]:
    """Alerted accounts per window (in ``window_ends`` order; none in training windows).

    ``quotas`` (one per window) replaces the budget share by an exact number of alerts.
    """
    allowed = {int(end) for end, train in zip(window_ends, training, strict=True) if not train}
    keep = np.isin(scores.window_end_us, list(allowed))
    kept = AccountScores(
        window_end_us=scores.window_end_us[keep],
        account=scores.account[keep],
        score=scores.score[keep],
        tiebreak=scores.tiebreak[keep],
    )
    exact = None
    if quotas is not None:
        exact = {int(end): int(q) for end, q in zip(window_ends, quotas, strict=True)}
    mask = top_budget(kept, budget, quotas=exact)
    out: dict[int, set[str]] = {}
    for end, account in zip(kept.window_end_us[mask], kept.account[mask], strict=True):
        out.setdefault(int(end), set()).add(str(account))
    return [out.get(int(end), set()) for end in window_ends]
