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

from collections.abc import Callable
from datetime import datetime

import numpy as np

from .acting import Acting
from .common import (
    FRESH_PREFIX,
    GENERATOR_VERSION,
    WEEK_SECONDS,
    Batch,
    EventLog,
    aligned_start,
    assemble,
    check_sizes,
    default_instances,
    default_season_week,
    rfc3339,
    window_start_text,
)
from .marketplace import Scenario
from .plants import (
    AWAY_SHARE,
    CHANGES,
    CONTACT_NEW,
    FADE_KEEP,
    SEASON_RANGE,
    STRUCTURAL,
    TAKEOVER_FACTOR,
    TAKEOVER_NEW,
    TAKEOVER_PRIOR,
    Plant,
    Profile,
    World,
    spread,
    stratified,
    training_profile,
)


class Director(Acting):
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


def generate_world(
    make_world: Callable[[np.random.Generator, int, int, float], World],
    *,
    name: str,
    description: str,
    kinds: tuple[str, ...],
    id_stem: str,
    seed: int,
    members: int,
    weeks: int,
    training_weeks: int,
    start: datetime,
    season_week: int | None,
    instances: int | None,
    newcomer_rate: float,
    extra_meta: dict | None = None,
) -> Scenario:
    """The shared body of every scenario's ``generate``: check the sizes, align the start,
    choose the season window and instance count, draw the world and run it.

    ``make_world(rng, members, weeks, newcomer_rate)`` builds the scenario's world; ids are
    ``f"{id_stem}{seed}-..."``.
    """
    check_sizes(members, weeks, training_weeks)
    start = aligned_start(start)
    if season_week is None:
        season_week = default_season_week(weeks, training_weeks)
    rng = np.random.default_rng(seed)
    return run_world(
        make_world(rng, members, weeks, newcomer_rate),
        rng,
        name=name,
        description=description,
        kinds=kinds,
        id_prefix=f"{id_stem}{seed}-",
        seed=seed,
        members=members,
        weeks=weeks,
        training_weeks=training_weeks,
        season_week=season_week,
        instances=default_instances(members) if instances is None else instances,
        start=start,
        extra_meta=extra_meta,
    )
