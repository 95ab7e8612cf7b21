"""The review figures: how many alerts were raised, reviewed, confirmed and dismissed (by
reason), how fast, and the precision of the reviewed ones; per window and per role move.

Definitions (README "Reviewing alerts" explains them to operators):

- ``raised``: alerts stored (suppressed accounts excluded);
- ``suppressed``: alerts a suppression held back (computed, never raised);
- ``reviewed``: raised alerts whose case holds a decision now: ``confirmed`` or
  ``dismissed`` (an alert takes its case's decision; a reopened case's alerts are undecided
  until it is decided again), ``dismissed_<reason>`` per reason;
- ``median_time_to_review_seconds``: median, over reviewed alerts, of the time from the
  alert being raised to the first decision on its case after that (alerts that joined an
  already decided case have no such time and are left out);
- ``precision``: ``confirmed / reviewed`` (None when nothing was reviewed).

Tables are natural here, so the counting is done with pandas.
"""

from __future__ import annotations

import io
import math
from typing import Any

import pandas as pd
from sqlalchemy.engine import Engine

from rolewatch.clock import to_rfc3339
from rolewatch.review.states import DISMISS_REASONS
from rolewatch.store import review_stats

COUNTS = ["raised", "suppressed", "reviewed", "confirmed", "dismissed"] + [
    f"dismissed_{reason}" for reason in DISMISS_REASONS
]
FIGURES = COUNTS + ["median_time_to_review_seconds", "precision"]
NO_BASELINE = "no baseline"
_WINDOW_KEYS = ["window_id", "window_start_us", "window_end_us"]
_MOVE_KEYS = ["role_before_name", "role_after_name"]
_ALERT_COLUMNS = [
    "alert_id",
    "window_id",
    "window_start_us",
    "window_end_us",
    "created_us",
    "role_before",
    "role_after",
    "before_name",
    "after_name",
    "decision",
    "reason",
    "first_decided_us",
]
_HELD_COLUMNS = [
    "window_id",
    "window_start_us",
    "window_end_us",
    "role_before",
    "role_after",
    "before_name",
    "after_name",
]


def _role_labels(frame: pd.DataFrame) -> pd.DataFrame:
    """Name each role move: the role's current name, ``role N`` without one, and
    ``no baseline`` for an account first seen in the window."""

    def label(role_id: Any, name: Any) -> str:
        if isinstance(name, str):
            return name
        if role_id is None or (isinstance(role_id, float) and math.isnan(role_id)):
            return NO_BASELINE
        return f"role {int(role_id)}"

    frame["role_before_name"] = [
        label(i, n) for i, n in zip(frame["role_before"], frame["before_name"], strict=True)
    ]
    frame["role_after_name"] = [
        label(i, n) for i, n in zip(frame["role_after"], frame["after_name"], strict=True)
    ]
    return frame


def _marked(alert_rows: list[dict[str, Any]], held_rows: list[dict[str, Any]]) -> pd.DataFrame:
    """One row per alert (raised or held back) with 0/1 columns for every count."""
    raised = pd.DataFrame(alert_rows, columns=_ALERT_COLUMNS)
    decision = raised["decision"].astype(object)
    raised["raised"] = 1
    raised["suppressed"] = 0
    raised["reviewed"] = decision.notna().astype(int)
    raised["confirmed"] = (decision == "confirmed").astype(int)
    raised["dismissed"] = (decision == "dismissed").astype(int)
    for reason in DISMISS_REASONS:
        raised[f"dismissed_{reason}"] = (
            (decision == "dismissed") & (raised["reason"] == reason)
        ).astype(int)
    first = pd.to_numeric(raised["first_decided_us"], errors="coerce")
    created = pd.to_numeric(raised["created_us"], errors="coerce")
    seconds = (first - created) / 1_000_000
    raised["review_seconds"] = seconds.where(raised["reviewed"] == 1)
    held = pd.DataFrame(held_rows, columns=_HELD_COLUMNS)
    for column in COUNTS:
        held[column] = 1 if column == "suppressed" else 0
    held["review_seconds"] = float("nan")
    parts = [part for part in (raised, held) if not part.empty]
    if not parts:
        return _role_labels(raised)
    return _role_labels(pd.concat(parts, ignore_index=True))


