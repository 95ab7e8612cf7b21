"""Words and numbers for the pages: formatting filters and the alert's one-line summary."""

from __future__ import annotations

import math
from typing import Any

from markupsafe import Markup

from rolewatch.identifiers import visible


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


def _slog(value: float) -> float:
    return math.copysign(math.log1p(abs(value)), value)


def _move_text(move: dict[str, Any]) -> str:
    """One feature move in words: ``name: before → after``."""
    return f"{feature_label(move['feature'])}: {number(move['before'])} → {number(move['after'])}"


def strongest_evidence(alert: dict[str, Any]) -> str:
    """The one readable piece of evidence that moved most.

    Candidates: new counterparts (counted from zero), events out, events in and counterparts
    (previous window → this one), and the moved features that are not recursive aggregates
    (those read poorly in one line; the account page lists them all). They are compared on
    the scale the feature moves are ranked by, ``|slog(after) - slog(before)|`` with
    ``slog(x) = sign(x) log(1 + |x|)``. With no candidate left, the top feature move is used.
    """
    evidence = alert.get("evidence") or {}
    activity = evidence.get("activity") or {}
    moves = evidence.get("feature_moves") or []
    candidates: list[tuple[float, str]] = []
    new = int(activity.get("new_counterparts") or 0)
    if new > 0:
        total = activity.get("counterparts")
        tail = f" (of {number(total)})" if total else ""
        candidates.append(
            (_slog(new), f"{number(new)} new counterpart{'' if new == 1 else 's'}{tail}")
        )
    for label, now_key, before_key in (
        ("events out", "events_out", "events_out_before"),
        ("events in", "events_in", "events_in_before"),
        ("counterparts", "counterparts", "counterparts_before"),
    ):
        after, before = activity.get(now_key), activity.get(before_key)
        if after is None or before is None or after == before:
            continue
        candidates.append(
            (
                abs(_slog(float(after)) - _slog(float(before))),
                f"{label}: {number(before)} → {number(after)}",
            )
        )
    for move in moves:
        if "(" in str(move.get("feature", "")):
            continue
        strength = abs(_slog(float(move["after"])) - _slog(float(move["before"])))
        candidates.append((strength, _move_text(move)))
    if candidates:
        # Ties keep the first candidate: new counterparts, then activity, then features.
        best = max(range(len(candidates)), key=lambda i: (candidates[i][0], -i))
        return candidates[best][1]
    if moves:
        return _move_text(moves[0])
    return "role mixture changed"


def shown_id(value: Any) -> Markup:
    """An account id as page markup: isolated from the text around it (``<bdi>``, so
    right-to-left characters cannot reorder its neighbours, HTML 5 section 4.5.24) and with
    any character a reader could miss written as ``<U+XXXX>`` (escaped for HTML)."""
    return Markup("<bdi>{}</bdi>").format(visible(str(value)))
