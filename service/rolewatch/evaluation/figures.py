"""Detection figures of one run's alerts against the scenario's planted truth.

How each figure is counted (docs/detection.md repeats it):

* **recall** of a change type: share of its planted accounts alerted in the change window
  or the one after (``window_index`` or ``window_index + 1``);
* **precision**: alerts on a planted structural account (for a funnel, the collector) in or
  after its change window, over all alerts outside training. Alerts on controls,
  newcomers, fresh accounts and planted accounts before their change are false leads;
* **alerts / active**: per window after training, alerts over active accounts; mean and
  worst window;
* **controls alerted**: volume controls and quiet accounts - share alerted in any window
  from their change on; season controls - share alerted in the season window; newcomers -
  share ever alerted; **season window**: alerts over active accounts in that window.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

import numpy as np

__all__ = ["CONTROLS", "STRUCTURAL", "figures", "summarise"]

STRUCTURAL = ("takeover", "contact_point", "funnel", "reversal", "bridge")
CONTROLS = ("volume_control", "season", "newcomer", "quiet")


def _recall(truth: list[dict], alerts: Sequence[set[str]], change: str) -> float:
    rows = [row for row in truth if row["change"] == change]
    if not rows:
        return float("nan")
    hits = 0
    for row in rows:
        start = int(row["window_index"])
        windows = [i for i in (start, start + 1) if i < len(alerts)]
        hits += any(row["account"] in alerts[i] for i in windows)
    return hits / len(rows)


def _control_share(truth: list[dict], alerts: Sequence[set[str]], change: str, season) -> float:
    rows = [row for row in truth if row["change"] == change]
    if not rows:
        return float("nan")
    flagged = 0
    for row in rows:
        start = int(row["window_index"])
        if change == "season":
            windows: Iterable[int] = [start] if start < len(alerts) else []
        elif change == "newcomer":
            windows = range(len(alerts))
        else:
            windows = range(start, len(alerts))
        flagged += any(row["account"] in alerts[i] for i in windows)
    return flagged / len(rows)


def figures(
    truth: list[dict],
    meta: dict,
    alerts: Sequence[set[str]],
    active: Sequence[int],
    training: Sequence[bool],
) -> dict[str, float]:
    """Every figure of one run (see the module docstring).

    Parameters
    ----------
    truth : list of dict
        ``{"account", "change", "window_index"}`` rows.
    meta : dict
        The scenario's meta (``season_window``).
    alerts : sequence of set of str
        Alerted accounts per window (index = window index).
    active : sequence of int
        Active accounts per window.
    training : sequence of bool
        Training windows (never alert; left out of shares and precision).
    """
    out: dict[str, float] = {}
    for change in STRUCTURAL:
        out[f"recall_{change}"] = _recall(truth, alerts, change)
    planted = {
        row["account"]: int(row["window_index"]) for row in truth if row["change"] in STRUCTURAL
    }
    measured = [i for i in range(len(alerts)) if not training[i]]
    total = sum(len(alerts[i]) for i in measured)
    true = sum(1 for i in measured for a in alerts[i] if a in planted and i >= planted[a])
    out["alerts"] = float(total)
    out["precision"] = true / total if total else float("nan")
    shares = [len(alerts[i]) / max(active[i], 1) for i in measured]
    out["alert_share_mean"] = float(np.mean(shares)) if shares else float("nan")
    out["alert_share_max"] = float(np.max(shares)) if shares else float("nan")
    season = meta.get("season_window")
    for change in CONTROLS:
        out[f"control_{change}"] = _control_share(truth, alerts, change, season)
    out["season_share"] = (
        len(alerts[season]) / max(active[season], 1)
        if season is not None and season < len(alerts)
        else float("nan")
    )
    return out


def summarise(rows: Iterable[dict[str, float]]) -> dict[str, dict[str, float | None]]:
    """Mean, standard deviation, min and max of every figure over runs (NaN left out)."""
    rows = list(rows)
    keys = list(rows[0]) if rows else []
    summary: dict[str, dict[str, float | None]] = {}
    for key in keys:
        values = np.array([row[key] for row in rows], dtype=np.float64)
        finite = values[np.isfinite(values)]
        if finite.size == 0:
            summary[key] = {"mean": None, "std": None, "min": None, "max": None}
        else:
            summary[key] = {
                "mean": float(finite.mean()),
                "std": float(finite.std()),
                "min": float(finite.min()),
                "max": float(finite.max()),
            }
    return summary