def _aggregate(frame: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
    """The counts, the median time to review and the precision per group of ``keys``."""
    sums = frame.groupby(keys, sort=True)[COUNTS].sum()
    medians = frame.groupby(keys, sort=True)["review_seconds"].median()
    table = sums.join(medians.rename("median_time_to_review_seconds"))
    reviewed = table["reviewed"].astype(float)
    table["precision"] = (table["confirmed"] / reviewed).where(reviewed > 0)
    return table.reset_index()


def _number(value: Any) -> float | None:
    """A numpy scalar as a plain float, NaN as None (JSON has no NaN)."""
    if value is None:
        return None
    number = float(value)
    return None if math.isnan(number) else number


def _figures(row: Any) -> dict[str, Any]:
    figures: dict[str, Any] = {name: int(row[name]) for name in COUNTS}
    figures["median_time_to_review_seconds"] = _number(row["median_time_to_review_seconds"])
    figures["precision"] = _number(row["precision"])
    return figures


def review_figures(
    engine: Engine, *, from_us: int | None = None, to_us: int | None = None
) -> dict[str, Any]:
    """The figures over the windows ending in ``[from_us, to_us)``: totals, per window
    (oldest first; windows that raised or held back an alert) and per role move (most
    alerts first)."""
    with engine.connect() as connection:
        alert_rows = review_stats.alert_outcomes(connection, from_us=from_us, to_us=to_us)
        held_rows = review_stats.held_back(connection, from_us=from_us, to_us=to_us)
    frame = _marked(alert_rows, held_rows)
    frame["all"] = "all"
    totals_table = _aggregate(frame, ["all"]) if not frame.empty else None
    totals = (
        _figures(totals_table.iloc[0])
        if totals_table is not None
        else {
            **{name: 0 for name in COUNTS},
            "median_time_to_review_seconds": None,
            "precision": None,
        }
    )
    windows = []
    moves = []
    if not frame.empty:
        for _, row in _aggregate(frame, _WINDOW_KEYS).iterrows():
            windows.append(
                {
                    "window_id": int(row["window_id"]),
                    "window_start": to_rfc3339(int(row["window_start_us"])),
                    "window_end": to_rfc3339(int(row["window_end_us"])),
                    **_figures(row),
                }
            )
        by_move = _aggregate(frame, _MOVE_KEYS)
        by_move = by_move.sort_values(
            ["raised", "role_before_name", "role_after_name"], ascending=[False, True, True]
        )
        for _, row in by_move.iterrows():
            moves.append(
                {
                    "role_before": row["role_before_name"],
                    "role_after": row["role_after_name"],
                    **_figures(row),
                }
            )
    return {
        "from": to_rfc3339(from_us) if from_us is not None else None,
        "to": to_rfc3339(to_us) if to_us is not None else None,
        "reasons": dict(DISMISS_REASONS),
        "totals": totals,
        "windows": windows,
        "transitions": moves,
    }


def figures_csv(figures: dict[str, Any], by: str) -> str:
    """The per-window (``by="window"``) or per-role-move (``by="transition"``) table as CSV,
    one row per group, one column per figure."""
    if by == "window":
        columns = ["window_id", "window_start", "window_end"] + FIGURES
        rows = figures["windows"]
    elif by == "transition":
        columns = ["role_before", "role_after"] + FIGURES
        rows = figures["transitions"]
    else:
        raise ValueError(f"by must be window or transition, not {by!r}")
    table = pd.DataFrame(rows, columns=columns)
    buffer = io.StringIO()
    table.to_csv(buffer, index=False, lineterminator="\n")
    return buffer.getvalue()
