"""How each planted change acts within one week, on top of the world's ordinary activity.

The :class:`Acting` methods are mixed into :class:`rolewatch.scenario.planting.Director`,
which holds the state they use (the world, the generator, the plants and the event log)."""

from __future__ import annotations

import numpy as np

from .common import (
    WEEK_SECONDS,
    Batch,
    EventLog,
    Members,
    amounts,
    later,
)
from .plants import (
    ANSWER_SHARE,
    FLIP_SHARE,
    REVERSAL_KEEP,
    STRUCTURAL,
    Act,
    Plant,
    Style,
    World,
)


class Acting:
    """Per-week acting of planted changes (mixed into the Director)."""

    # state the Director sets up before any week is acted out
    world: World
    rng: np.random.Generator
    m: Members
    style: Style
    log: EventLog
    plants: list[Plant]
    taken: np.ndarray
    protected: np.ndarray
    contacts: dict[int, set[int]]

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
