"""An alert's one-line headline: which roles, and the readable measure that moved most.

A reviewer first needs to know *what changed*. When the dominant role is the same before
and after, the headline says what moved instead of repeating the role ("same role (quiet
sender): 37 new counterparts, sends 48× more"); when it changed, it names both roles and
the one readable measure (:mod:`rolewatch.engine.readable`) that moved most.

Moves are ranked on one scale: a count measure by ``|log2((after + 1) / (before + 1))|``,
a share by ``4 |after - before|``, so a 25-point swing in a share weighs like a doubling of
a count (a scale of our own; common practice, no source). New counterparts (never dealt
with before, over the whole known history) count as a move from the baseline's number.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

from .readable import MEASURES, SHARE_MEASURES

__all__ = ["LEADS", "Move", "change_text", "compose_headline", "measure_moves", "move_text"]

#: Weight of a share's change against the log2 ratio of a count.
SHARE_SCALE = 4.0
#: Moves weaker than this are not worth a headline (a count moving by less than ~20 %).
WEAKEST = 0.25


#: The readable measure that says what each score component measured
#: (:mod:`rolewatch.engine.components`). The bridging component (ties into communities the
#: account rarely deals with) has none: brokerage counts contacts who do not know each
#: other, which is not the same thing.
LEADS = {
    "novelty_out": "new_counterparts",
    "novelty_in": "new_counterparts",
    "ties": "new_counterparts",
    "direction": "sent_share",
}


@dataclass(frozen=True)
class Move:
    """One readable measure before and after, with the strength it is ranked by."""

    measure: str
    before: float
    after: float
    strength: float


def _strength(measure: str, before: float, after: float) -> float:
    if measure in SHARE_MEASURES:
        return SHARE_SCALE * abs(after - before)
    return abs(math.log2((max(after, 0.0) + 1.0) / (max(before, 0.0) + 1.0)))


def measure_moves(
    before: Mapping[str, float | None],
    after: Mapping[str, float | None],
    *,
    new_counterparts: int | None = None,
    new_counterparts_before: int | None = None,
    lead: str | None = None,
) -> list[Move]:
    """The readable measures that moved, strongest first.

    Parameters
    ----------
    before, after : mapping of measure name to value
        Missing, None or NaN values are skipped (e.g. a baseline window whose events were
        purged).
    new_counterparts, new_counterparts_before : int, optional
        New counterparts in this window and in the baseline window; ranked as the
        pseudo-measure ``new_counterparts``.
    lead : str, optional
        The measure behind the score's strongest component (:data:`LEADS`); its move comes
        first, however weak, so the headline says what raised the alert.

    Returns
    -------
    list of Move
        The ``lead`` move, then moves of at least :data:`WEAKEST`, strongest first (ties in
        :data:`MEASURES` order);
        ``new_share`` is left out when the count of new counterparts is given.
    """
    moves = []
    for measure in MEASURES:
        if measure == "new_share" and new_counterparts:
            continue  # said by the count of new counterparts
        b, a = before.get(measure), after.get(measure)
        if b is None or a is None or not (math.isfinite(b) and math.isfinite(a)):
            continue
        moves.append(Move(measure, float(b), float(a), _strength(measure, float(b), float(a))))
    if new_counterparts:
        b = float(new_counterparts_before or 0)
        a = float(new_counterparts)
        moves.append(Move("new_counterparts", b, a, _strength("new_counterparts", b, a)))
    first = [m for m in moves if m.measure == lead and (m.after != m.before)]
    rest = sorted(
        (m for m in moves if m.strength >= WEAKEST and m.measure != lead),
        key=lambda m: -m.strength,
    )
    return first + rest


def _count(value: float) -> str:
    return f"{value:,.0f}"


def _times(after: float, before: float) -> str:
    ratio = after / before if after >= before else before / after
    text = f"{ratio:.0f}" if ratio >= 10 else f"{ratio:.1f}".rstrip("0").rstrip(".")
    return f"{text}×"


def _flow(verb: str, noun: str, b: float, a: float) -> str:
    if b <= 0:
        return f"{verb} {_count(a)} {noun}, none before"
    if a <= 0:
        return f"{verb} no {noun} ({_count(b)} before)"
    return f"{verb} {_times(a, b)} {'more' if a > b else 'less'}"


_SHARE_WORDS = {
    "sent_share": "share sent",
    "reciprocity": "two-way ties",
    "clustering": "contacts who deal with each other",
    "new_share": "share of new counterparts",
}


def move_text(move: Move) -> str:
    """One move in words, e.g. "sends 48× more" or "sends to 2 → 37 accounts"."""
    b, a = move.before, move.after
    if move.measure in ("events_out", "events_in"):
        noun = "event" if max(a, b) == 1 else "events"
        return _flow("sends" if move.measure == "events_out" else "receives", noun, b, a)
    if move.measure == "out_degree":
        return f"sends to {_count(b)} → {_count(a)} accounts"
    if move.measure == "in_degree":
        return f"hears from {_count(b)} → {_count(a)} accounts"
    if move.measure == "brokerage":
        return f"contacts who do not know each other {b:,.1f} → {a:,.1f}"
    if move.measure == "new_counterparts":
        return f"{_count(a)} new counterpart{'' if a == 1 else 's'}"

    return f"{_SHARE_WORDS[move.measure]} {b:.0%} → {a:.0%}"


# a second move that says the same as the first ("sends no events", "sends to 4 → 0 accounts")
_TWINS = {
    "events_out": "out_degree",
    "out_degree": "events_out",
    "events_in": "in_degree",
    "in_degree": "events_in",
}


def change_text(moves: list[Move], *, same_role: bool) -> str:
    """What moved, for the headline: the two strongest moves when the role stayed (not both
    of events and accounts in one direction), the strongest one when it changed; "role
    mixture shifted" when no readable measure moved."""
    picked: list[Move] = []
    for move in moves:
        if len(picked) == (2 if same_role else 1):
            break
        if not any(_TWINS.get(move.measure) == earlier.measure for earlier in picked):
            picked.append(move)
    if not picked:
        return "role mixture shifted"
    return ", ".join(move_text(move) for move in picked)


def compose_headline(
    before_name: str | None, after_name: str, *, same_role: bool, change: str, baseline: bool
) -> str:
    """The headline from the role names (as they read now) and the change text.

    Never "X → X": the same dominant role reads "same role (X): <change>".

    Parameters
    ----------
    before_name : str or None
        The baseline window's dominant role; None when there was no baseline window
        (``baseline`` False) or too little activity there to fit a role.
    after_name : str
    same_role : bool
        The dominant role id is the same before and after (names can clash after renames).
    change : str
        :func:`change_text` as stored with the alert.
    baseline : bool
        The account had a baseline window.
    """
    if same_role and before_name is not None:
        return f"same role ({after_name}): {change}"
    if before_name is None:
        start = "too little activity before" if baseline else "no earlier window"
        return f"{start} → {after_name}: {change}"
    if before_name == after_name:
        return f"{before_name} (another role of that name) → {after_name}: {change}"
    return f"{before_name} → {after_name}: {change}"
