"""Words and numbers for the pages: formatting filters and the alert's one-line summary."""

from __future__ import annotations

import math
from typing import Any


def number(value: Any) -> str:
    """A feature or count value: whole numbers without decimals, others with two."""
    if value is None:
        return "–"
    value = float(value)
    if not math.isfinite(value):
        return "–"
    if value == int(value) and abs(value) < 1e15:
        return f"{int(value):,}"
    if abs(value) >= 100:
        return f"{value:,.0f}"
    return f"{value:,.2f}"


def percent(value: Any) -> str:
    if value is None:
        return "–"
    return f"{float(value):.0%}"


def score(value: Any) -> str:
    if value is None:
        return "–"
    return f"{float(value):.2f}"


def feature_label(name: str) -> str:
    """ReFeX feature names use underscores; show them with spaces so they wrap."""
    return str(name).replace("_", " ")


def strongest_evidence(alert: dict[str, Any]) -> str:
    """The one piece of evidence that moved most: new counterparts or the top feature move.

    Both are compared on the same log scale the feature moves are ranked by
    (``|log1p(after) - log1p(before)|``), new counterparts counting from zero.
    """
    evidence = alert.get("evidence") or {}
    activity = evidence.get("activity") or {}
    moves = evidence.get("feature_moves") or []
    new = int(activity.get("new_counterparts") or 0)
    new_strength = math.log1p(new) if new > 0 else 0.0
    move = moves[0] if moves else None
    move_strength = 0.0
    if move is not None:
        move_strength = abs(
            float(move.get("log_ratio"))
            if move.get("log_ratio") is not None
            else math.log1p(abs(float(move["after"]))) - math.log1p(abs(float(move["before"])))
        )
    if new > 0 and new_strength >= move_strength:
        total = activity.get("counterparts")
        plural = "" if new == 1 else "s"
        tail = f" (of {total})" if total else ""
        return f"{new} new counterpart{plural}{tail}"
    if move is not None:
        return (
            f"{feature_label(move['feature'])}: {number(move['before'])} → {number(move['after'])}"
        )
    return "role mixture changed"
