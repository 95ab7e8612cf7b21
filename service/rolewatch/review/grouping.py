"""One case per account: where a new alert goes.

A new alert joins its account's latest case when that case's newest alert lies at most
``case_group_windows`` window periods earlier; otherwise it opens a new case. Joining a
dismissed case reopens it only when the new score is clearly higher: at least
``case_reopen_ratio`` times the highest score the case had when it was dismissed. A weaker
alert joins the dismissed case quietly (it appears on the case's timeline, the case stays
dismissed). A confirmed case takes the alert and stays confirmed. Pure rules.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum

from rolewatch.review.states import DISMISSED


class Placement(Enum):
    NEW_CASE = "new_case"
    JOIN = "join"
    REOPEN = "reopen"


@dataclass(frozen=True)
class LatestCase:
    """What placing an alert needs to know about the account's latest case."""

    id: int
    state: str
    last_window_end_us: int
    dismissed_score: float | None


@dataclass(frozen=True)
class GroupingRule:
    """The two settings of grouping, with the window period in microseconds."""

    group_windows: int
    period_us: int
    reopen_ratio: float

    @property
    def span_us(self) -> int:
        return self.group_windows * self.period_us


def clearly_higher(score: float, dismissed_score: float | None, ratio: float) -> bool:
    """True when ``score`` is at least ``ratio`` times the score the case was dismissed at
    (and above it, which matters only for scores at or below zero)."""
    if dismissed_score is None:
        return True
    return score >= ratio * dismissed_score and score > dismissed_score


def place_alert(
    latest: LatestCase | None, window_end_us: int, score: float, rule: GroupingRule
) -> Placement:
    """Where an alert of ``score`` in the window ending at ``window_end_us`` goes."""
    if latest is None or window_end_us - latest.last_window_end_us > rule.span_us:
        return Placement.NEW_CASE
    if latest.state == DISMISSED and clearly_higher(
        score, latest.dismissed_score, rule.reopen_ratio
    ):
        return Placement.REOPEN
    return Placement.JOIN
