"""Planted role changes and negative controls, acted out on top of a scenario's ordinary weeks.

A scenario module (forum, payments, guilds) supplies a *world*: its members, how it draws
one week of ordinary activity, which members suit each change, and the kinds and amounts
a planted event uses (:class:`Style`). The :class:`Director` runs the weeks and plants:

* ``takeover`` - fan-out after a takeover: the account starts sending to many members it
  never dealt with, few of whom answer. Strength varies per instance from modest (about 12
  new counterparts, twice its usual events) to heavy (about 90 new, nine times); later
  windows add 30-60 % as many new ones and return to some earlier ones;
* ``contact_point`` - the account starts receiving from 20-70 members that never dealt
  with it (later windows as for a takeover), and answers few;
* ``funnel`` - a ring of fresh and/or existing accounts pays one collector, who pays out to
  one to three outlets;
* ``reversal`` - the account's main direction flips (receives -> sends or the reverse)
  while most of its volume stays (at least 60 % of its usual events, topped up in the new
  direction when a quiet week would hide the flip);
* ``bridge`` - the account starts dealing with members of a zone its own zone never dealt
  with, relaying between the two;

and the negative controls, each with truth rows of its own: ``volume_control`` (the same
few counterparts every week, two to four times the volume from its window on), ``season``
(accounts of the one window where everybody is 1.3-1.8 times busier), ``newcomer``
(members who join later and behave ordinarily) and ``quiet`` (accounts that take a break
of several weeks and come back as before, or fade to a trickle).

Planted changes start after the training weeks, never in the season week and never in the
last week, on disjoint accounts that were active in every training week (chosen from what
they actually did in those weeks), and last to the end of the run. Every draw comes from
the scenario's one ``numpy.random.Generator`` in a fixed order.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Protocol

import numpy as np

from .common import (
    FRESH_PREFIX,
    GENERATOR_VERSION,
    WEEK_SECONDS,
    Batch,
    EventLog,
    Members,
    Rhythm,
    amounts,
    assemble,
    later,
    rfc3339,
    window_start_text,
)
from .marketplace import Scenario

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


class Director:
    """Runs a world week by week and acts out the plan on top of its ordinary activity."""

    def __init__(self, world: World, rng, *, weeks, training_weeks, season_week, instances):
        self.world, self.rng, self.m, self.style = world, rng, world.members, world.style
        self.weeks, self.training_weeks = weeks, training_weeks
        self.season_week, self.instances = season_week, instances
        self.log = EventLog(self.m.size)
        self.taken = np.zeros(self.m.size, dtype=bool)  # used by a plan: never planted again
        self.protected = np.zeros(self.m.size, dtype=bool)  # controls and quiet accounts
        self.plants: list[Plant] = []
        self.contacts: dict[int, set[int]] = {}
        self.season_mult = rng.uniform(*SEASON_RANGE, self.m.size)
        self.away = self._draw_away()
        self.change_weeks = [w for w in range(training_weeks, weeks - 1) if w != season_week]
        self._choose_volume_controls()

    # plan ---------------------------------------------------------------------------------
    def _draw_away(self) -> np.ndarray:
        """Ordinary breaks: some away-prone members are gone for 1-3 weeks (both directions)."""
        rng, n = self.rng, self.m.size
        who = np.flatnonzero(self.m.away_prone & (rng.random(n) < AWAY_SHARE))
        first = rng.integers(1, self.weeks, len(who))
        length = rng.integers(1, 4, len(who))
        away = np.zeros((n, self.weeks), dtype=bool)
        for k in range(3):
            ok = (k < length) & (first + k < self.weeks)
            away[who[ok], first[ok] + k] = True
        return away

    def _pick(self, mask: np.ndarray, count: int, near=None) -> list[int]:
        """Up to ``count`` untaken initial members from ``mask``, marked taken.

        With ``near`` (values per member), one pick per log-uniform target between the
        ``TAKEOVER_PRIOR`` bounds, each the closest of the remaining candidates' values
        (ties and near-ties broken at random among the five closest).
        """
        rng = self.rng
        pool = np.flatnonzero(mask & ~self.taken & (self.m.joined == 0))
        chosen: list[int] = []
        if near is None:
            chosen = [int(a) for a in rng.permutation(pool)[:count]]
        else:
            low, high = TAKEOVER_PRIOR
            goals = low * (high / low) ** stratified(rng, count)
            for goal in goals:
                left = pool[~np.isin(pool, chosen)]
                if len(left) == 0:
                    break
                close = left[np.argsort(np.abs(np.log(near[left]) - np.log(goal)))[:5]]
                chosen.append(int(rng.choice(close)))
        self.taken[chosen] = True
        return chosen

    def _choose_volume_controls(self) -> None:
        rng, style = self.rng, self.style
        mask = self.world.eligible("volume_control")
        accounts = self._pick(mask, self.instances)
        controls = np.zeros(self.m.size, dtype=bool)
        controls[accounts] = True
        self.protected[accounts] = True
        weeks = spread(rng, self.change_weeks, len(accounts))
        for account, week in zip(accounts, weeks, strict=True):
            # counterparts may be shared between controls, but are never controls themselves
            contacts, out_share, rate = self.world.steady_contacts(rng, account, controls)
            self.taken[contacts] = True
            factor = float(rng.uniform(2.0, 4.0))
            medians = (
                None
                if style.steady.median is None
                else style.steady.median * rng.lognormal(0.0, 0.4, len(contacts))
            )
            self.plants.append(
                Plant(
                    account,
                    "volume_control",
                    int(week),
                    detail={
                        "volume_factor": round(factor, 2),
                        "counterparts": len(contacts),
                        "events_per_week_before": round(rate, 1),
                    },
                    state={
                        "contacts": contacts,
                        "out_share": out_share,
                        "rate": rate,
                        "factor": factor,
                        "medians": medians,
                        "cycle": 0,
                    },
                )
            )

    def _choose_after_training(self) -> None:
        """Pick the planted accounts from what members did in the training weeks."""
        prof = training_profile(self.log, self.m.size, self.training_weeks)
        base = prof.every_week & (self.m.joined == 0)
        act, n = prof.activity, self.instances

        def within(low, high):
            return base & (act >= low) & (act <= high)

        eligible = self.world.eligible
        picks = {
            "takeover": self._pick(within(*TAKEOVER_PRIOR) & eligible("takeover"), n, near=act),
            "contact_point": self._pick(
                within(*TAKEOVER_PRIOR) & eligible("contact_point"), n, near=act
            ),
            "funnel": self._pick(within(1, 20) & eligible("funnel"), n),
        }
        one_sided = np.abs(prof.out_share - 0.5)
        picks["reversal"] = []
        # Strongly one-sided and busy first; small populations accept weaker candidates and,
        # last, one-sided members of any archetype.
        suited = eligible("reversal")
        for low, side, kind in ((5, 0.25, suited), (3, 0.2, suited), (2, 0.1, True)):
            wanted = n - len(picks["reversal"])
            if wanted > 0:
                mask = within(low, np.inf) & (one_sided >= side) & kind
                picks["reversal"] += self._pick(mask, wanted)
        far = self.m.reach[self.m.zone].sum(axis=1) < len(self.m.zone_names)
        picks["bridge"] = self._pick(within(2, 25) & far & eligible("bridge"), n)
        picks["quiet"] = self._pick(within(3, np.inf) & eligible("quiet"), n)
        picks["season"] = self._pick(within(2, 30) & eligible("season"), n)
        for change in STRUCTURAL:
            self._plan_structural(change, picks[change], prof)
        self.protected[picks["quiet"]] = True
        self._plan_quiet(picks["quiet"], act)
        for account in picks["season"]:
            factor = round(float(self.season_mult[account]), 2)
            self.plants.append(Plant(account, "season", self.season_week, {"factor": factor}))
        self._start_watching()

    def _plan_structural(self, change: str, accounts: list[int], prof: Profile) -> None:
        rng = self.rng
        strength = stratified(rng, len(accounts))
        weeks = spread(rng, self.change_weeks, len(accounts))
        for k, (account, week) in enumerate(zip(accounts, weeks, strict=True)):
            plant = Plant(account, change, int(week))
            u = float(strength[k])
            if change == "takeover":
                new = round(TAKEOVER_NEW[0] + u * (TAKEOVER_NEW[1] - TAKEOVER_NEW[0]))
                factor = TAKEOVER_FACTOR[0] + u * (TAKEOVER_FACTOR[1] - TAKEOVER_FACTOR[0])
                plant.state = {"new": new, "factor": factor, "prior": prof.activity[account]}
                plant.detail = {
                    "new_counterparts": new,
                    "volume_factor": round(factor, 2),
                    "events_per_week_before": round(float(prof.activity[account]), 1),
                }
            elif change == "contact_point":
                new = round(CONTACT_NEW[0] + u * (CONTACT_NEW[1] - CONTACT_NEW[0]))
                plant.state = {"new": new}
                plant.detail = {"new_counterparts": new}
            elif change == "funnel":
                share = (1.0, 0.5, 0.0)[k % 3]  # fresh ring, mixed ring, ring of members
                plant.state = {"fresh_share": share}
                plant.detail = {"fresh_source_share": share}
            elif change == "reversal":
                outward = bool(prof.out_share[account] > 0.5)
                plant.state = {"outward": outward, "prior": prof.activity[account]}
                plant.detail = {
                    "before": "sends" if outward else "receives",
                    "sent_share_before": round(float(prof.out_share[account]), 2),
                }
            else:
                self._plan_bridge(plant)
            self.plants.append(plant)

    def _plan_bridge(self, plant: Plant) -> None:
        rng, m = self.rng, self.m
        home = int(m.zone[plant.account])
        far_zones = np.flatnonzero(~m.reach[home])
        far = int(rng.choice(far_zones))
        communities = np.flatnonzero(m.community_zone == far)
        sizes = np.bincount(m.community, minlength=len(m.community_names))[communities]
        community = int(rng.choice(communities, p=sizes / sizes.sum()))
        pool = np.flatnonzero((m.community == community) & (m.joined == 0) & ~self.taken)
        if len(pool) < 12:
            pool = np.flatnonzero((m.zone == far) & (m.joined == 0) & ~self.taken)
        partners = rng.choice(pool, size=min(len(pool), int(rng.integers(12, 26))), replace=False)
        plant.state = {"far": partners}
        plant.detail = {
            "home_zone": m.zone_names[home],
            "far_zone": m.zone_names[far],
            "far_community": m.community_names[community],
        }

    def _plan_quiet(self, accounts: list[int], activity: np.ndarray) -> None:
        """Alternately a break of 2-4 weeks (back before the last week) or a fade."""
        rng = self.rng
        gap_weeks = [w for w in self.change_weeks if w + 2 <= self.weeks - 2]
        starts = spread(rng, gap_weeks or self.change_weeks, len(accounts))
        fades = spread(rng, self.change_weeks, len(accounts))
        for k, account in enumerate(accounts):
            before = round(float(activity[account]), 1)
            if k % 2 == 0 and gap_weeks:
                week = int(starts[k])
                length = int(min(rng.integers(2, 5), self.weeks - 2 - week))
                detail = {"mode": "break", "weeks_away": length, "back_window": week + length}
            else:
                week = int(fades[k])
                detail = {"mode": "fade", "kept_share": FADE_KEEP}
            detail["events_per_week_before"] = before
            self.plants.append(Plant(account, "quiet", week, detail))

    def _start_watching(self) -> None:
        """Known counterparts of every planted account, from the weeks drawn so far."""
        watched = [p.account for p in self.plants if p.change not in ("volume_control",)]
        self.contacts = {a: set() for a in watched}
        self.watched = np.array(sorted(watched), dtype=np.int64)
        for batch in self.log.weeks:
            self._observe(batch)

    def _observe(self, batch: Batch) -> None:
        if not self.contacts:
            return
        for ours, theirs in ((batch.actor, batch.target), (batch.target, batch.actor)):
            hit = np.isin(ours, self.watched)
            for a, b in zip(ours[hit].tolist(), theirs[hit].tolist(), strict=True):
                self.contacts[a].add(b)

    # weeks --------------------------------------------------------------------------------
    def run(self, start: int) -> EventLog:
        for week in range(self.weeks):
            if week == self.training_weeks:
                self._choose_after_training()
            self._run_week(week, start + week * WEEK_SECONDS)
        return self.log

    def _run_week(self, week: int, week_start: int) -> None:
        log = self.log
        mult = self.season_mult if week == self.season_week else np.ones(self.m.size)
        self.world.ordinary(self.rng, week, week_start, mult, log)
        batch = self._shape(log.drain(), week)
        self._steady(week, week_start, mult)
        for plant in self.plants:
            if plant.change in STRUCTURAL and week >= plant.week:
                getattr(self, "_" + plant.change)(plant, week, week_start)
        batch = Batch.join([batch, log.drain()])
        batch = batch.where(batch.actor != batch.target)  # a draw may pick the actor itself
        self._keep_present(batch, week, week_start)
        batch = Batch.join([batch, log.drain()])
        log.commit(batch)
        self._observe(batch)

    def _shape(self, batch: Batch, week: int) -> Batch:
        """Silence breaks and volume controls' ordinary events, fade, and flip reversals."""
        rng = self.rng
        silent = self.away[:, week] & ~self.taken
        fading = []
        for p in self.plants:
            if p.change == "volume_control":
                silent[p.account] = True
            elif p.change == "quiet" and week >= p.week:
                if p.detail["mode"] == "fade":
                    fading.append(p.account)
                elif week < p.detail["back_window"]:
                    silent[p.account] = True
        keep = ~silent[batch.actor] & ~silent[batch.target]
        for account in fading:
            involved = (batch.actor == account) | (batch.target == account)
            keep &= ~involved | (rng.random(len(batch)) < FADE_KEEP)
        batch = batch.where(keep)
        for p in self.plants:
            if p.change == "reversal" and week >= p.week:
                self._flip(batch, p, week)
        return batch

    def _flip(self, batch: Batch, plant: Plant, week: int) -> None:
        """Most events in the account's main direction turn round; half get a new counterpart."""
        rng, a = self.rng, plant.account
        outward = plant.state["outward"]
        main = np.flatnonzero((batch.actor if outward else batch.target) == a)
        flip = main[rng.random(len(main)) < FLIP_SHARE]
        other = (batch.target if outward else batch.actor)[flip].copy()
        fresh = rng.random(len(flip)) < 0.5
        pool = self._pool(int(self.m.zone[a]), week, {a})
        other[fresh] = rng.choice(pool, size=int(fresh.sum()))
        if outward:
            batch.actor[flip], batch.target[flip] = other, a
        else:
            batch.actor[flip], batch.target[flip] = a, other
        plant.state["kept"] = int(((batch.actor == a) | (batch.target == a)).sum())

    def _reversal(self, plant: Plant, week: int, week_start: int) -> None:
        """A quiet week would hide the flip: top the account up to ``REVERSAL_KEEP`` of its
        usual events, in its new direction, half with known counterparts, half new."""
        rng, a, st = self.rng, plant.account, plant.state
        missing = round(REVERSAL_KEEP * st["prior"]) - st["kept"]
        if missing <= 0:
            return
        known = np.array(sorted(self.contacts[a]), dtype=np.int64)
        known = known[(known < self.m.size) & ~self.protected[np.minimum(known, self.m.size - 1)]]
        pool = self._pool(int(self.m.zone[a]), week, {a})
        other = rng.choice(pool, size=missing)
        if len(known):
            old = rng.random(missing) < 0.5
            other[old] = rng.choice(known, size=int(old.sum()))
        seconds = self.world.rhythm.times(rng, week_start, missing)
        if st["outward"]:  # it used to send: now it receives
            self._add(other, a, seconds, self.style.presence)
        else:
            self._add(a, other, seconds, self.style.presence)

    def _pool(self, zone: int, week: int, exclude=()) -> np.ndarray:
        """Present members of ``zone`` that no plan uses, outside ``exclude``.

        In a small population, once those run out, it falls back to other planted accounts
        outside ``exclude``, then to anyone present; never to a volume control or a quiet
        account, whose events must stay as planted.
        """
        m = self.m
        present = (m.zone == zone) & (m.joined <= week)
        outside = np.ones(m.size, dtype=bool)
        if len(exclude):
            known = np.fromiter(exclude, np.int64, len(exclude))
            outside[known[known < m.size]] = False
        free = present & ~self.protected
        for mask in (present & ~self.taken & outside, free & outside, free):
            pool = np.flatnonzero(mask)
            if len(pool):
                return pool
        raise ValueError(f"zone {m.zone_names[zone]} has no members; use more members")

    def _add(self, actor, target, seconds, act: Act) -> np.ndarray:
        n = len(seconds)
        weight = amounts(self.rng, act.median, act.sigma, n, self.style.digits)
        self.log.add(
            np.broadcast_to(actor, (n,)), np.broadcast_to(target, (n,)), seconds, act.kind, weight
        )
        return weight

    def _steady(self, week: int, week_start: int, mult: np.ndarray) -> None:
        """Volume controls: the same counterparts in turn, a steady count, then 2-4 times it."""
        rng = self.rng
        for p in self.plants:
            if p.change != "volume_control":
                continue
            st, a = p.state, p.account
            rate = st["rate"] * mult[a] * (st["factor"] if week >= p.week else 1.0)
            count = max(1, int(np.rint(rate * rng.uniform(0.8, 1.2))))
            turn = (st["cycle"] + np.arange(count)) % len(st["contacts"])
            st["cycle"] += count
            other = st["contacts"][turn]
            outward = rng.random(count) < st["out_share"]
            weight = np.ones(count)
            if st["medians"] is not None:
                digits = self.style.digits
                drawn = st["medians"][turn] * rng.lognormal(0.0, 0.15, count)
                weight = np.maximum(np.round(drawn, digits), 10.0**-digits)
            self.log.add(
                np.where(outward, a, other),
                np.where(outward, other, a),
                self.world.rhythm.times(rng, week_start, count),
                self.style.steady.kind,
                weight,
            )

    # planted changes ----------------------------------------------------------------------
    def _fresh_count(self, plant: Plant, week: int) -> int:
        """New counterparts this window: the planted number in the first window, then
        30-60 % of it (the campaign goes on, but also returns to earlier counterparts)."""
        if week == plant.week:
            return plant.state["new"]
        return max(3, round(plant.state["new"] * self.rng.uniform(0.3, 0.6)))

    def _again(self, plant: Plant) -> np.ndarray:
        """About 40 % of last window's new counterparts, met again."""
        last = plant.state.get("last", np.zeros(0, np.int64))
        return last[self.rng.random(len(last)) < 0.4]

    def _takeover(self, plant: Plant, week: int, week_start: int) -> None:
        """Sends to many members it never dealt with (and some brand-new accounts)."""
        rng, a, st = self.rng, plant.account, plant.state
        new = self._fresh_count(plant, week)
        fresh = min(int(rng.binomial(new, self.style.fresh_targets)), new)
        members = self._strangers(a, week, new - fresh)
        fresh = new - len(members)  # a small zone runs out: the rest are brand-new accounts
        newcomers = np.concatenate(
            [members, self.log.new_accounts(fresh, self.style.fresh_names[0])]
        )
        targets = np.concatenate([newcomers, self._again(plant)])
        st["last"] = newcomers
        extra = max(len(targets), round((st["factor"] - 1.0) * st["prior"]))
        per = 1 + rng.multinomial(extra - len(targets), np.full(len(targets), 1 / len(targets)))
        seconds = self.world.rhythm.times(rng, week_start, int(per.sum()))
        self._add(a, np.repeat(targets, per), seconds, self.style.takeover)
        first = (np.cumsum(per) - per)[: len(newcomers)]
        self._answer(newcomers, a, seconds[first], week_start)

    def _strangers(self, account: int, week: int, count: int) -> np.ndarray:
        """Up to ``count`` present members of the account's zone it never dealt with and
        that no plan uses; fewer when the zone has fewer."""
        m = self.m
        pool = np.flatnonzero((m.zone == m.zone[account]) & (m.joined <= week) & ~self.taken)
        known = np.fromiter(self.contacts[account], np.int64, len(self.contacts[account]))
        pool = pool[~np.isin(pool, known)]
        return self.rng.choice(pool, size=min(count, len(pool)), replace=False)

    def _answer(self, others: np.ndarray, account: int, seconds, week_start, reverse=False):
        """A few of ``others`` answer (or, with ``reverse``, the account answers a few)."""
        rng = self.rng
        yes = rng.random(len(others)) < ANSWER_SHARE
        when = later(rng, seconds[yes], week_start + WEEK_SECONDS, 600, 2 * 24 * 3600)
        actor, target = (account, others[yes]) if reverse else (others[yes], account)
        self._add(actor, target, when, self.style.answer)

    def _contact_point(self, plant: Plant, week: int, week_start: int) -> None:
        """Many members that never dealt with it start sending to it; it answers few."""
        rng, a = self.rng, plant.account
        new = self._fresh_count(plant, week)
        strangers = self._strangers(a, week, new)
        if len(strangers) < new:  # a small zone runs out: the rest are brand-new accounts
            extra = self.log.new_accounts(new - len(strangers), self.style.fresh_names[0])
            strangers = np.concatenate([strangers, extra])
        sources = np.concatenate([strangers, self._again(plant)])
        plant.state["last"] = strangers
        per = 1 + rng.poisson(0.3, len(sources))
        seconds = self.world.rhythm.times(rng, week_start, int(per.sum()))
        self._add(np.repeat(sources, per), a, seconds, self.style.contact)
        first = (np.cumsum(per) - per)[: len(strangers)]
        self._answer(strangers, a, seconds[first], week_start, reverse=True)

    def _funnel(self, plant: Plant, week: int, week_start: int) -> None:
        """A ring pays the collector; the collector pays one to three outlets."""
        rng, a, st, style = self.rng, plant.account, plant.state, self.style
        if "ring" not in st:
            self._set_up_funnel(plant, week)
        ring, outlets = st["ring"], st["outlets"]
        week_end = week_start + WEEK_SECONDS
        first = self.world.rhythm.times(rng, week_start, len(ring))
        if style.funnel_feed is not None:
            victims = rng.choice(self._pool(int(self.m.zone[a]), week, {a}), size=len(ring))
            self._add(victims, ring, first, style.funnel_feed)
            first = later(rng, first, week_end)
        per = 1 + rng.poisson(1.0, len(ring))
        paid = later(rng, np.repeat(first, per), week_end, 0, 3600)
        self._add(np.repeat(ring, per), a, paid, style.funnel_in)
        dest = np.repeat(outlets, 1 + rng.poisson(1.0, len(outlets)))
        self._add(a, dest, later(rng, rng.choice(paid, len(dest)), week_end), style.funnel_out)

    def _set_up_funnel(self, plant: Plant, week: int) -> None:
        rng, a, st = self.rng, plant.account, plant.state
        size = int(rng.integers(10, 26))
        fresh = round(size * st["fresh_share"])
        pool = self._pool(int(self.m.zone[a]), week, self.contacts[a] | {a})
        members = rng.choice(pool, size=min(size - fresh, len(pool)), replace=False)
        outlets_n = int(rng.integers(1, 4))
        if self.style.fresh_outlets:
            outlets = self.log.new_accounts(outlets_n, self.style.fresh_names[2])
        else:
            pool = self._pool(int(self.m.zone[a]), week, self.contacts[a] | {a})
            outlets = rng.choice(pool, size=outlets_n, replace=False)
        st["ring"] = np.concatenate(
            [self.log.new_accounts(fresh, self.style.fresh_names[1]), members]
        )
        st["outlets"] = outlets
        st["accomplices"] = np.concatenate([members, [] if self.style.fresh_outlets else outlets])
        plant.detail.update({"sources": len(st["ring"]), "outlets": int(outlets_n)})

    def _bridge(self, plant: Plant, week: int, week_start: int) -> None:
        """Relays between its own zone and a zone that never dealt with it, both ways."""
        rng, a = self.rng, plant.account
        far = plant.state["far"]
        home = np.array(sorted(self.contacts[a]), dtype=np.int64)
        home = home[home < self.m.size]
        home = home[~self.taken[home] & (self.m.zone[home] == self.m.zone[a])]
        if len(home) < 3:
            home = self._pool(int(self.m.zone[a]), week, {a})
        times = self.world.rhythm.times
        for senders, receivers, lam in ((far, home, 3.0), (home, far, 2.0)):
            k = int(3 + rng.poisson(lam))
            self._add(rng.choice(senders, k), a, times(rng, week_start, k), self.style.bridge)
            k = int(3 + rng.poisson(lam))
            self._add(a, rng.choice(receivers, k), times(rng, week_start, k), self.style.bridge)

    def _keep_present(self, batch: Batch, week: int, week_start: int) -> None:
        """Planted accounts before their change, newcomers in their first week, quiet
        accounts in the window they come back and season accounts in the season window get
        at least one event, so each has a baseline, each newcomer shows up when it joins,
        each break visibly ends and each season row has activity to judge."""
        rng, m = self.rng, self.m
        need = [p.account for p in self.plants if p.change in STRUCTURAL and week < p.week]
        need += [p.account for p in self.plants if p.detail.get("back_window") == week]
        need += [p.account for p in self.plants if p.change == "season" and week == p.week]
        if week > 0:
            need += np.flatnonzero(m.joined == week).tolist()
        seen = np.zeros(self.log.next_fresh, dtype=bool)
        seen[batch.actor] = True
        seen[batch.target] = True
        for a in need:
            if seen[a]:
                continue
            mine = [c for c in sorted(self.contacts.get(a, ())) if c < m.size and not self.taken[c]]
            known = np.array(mine, dtype=np.int64)
            if not len(known):
                known = np.flatnonzero(
                    (m.community == m.community[a]) & (m.joined <= week) & ~self.taken
                )
                known = known[known != a]
            if not len(known):
                known = self._pool(int(m.zone[a]), week, {a})
            other = int(rng.choice(known[known != a]))
            self._add(a, other, self.world.rhythm.times(rng, week_start, 1), self.style.presence)

    # results ------------------------------------------------------------------------------
    def truth(self, start: datetime, ids: list[str]) -> list[dict]:
        """Ground-truth records ordered by window, change and account."""
        rows = [(p.week, CHANGES.index(p.change), p.account) for p in self.plants]
        newcomers = np.flatnonzero(self.m.joined > 0)
        rows += [(int(self.m.joined[i]), CHANGES.index("newcomer"), int(i)) for i in newcomers]
        return [
            {
                "account": ids[account],
                "change": CHANGES[change],
                "window_index": week,
                "window_start": window_start_text(start, week),
            }
            for week, change, account in sorted(rows)
        ]

    def plant_details(self, ids: list[str]) -> list[dict]:
        """Per planted account: change, window and the strength it was planted with."""
        out = []
        for p in sorted(self.plants, key=lambda p: (p.week, CHANGES.index(p.change), p.account)):
            row = {"account": ids[p.account], "change": p.change, "window_index": p.week}
            row.update(p.detail)
            if "accomplices" in p.state:
                row["accomplices"] = [ids[int(i)] for i in p.state["accomplices"]]
            out.append(row)
        return out


