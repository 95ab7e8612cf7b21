"""Week-by-week activity of the fictional neighbourhood marketplace.

Every draw comes from one ``numpy.random.Generator`` seeded by the caller, in a fixed
order, so a seed always gives the same events, ids and ground truth.

Windows are aligned to whole multiples of the period counted from the Unix epoch, as the
service aligns them. The epoch (1970-01-01) was a Thursday, so 7-day windows start on
Thursdays; the default start 2026-01-01T00:00:00Z is a Thursday and each scenario week
is exactly one service window.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

import numpy as np

from .population import (
    ARCHETYPE_NAMES,
    FRESH,
    NEIGHBOURHOOD_NAMES,
    NEVER_TRADING,
    SELLER,
    SHOP,
    Population,
    draw_population,
)
from .truth import PLANTED, Planted, draw_plan, truth_records

WEEK_SECONDS = 7 * 24 * 3600
DEFAULT_START = datetime(2026, 1, 1, tzinfo=UTC)
KINDS = ("purchase", "repair", "delivery", "payback")
PURCHASE, REPAIR, DELIVERY, PAYBACK = range(4)
SEASON_FACTOR = 1.5
GENERATOR_VERSION = "1"

# Share of activity by hour of day (UTC): quiet nights, busy afternoons and evenings.
_HOURLY = np.array(
    [1, 1, 1, 1, 1, 2, 4, 6, 8, 9, 10, 10, 11, 11, 10, 10, 11, 12, 13, 12, 10, 7, 4, 2], float
)
_HOURLY /= _HOURLY.sum()


@dataclass(frozen=True)
class EventColumns:
    """Events as parallel arrays in time order (ties keep generation order)."""

    id: np.ndarray  # str
    time: np.ndarray  # datetime64[s], UTC
    actor: np.ndarray  # str
    target: np.ndarray  # str
    kind: np.ndarray  # str
    weight: np.ndarray  # float64, amount rounded to cents

    def __len__(self) -> int:
        return len(self.id)

    def rfc3339(self) -> np.ndarray:
        """Event times as RFC 3339 strings with a ``Z`` offset."""
        return np.char.add(np.datetime_as_string(self.time, unit="s"), "Z")


@dataclass(frozen=True)
class Scenario:
    """A generated marketplace: events, ground truth, metadata and the member list."""

    events: EventColumns
    truth: list[dict]
    meta: dict
    accounts: dict = field(repr=False)  # columns: id, archetype, neighbourhood, joined_window

    def iter_events(self) -> Iterator[dict]:
        """Yield events as wire-format dicts (see README.md, "Posting events") in time order."""
        ev = self.events
        columns = zip(
            ev.id.tolist(),
            ev.rfc3339().tolist(),
            ev.actor.tolist(),
            ev.target.tolist(),
            ev.kind.tolist(),
            ev.weight.tolist(),
            strict=False,
        )
        for id_, time, actor, target, kind, weight in columns:
            yield {
                "id": id_,
                "time": time,
                "actor": actor,
                "target": target,
                "kind": kind,
                "weight": weight,
            }

    def window_start(self, index: int) -> datetime:
        return datetime.fromisoformat(self.meta["start"]) + timedelta(weeks=index)


class _Events:
    """Collects event chunks as index arrays; fresh accounts get ids as they appear."""

    def __init__(self, first_fresh: int):
        self.chunks: list[tuple[np.ndarray, ...]] = []
        self.next_fresh = first_fresh
        self.fresh = 0

    def add(self, actor, target, seconds, kind, weight) -> None:
        n = len(actor)
        kind = np.broadcast_to(np.asarray(kind, dtype=np.int8), (n,))
        self.chunks.append(tuple(np.asarray(x) for x in (actor, target, seconds, kind, weight)))

    def new_accounts(self, count: int) -> np.ndarray:
        out = np.arange(self.next_fresh, self.next_fresh + count)
        self.next_fresh += count
        self.fresh += count
        return out

    def columns(self) -> tuple[np.ndarray, ...]:
        return tuple(np.concatenate(part) for part in zip(*self.chunks, strict=False))


def _times(rng: np.random.Generator, week_start: int, n: int) -> np.ndarray:
    """Seconds since the epoch spread over one week with a daily rhythm."""
    day = rng.integers(0, 7, n)
    hour = rng.choice(24, size=n, p=_HOURLY)
    return week_start + day * 86400 + hour * 3600 + rng.integers(0, 3600, n)


def _later(rng: np.random.Generator, times: np.ndarray, week_end: int) -> np.ndarray:
    """A follow-up payment 10 minutes to 6 hours later, kept inside the week."""
    return np.minimum(times + rng.integers(600, 6 * 3600, len(times)), week_end - 1)


def _amount(rng: np.random.Generator, median: float | np.ndarray, sigma: float, n: int):
    return np.maximum(np.round(rng.lognormal(np.log(median), sigma, n), 2), 0.5)


class _Week:
    """Draws one week of activity for the population under the plan."""

    def __init__(self, rng, pop: Population, plan: list[Planted], out: _Events, season: int):
        self.rng, self.pop, self.out, self.season = rng, pop, out, season
        self.plan = plan
        self.by_change = {c: [p for p in plan if p.change == c] for c in PLANTED}
        planted = np.array([p.account for p in plan], dtype=np.int64)
        self.always_active = np.zeros(pop.size, dtype=bool)
        self.always_active[planted] = True
        self.steady = np.zeros(pop.size, dtype=bool)  # volume controls: fixed habits
        reversed_shops = {p.account: p.partner for p in self.by_change["reversal"]}
        for p in self.by_change["volume_control"]:
            # Up to three distinct favourites that keep selling all run, so the control's
            # counterparts never change; a shop that will reverse is swapped for its
            # replacement from the start.
            keep = list(
                dict.fromkeys(reversed_shops.get(int(f), int(f)) for f in pop.favourites[p.account])
            )[:3]
            pop.favourites[p.account, : len(keep)] = keep
            pop.n_favourites[p.account] = len(keep)
            self.steady[p.account] = True
            pop.p_explore[p.account] = 0.0
            pop.p_deliver[p.account] = 0.0
        self.ordinary_buyers = (pop.rate > 0) & ~self.always_active
        self.cycle = np.zeros(pop.size, dtype=np.int64)
        self.fresh_state: dict[int, dict] = {}

    def run(self, week: int, week_start: int) -> None:
        pop = self.pop
        self.week, self.t0, self.t1 = week, week_start, week_start + WEEK_SECONDS
        self.mult = SEASON_FACTOR if week == self.season else 1.0
        self.remap = np.arange(pop.size)
        for p in self.by_change["reversal"]:
            if week >= p.week:
                self.remap[p.account] = p.partner
        self._purchases()
        self._restocking()
        self._paybacks()
        for p in self.plan:
            if week >= p.week and p.change != "volume_control":
                getattr(self, "_" + p.change)(p)

    # ordinary activity -------------------------------------------------------------
    def _sale(self, buyer, seller, seconds, deliver, courier=None) -> None:
        """Buyers pay sellers directly, or pay a courier who pays the seller."""
        rng, pop = self.rng, self.pop
        seller = self.remap[seller]
        price = np.where(
            pop.repairer[seller],
            _amount(rng, 40.0, 0.5, len(seller)),
            np.where(
                pop.archetype[seller] == SHOP,
                _amount(rng, 25.0, 0.6, len(seller)),
                _amount(rng, 18.0, 0.7, len(seller)),
            ),
        )
        kind = np.where(pop.repairer[seller], REPAIR, PURCHASE)
        direct = ~deliver
        self.out.add(buyer[direct], seller[direct], seconds[direct], kind[direct], price[direct])
        courier = (pop.courier[buyer] if courier is None else courier)[deliver]
        fee = _amount(rng, 6.0, 0.3, int(deliver.sum()))
        self.out.add(
            buyer[deliver], courier, seconds[deliver], DELIVERY, np.round(price[deliver] + fee, 2)
        )
        self.out.add(
            courier,
            seller[deliver],
            _later(rng, seconds[deliver], self.t1),
            kind[deliver],
            price[deliver],
        )

    def _purchases(self) -> None:
        rng, pop, week = self.rng, self.pop, self.week
        active = pop.joined <= week
        rate = np.where(active, pop.rate * self.mult, 0.0)
        for p in self.by_change["volume_control"]:
            if week >= p.week:
                rate[p.account] *= 3.0
        count = rng.poisson(rate)
        # Volume controls are steady: within a fifth of their rate every week, so that
        # tripling stands out from week-to-week noise.
        steady = np.flatnonzero(self.steady)
        count[steady] = np.rint(rate[steady] * rng.uniform(0.8, 1.2, len(steady))).astype(
            count.dtype
        )
        floor = (self.always_active & active) | ((pop.joined == week) & (week > 0) & (pop.rate > 0))
        count[floor] = np.maximum(count[floor], 1)
        buyer = np.repeat(np.arange(pop.size), count)
        n = len(buyer)
        column = rng.integers(0, np.maximum(pop.n_favourites[buyer], 1))
        # Volume controls walk their favourites in turn, so their counterparts never change.
        rank = np.arange(n) - np.repeat(np.cumsum(count) - count, count)
        cyclic = (self.cycle[buyer] + rank) % np.maximum(pop.n_favourites[buyer], 1)
        column = np.where(self.steady[buyer], cyclic, column)
        self.cycle += count
        seller = pop.favourites[buyer, column]
        explore = rng.random(n) < pop.p_explore[buyer]
        for h in range(len(NEIGHBOURHOOD_NAMES)):
            who = np.flatnonzero(explore & (pop.neighbourhood[buyer] == h))
            pool = pop.sellers(h, week)
            seller[who] = rng.choice(
                pool, size=len(who), p=pop.popularity[pool] / pop.popularity[pool].sum()
            )
        own = seller == buyer
        seller[own] = pop.favourites[buyer[own], 0]
        deliver = rng.random(n) < pop.p_deliver[buyer]
        self._sale(buyer, seller, _times(rng, self.t0, n), deliver)

    def _restocking(self) -> None:
        rng, pop = self.rng, self.pop
        shops = np.flatnonzero(pop.archetype == SHOP)
        count = rng.poisson(2.0 * self.mult, len(shops))
        shop = np.repeat(shops, count)
        supplier = pop.suppliers[shop, rng.integers(0, pop.n_suppliers[shop])]
        self.out.add(
            shop,
            supplier,
            _times(rng, self.t0, len(shop)),
            PURCHASE,
            _amount(rng, 120.0, 0.5, len(shop)),
        )

    def _paybacks(self) -> None:
        rng, pairs = self.rng, self.pop.friend_pairs
        count = rng.poisson(0.3 * self.mult, len(pairs))
        a, b = np.repeat(pairs[:, 0], count), np.repeat(pairs[:, 1], count)
        self.out.add(a, b, _times(rng, self.t0, len(a)), PAYBACK, _amount(rng, 15.0, 0.6, len(a)))

    # planted changes ---------------------------------------------------------------
    def _takeover(self, p: Planted) -> None:
        """The account pays small sums to dozens of brand-new accounts every week."""
        rng = self.rng
        state = self.fresh_state.setdefault(p.account, {"last": np.zeros(0, np.int64)})
        fresh = self.out.new_accounts(20 + int(rng.poisson(10)))
        again = state["last"][rng.random(len(state["last"])) < 0.3]
        state["last"] = fresh
        target = np.concatenate([fresh, again])
        target = np.repeat(target, 1 + (rng.random(len(target)) < 0.3))
        self.out.add(
            np.full(len(target), p.account),
            target,
            _times(rng, self.t0, len(target)),
            PAYBACK,
            _amount(rng, 4.0, 0.4, len(target)),
        )

    def _funnel(self, p: Planted) -> None:
        """A ring of fresh accounts pays one collector, who forwards to a few outsiders."""
        rng = self.rng
        state = self.fresh_state.get(p.account)
        if state is None:
            state = {
                "ring": self.out.new_accounts(12 + int(rng.integers(0, 10))),
                "outside": self.out.new_accounts(2 + int(rng.integers(0, 3))),
            }
            self.fresh_state[p.account] = state
        ring, outside = state["ring"], state["outside"]
        payer = np.repeat(ring, 1 + rng.poisson(0.8, len(ring)))
        self.out.add(
            payer,
            np.full(len(payer), p.account),
            _times(rng, self.t0, len(payer)),
            PURCHASE,
            _amount(rng, 30.0, 0.5, len(payer)),
        )
        hop = rng.random(len(ring)) < 0.5
        self.out.add(
            ring[hop],
            np.roll(ring, -1)[hop],
            _times(rng, self.t0, int(hop.sum())),
            PAYBACK,
            _amount(rng, 5.0, 0.4, int(hop.sum())),
        )
        dest = np.repeat(outside, 1 + rng.poisson(1.0, len(outside)))
        self.out.add(
            np.full(len(dest), p.account),
            dest,
            _times(rng, self.t0, len(dest)),
            PAYBACK,
            _amount(rng, 200.0, 0.4, len(dest)),
        )

    def _reversal(self, p: Planted) -> None:
        """The shop no longer sells (its buyers go to another shop) and buys widely."""
        rng, pop = self.rng, self.pop
        pool = np.flatnonzero(
            (pop.archetype == SELLER)
            & (pop.neighbourhood == pop.neighbourhood[p.account])
            & (pop.joined <= self.week)
        )
        n = 8 + int(rng.poisson(6))
        seller = rng.choice(pool, size=n)
        self._sale(np.full(n, p.account), seller, _times(rng, self.t0, n), np.zeros(n, bool))

    def _bridge(self, p: Planted) -> None:
        """The courier carries goods between two neighbourhoods that never traded."""
        rng, pop = self.rng, self.pop
        home = int(pop.neighbourhood[p.account])
        far = NEVER_TRADING[1] if home == NEVER_TRADING[0] else NEVER_TRADING[0]
        for buyers_in, sellers_in in ((far, home), (home, far)):
            n = 5 + int(rng.poisson(5))
            buyers = np.flatnonzero(
                self.ordinary_buyers & (pop.neighbourhood == buyers_in) & (pop.joined <= self.week)
            )
            sellers = pop.sellers(sellers_in, self.week)
            buyer = rng.choice(buyers, size=n)
            seller = rng.choice(
                sellers, size=n, p=pop.popularity[sellers] / pop.popularity[sellers].sum()
            )
            self._sale(
                buyer,
                seller,
                _times(rng, self.t0, n),
                np.ones(n, bool),
                courier=np.full(n, p.account),
            )


def _check_start(start: datetime) -> datetime:
    if start.tzinfo is None:
        raise ValueError("start must carry a time zone, e.g. 2026-01-01T00:00:00+00:00")
    start = start.astimezone(UTC)
    offset = (start - datetime(1970, 1, 1, tzinfo=UTC)) % timedelta(weeks=1)
    if offset:
        aligned = start - offset
        raise ValueError(
            f"start {start.isoformat()} is not on a 7-day window boundary (windows are aligned "
            f"to the Unix epoch, a Thursday); use {aligned.isoformat()} or "
            f"{(aligned + timedelta(weeks=1)).isoformat()}"
        )
    return start


def _rfc3339(moment: datetime) -> str:
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def generate(
    seed: int = 0,
    members: int = 3000,
    weeks: int = 16,
    start: datetime = DEFAULT_START,
    training_weeks: int = 4,
    *,
    season_week: int | None = None,
    instances: int | None = None,
    newcomer_rate: float = 0.01,
) -> Scenario:
    """Generate the neighbourhood marketplace scenario.

    Parameters
    ----------
    seed : int
        Seed of the single ``numpy.random.Generator`` every draw comes from.
    members : int
        Members present from the first week (at least 200); newcomers join later.
    weeks : int
        Number of 7-day windows; at least ``training_weeks + 3``.
    start : datetime
        Start of the first window, time-zone aware, on a 7-day boundary counted from the
        Unix epoch (a Thursday), so each week is exactly one service window.
    training_weeks : int
        Leading weeks kept free of planted changes (the reference period).
    season_week : int, optional
        The festive week in which ordinary activity rises by half; default
        ``weeks * 2 // 3`` (week index 10 of 16), kept after training and before the end.
    instances : int, optional
        Accounts per planted change type; default ``members // 600`` clipped to 2..6.
    newcomer_rate : float
        Expected newcomers per week as a share of ``members``.
    """
    if members < 200:
        raise ValueError(f"members={members} is too small; use at least 200")
    if training_weeks < 1 or weeks < training_weeks + 3:
        raise ValueError(
            f"weeks={weeks}, training_weeks={training_weeks}: need training_weeks >= 1 and "
            f"weeks >= training_weeks + 3 so planted changes have room after training"
        )
    start = _check_start(start)
    if season_week is None:
        season_week = min(max(weeks * 2 // 3, training_weeks), weeks - 2)
    if not 0 <= season_week < weeks:
        raise ValueError(f"season_week={season_week} must be a week index below weeks={weeks}")
    if instances is None:
        instances = min(6, max(2, members // 600))

    rng = np.random.default_rng(seed)
    pop = draw_population(rng, members, weeks, newcomer_rate)
    plan = draw_plan(rng, pop, members, weeks, training_weeks, season_week, instances)
    out = _Events(first_fresh=pop.size)
    week_draw = _Week(rng, pop, plan, out, season_week)
    epoch_start = int(start.timestamp())
    for week in range(weeks):
        week_draw.run(week, epoch_start + week * WEEK_SECONDS)

    actor, target, seconds, kind, weight = out.columns()
    order = np.argsort(seconds, kind="stable")
    ids = np.array(pop.ids() + [f"new-{k:05d}" for k in range(out.fresh)])
    n = len(order)
    events = EventColumns(
        id=np.char.add(f"mk{seed}-", np.char.zfill(np.arange(n).astype(str), 7)),
        time=seconds[order].astype("datetime64[s]"),
        actor=ids[actor[order]],
        target=ids[target[order]],
        kind=np.array(KINDS)[kind[order]],
        weight=weight[order].astype(np.float64),
    )

    def window_start(index: int) -> str:
        return _rfc3339(start + timedelta(weeks=index))

    truth = truth_records(plan, pop, members, window_start)
    archetype = np.concatenate([pop.archetype, np.full(out.fresh, FRESH, np.int8)])
    neighbourhood = np.array(NEIGHBOURHOOD_NAMES + ("",))[
        np.concatenate([pop.neighbourhood, np.full(out.fresh, -1, np.int8)])
    ]
    week_of = (seconds - epoch_start) // WEEK_SECONDS
    first_seen = np.full(len(ids), weeks, np.int64)
    for ends in (actor, target):
        np.minimum.at(first_seen, ends, week_of)
    accounts = {
        "id": ids,
        "archetype": np.array(ARCHETYPE_NAMES)[archetype],
        "neighbourhood": neighbourhood,
        "joined_window": np.concatenate([pop.joined, first_seen[pop.size :]]),
    }
    per_change = {c: sum(1 for r in truth if r["change"] == c) for c in PLANTED + ("newcomer",)}
    meta = {
        "scenario": "neighbourhood marketplace (fictional)",
        "generator_version": GENERATOR_VERSION,
        "seed": seed,
        "members": members,
        "newcomers": int(pop.size - members),
        "fresh_accounts": int(out.fresh),
        "weeks": weeks,
        "period": "7d",
        "start": _rfc3339(start),
        "end": window_start(weeks),
        "training_weeks": training_weeks,
        "season_window": season_week,
        "season_factor": SEASON_FACTOR,
        "instances_per_change": instances,
        "truth_counts": per_change,
        "events": n,
        "kinds": list(KINDS),
        "neighbourhoods": list(NEIGHBOURHOOD_NAMES),
        "never_trading": [NEIGHBOURHOOD_NAMES[h] for h in NEVER_TRADING],
        "note": "Invented data for demos and tests; no real people, shops or places.",
    }
    return Scenario(events=events, truth=truth, meta=meta, accounts=accounts)
