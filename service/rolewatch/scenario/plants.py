"""Building blocks of planted changes: the change names, the kinds and amounts planted
events use, what a world must provide, one planted account and its training profile."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from .common import (
    EventLog,
    Members,
    Rhythm,
)

STRUCTURAL = ("takeover", "contact_point", "funnel", "reversal", "bridge")
CONTROLS = ("volume_control", "season", "newcomer", "quiet")
CHANGES = STRUCTURAL + CONTROLS

SEASON_RANGE = (1.3, 1.8)  # everybody's activity factor in the season window
ANSWER_SHARE = 0.08  # share of new counterparts that answer a fan-out or contact point
FLIP_SHARE = 0.85  # share of a reversed account's main-direction events that flip
REVERSAL_KEEP = 0.6  # a reversed account keeps at least this share of its usual events
FADE_KEEP = 0.1  # share of its events a fading quiet account keeps
AWAY_SHARE = 0.12  # share of away-prone members who take one ordinary break of 1-3 weeks
TAKEOVER_NEW = (12, 90)  # new counterparts in the first window, modest .. heavy
TAKEOVER_FACTOR = (2.0, 9.0)  # events against the account's usual, modest .. heavy
TAKEOVER_PRIOR = (1.0, 15.0)  # usual events a week of a taken-over account
CONTACT_NEW = (20, 70)  # new in-counterparts of a contact point in its first window


@dataclass(frozen=True)
class Act:
    """The kind code and amount (lognormal median, sigma; None = weight 1) of planted events."""

    kind: int
    median: float | None = None
    sigma: float = 0.5


@dataclass(frozen=True)
class Style:
    """How a world's planted events look: kinds and amounts, and where fresh accounts appear."""

    takeover: Act
    answer: Act
    contact: Act
    funnel_in: Act
    funnel_out: Act
    bridge: Act
    presence: Act  # the one event that keeps a planted account or newcomer present
    steady: Act  # a volume control's events with its fixed counterparts
    funnel_feed: Act | None = None  # if set, each ring member is first paid by a victim
    fresh_targets: float = 0.0  # share of takeover targets that are brand-new accounts
    fresh_outlets: bool = False  # funnel outlets are brand-new accounts (else members)
    digits: int = 2  # amounts are rounded to this many decimals (0: whole units)
    fresh_names: tuple[str, str, str] = ("recipient", "mule", "cash_out")  # archetype labels
    # of brand-new takeover targets, funnel sources and funnel outlets


class World(Protocol):
    """What a scenario module provides to the director."""

    members: Members
    style: Style
    rhythm: Rhythm

    def ordinary(
        self, rng: np.random.Generator, week: int, week_start: int, mult: np.ndarray, log: EventLog
    ) -> None:
        """Add one week of ordinary activity to ``log`` (rates scaled by ``mult``)."""

    def eligible(self, change: str) -> np.ndarray:
        """Members whose archetype suits ``change`` (bool mask)."""

    def steady_contacts(
        self, rng: np.random.Generator, account: int, avoid: np.ndarray
    ) -> tuple[np.ndarray, float, float]:
        """A volume control's three to five fixed counterparts (none of them in ``avoid``),
        the share of its events it sends, and its events a week."""


@dataclass
class Plant:
    """One planted account: its change, first window, reported details and running state."""

    account: int
    change: str
    week: int
    detail: dict = field(default_factory=dict)
    state: dict = field(default_factory=dict, repr=False)


def stratified(rng: np.random.Generator, count: int) -> np.ndarray:
    """``count`` values in [0, 1), one in each of ``count`` equal bins, in random order."""
    return (rng.permutation(count) + rng.random(count)) / max(count, 1)


def spread(rng: np.random.Generator, weeks: list[int], count: int) -> np.ndarray:
    """``count`` windows covering ``weeks`` as evenly as possible, sorted."""
    return np.sort(rng.permutation(np.resize(rng.permutation(weeks), count)))


@dataclass
class Profile:
    """What each member did in the training weeks."""

    activity: np.ndarray  # mean events a week (sent + received)
    every_week: np.ndarray  # bool: active in every training week
    out_share: np.ndarray  # share of its events it sent


def training_profile(log: EventLog, size: int, training_weeks: int) -> Profile:
    counts = np.zeros((training_weeks, size))
    sent = np.zeros(size)
    for w in range(training_weeks):
        b = log.weeks[w]
        out = np.bincount(b.actor[b.actor < size], minlength=size)
        into = np.bincount(b.target[b.target < size], minlength=size)
        counts[w] = out + into
        sent += out
    total = counts.sum(axis=0)
    every_week = np.asarray((counts > 0).all(axis=0))
    return Profile(counts.mean(axis=0), every_week, sent / np.maximum(total, 1))