def run_world(
    world: World,
    rng: np.random.Generator,
    *,
    name: str,
    description: str,
    kinds: tuple[str, ...],
    id_prefix: str,
    seed: int,
    members: int,
    weeks: int,
    training_weeks: int,
    season_week: int,
    instances: int,
    start: datetime,
    extra_meta: dict | None = None,
) -> Scenario:
    """Run ``world`` through the director and assemble the scenario with truth and meta."""
    director = Director(
        world,
        rng,
        weeks=weeks,
        training_weeks=training_weeks,
        season_week=season_week,
        instances=instances,
    )
    log = director.run(int(start.timestamp()))
    m = world.members
    ids = m.ids() + [f"{FRESH_PREFIX}{k:05d}" for k in range(log.fresh)]
    truth = director.truth(start, ids)
    planted = sorted({r["change"] for r in truth}, key=CHANGES.index)
    meta = {
        "scenario": description,
        "name": name,
        "generator_version": GENERATOR_VERSION,
        "seed": seed,
        "members": members,
        "newcomers": int(m.size - m.initial),
        "weeks": weeks,
        "period": "7d",
        "start": rfc3339(start),
        "end": window_start_text(start, weeks),
        "training_weeks": training_weeks,
        "season_window": season_week,
        "season_factor_range": list(SEASON_RANGE),
        "instances_per_change": instances,
        "changes": planted,
        "truth_counts": {c: sum(r["change"] == c for r in truth) for c in planted},
        "kinds": list(kinds),
        "zones": list(m.zone_names),
        "communities": len(m.community_names),
        "never_dealing": [[m.zone_names[a], m.zone_names[b]] for a, b in m.never_dealing()],
        "fixed_schedule_kinds": [],
        **(extra_meta or {}),
        "plants": director.plant_details(ids),
        "note": "Invented data for demos and tests; no real people, firms or places.",
    }
    return assemble(
        members=m,
        log=log,
        kinds=kinds,
        id_prefix=id_prefix,
        start=start,
        truth=truth,
        meta=meta,
    )
