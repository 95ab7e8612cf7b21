"""A fictional regional payments network: households, merchants, employers and billers.

Five regions lie along a coast road (``cape``, ``harbour``, ``mill``, ``orchard``,
``upland``); payments cross only between neighbouring regions, so members of regions two
or more apart never pay each other until a planted bridge. Money mostly flows one way, so
reciprocity is low and payers are seldom payees (in- and out-degree barely correlate); a
few hubs (billers, busy merchants, large employers) meet thousands of small accounts, and
there is little clustering beyond families and friends.

* ``household`` (about 90 %): card payments to two to eight favourite merchants (lognormal
  rates, a quarter of households bursty and often silent), monthly bills, a salary every
  two or four weeks from its employer, transfers inside its family (a third of households
  live in families of two to five, which pay each other back), transfers to a few friends,
  now and then a cash withdrawal through a cash agent;
* ``merchant`` (7 %): paid by many households (Pareto popularity), pays one to three
  wholesalers a few times a week and refunds the odd customer;
* ``wholesaler`` (1.5 %): paid by merchants, pays invoices to employers;
* ``employer`` (1.2 %, sized by a Pareto law): pays its staff every two or four weeks
  and buys from wholesalers;
* ``biller`` (utilities) and ``cash_agent``: paid by very many households; agents settle
  with a wholesaler weekly.

Amounts are lognormal by kind, rounded to cents. Payments follow office hours and are
lighter on weekends; salaries land early on payday. All names and data are invented.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

import numpy as np

from .common import (
    DAY_SECONDS,
    EventLog,
    Members,
    Rhythm,
    amounts,
    normalised,
)
from .marketplace import DEFAULT_START, Scenario
from .planting import generate_world
from .plants import Act, Style

NAME = "payments"
KINDS = ("card", "transfer", "salary", "bill", "cash", "invoice")
CARD, TRANSFER, SALARY, BILL, CASH, INVOICE = range(6)
ARCHETYPE_NAMES = ("household", "merchant", "wholesaler", "employer", "biller", "cash_agent")
HOUSEHOLD, MERCHANT, WHOLESALER, EMPLOYER, BILLER, AGENT = range(6)
REGIONS = ("cape", "harbour", "mill", "orchard", "upland")
REGION_SHARES = (0.15, 0.30, 0.25, 0.18, 0.12)
MAX_FAVOURITES = 8
MAX_BILLS = 3
MAX_FRIENDS = 3

RHYTHM = Rhythm.of(
    [1, 1, 1, 1, 1, 2, 3, 5, 8, 10, 11, 12, 13, 12, 11, 11, 12, 12, 10, 8, 6, 4, 2, 1],
    [1.0, 1.1, 0.8, 0.6, 1.0, 1.0, 1.0],  # Thursday .. Wednesday; quieter weekend
)
STYLE = Style(
    takeover=Act(TRANSFER, 45.0, 0.6),
    answer=Act(TRANSFER, 20.0, 0.6),
    contact=Act(TRANSFER, 60.0, 0.7),
    funnel_in=Act(TRANSFER, 400.0, 0.5),
    funnel_out=Act(TRANSFER, 2500.0, 0.4),
    funnel_feed=Act(TRANSFER, 450.0, 0.5),
    bridge=Act(TRANSFER, 300.0, 0.6),
    presence=Act(CARD, 25.0, 0.7),
    steady=Act(CARD, 30.0, 0.5),
    fresh_targets=0.25,
    fresh_outlets=True,
    fresh_names=("recipient", "mule", "cash_out"),
)


@dataclass
class Accounts:
    """Standing habits of every member, indexed like :class:`Members`."""

    archetype: np.ndarray
    region: np.ndarray
    joined: np.ndarray
    rate: np.ndarray  # card payments a week when active (households)
    p_active: np.ndarray
    popularity: np.ndarray  # merchants: how often explorers and favourites pick them
    favourites: np.ndarray  # (n, MAX_FAVOURITES) merchants
    n_favourites: np.ndarray
    employer: np.ndarray  # -1 when none
    salary: np.ndarray
    pay_period: np.ndarray  # employers: 2 or 4 weeks
    pay_phase: np.ndarray
    bills: np.ndarray  # (n, MAX_BILLS) billers, -1 unused
    bill_phase: np.ndarray
    family: np.ndarray  # family id or -1
    friends: np.ndarray  # (n, MAX_FRIENDS) households it sends money to now and then
    suppliers: np.ndarray  # (n, 3) wholesalers of merchants, employers and agents


def _counts(members: int) -> dict[int, int]:
    regions = len(REGIONS)
    out = {
        MERCHANT: max(3 * regions, round(0.07 * members)),
        WHOLESALER: max(regions, round(0.015 * members)),
        EMPLOYER: max(2 * regions, round(0.012 * members)),
        BILLER: max(regions, round(0.003 * members)),
        AGENT: max(regions, round(0.005 * members)),
    }
    out[HOUSEHOLD] = members - sum(out.values())
    return out


def _regions_for(rng, archetype) -> np.ndarray:
    """Regions in the given shares, with every business type present in every region."""
    region = rng.choice(len(REGIONS), size=len(archetype), p=REGION_SHARES)
    for code in (MERCHANT, WHOLESALER, EMPLOYER, BILLER, AGENT):
        idx = np.flatnonzero(archetype == code)
        base = np.arange(len(idx)) % len(REGIONS)
        region[idx] = np.where(np.arange(len(idx)) < len(REGIONS), base, region[idx])
    return region


def _pick_in_region(rng, region, wanted, mask, weight) -> np.ndarray:
    """For each entry of ``wanted`` (a region), a member of ``mask`` there, by ``weight``."""
    out = np.full(len(wanted), -1, np.int64)
    for r in range(len(REGIONS)):
        pool = np.flatnonzero(mask & (region == r))
        pick = np.flatnonzero(wanted == r)
        if len(pool) and len(pick):
            out[pick] = rng.choice(pool, size=len(pick), p=normalised(weight[pool]))
    return out


def _neighbour(rng, region, share) -> np.ndarray:
    """Each region, or with chance ``share`` a neighbouring one along the road."""
    step = np.where(rng.random(len(region)) < 0.5, -1, 1)
    other = np.clip(region + step, 0, len(REGIONS) - 1)
    other = np.where(other == region, region - step, other)
    return np.where(rng.random(len(region)) < share, other, region)


def draw_accounts(rng, members: int, weeks: int, newcomer_rate: float) -> Accounts:
    counts = _counts(members)
    archetype = rng.permutation(np.concatenate([np.full(k, a) for a, k in counts.items()]))
    per_week = rng.poisson(newcomer_rate * members, weeks)
    per_week[0] = 0
    archetype = np.concatenate([archetype, np.full(per_week.sum(), HOUSEHOLD)]).astype(np.int8)
    joined = np.concatenate([np.zeros(members, np.int64), np.repeat(np.arange(weeks), per_week)])
    n = len(archetype)
    region = _regions_for(rng, archetype)
    house = archetype == HOUSEHOLD
    bursty = house & (rng.random(n) < 0.25)
    rate = np.where(house, rng.lognormal(np.log(2.2), 0.8, n), 0.0)
    rate[bursty] = rng.lognormal(np.log(0.8), 0.5, int(bursty.sum()))
    p_active = np.where(bursty, rng.beta(1.5, 3.0, n), np.where(house, rng.beta(8, 1.2, n), 1.0))
    popularity = np.where(archetype == MERCHANT, rng.pareto(1.1, n) + 1.0, 0.0)
    initial = joined == 0
    wanted = _neighbour(rng, np.repeat(region, MAX_FAVOURITES), 0.1)
    favourites = _pick_in_region(
        rng, region, wanted, (archetype == MERCHANT) & initial, popularity
    ).reshape(n, MAX_FAVOURITES)
    size = np.where(archetype == EMPLOYER, rng.pareto(1.2, n) + 1.0, 0.0)
    employed = house & (rng.random(n) < 0.8)
    employer = _pick_in_region(
        rng, region, np.where(employed, _neighbour(rng, region, 0.1), -1), archetype == EMPLOYER,
        size,
    )  # fmt: skip
    billers = _pick_in_region(
        rng, region, np.repeat(region, MAX_BILLS), archetype == BILLER, np.ones(n)
    ).reshape(n, MAX_BILLS)
    n_bills = rng.integers(1, MAX_BILLS + 1, n)
    billers[(np.arange(MAX_BILLS)[None, :] >= n_bills[:, None]) | ~house[:, None]] = -1
    suppliers = _pick_in_region(
        rng, region, _neighbour(rng, np.repeat(region, 3), 0.2), archetype == WHOLESALER,
        np.ones(n),
    ).reshape(n, 3)  # fmt: skip
    return Accounts(
        archetype=archetype,
        region=region,
        joined=joined,
        rate=rate,
        p_active=p_active,
        popularity=popularity,
        favourites=favourites,
        n_favourites=np.where(house, rng.integers(2, MAX_FAVOURITES + 1, n), 0),
        employer=employer,
        salary=np.round(rng.lognormal(np.log(1500.0), 0.35, n), 2),
        pay_period=np.where(rng.random(n) < 0.7, 2, 4),
        pay_phase=rng.integers(0, 4, n),
        bills=billers,
        bill_phase=rng.integers(0, 4, (n, MAX_BILLS)),
        family=_families(rng, house & initial, region),
        friends=_pick_in_region(
            rng, region, np.repeat(region, MAX_FRIENDS), house & initial, np.ones(n)
        ).reshape(n, MAX_FRIENDS),
        suppliers=suppliers,
    )


def _families(rng, house, region) -> np.ndarray:
    """A third of households form families of two to five inside their region."""
    family = np.full(len(region), -1, np.int64)
    next_id = 0
    for r in range(len(REGIONS)):
        pool = rng.permutation(np.flatnonzero(house & (region == r)))
        pool = pool[: len(pool) // 3]
        sizes = rng.integers(2, 6, len(pool))
        ends = np.cumsum(sizes)
        keep = ends <= len(pool)
        for k, stop in enumerate(ends[keep]):
            family[pool[stop - sizes[k] : stop]] = next_id
            next_id += 1
    return family


class Payments:
    """The payments world the planting director runs."""

    style = STYLE
    rhythm = RHYTHM

    def __init__(self, rng, members: int, weeks: int, newcomer_rate: float):
        self.acc = a = draw_accounts(rng, members, weeks, newcomer_rate)
        regions = len(REGIONS)
        road = np.arange(regions)
        self.members = Members(
            prefix="acct-",
            initial=members,
            archetype=a.archetype,
            archetype_names=ARCHETYPE_NAMES,
            community=a.region,
            community_names=list(REGIONS),
            community_zone=road,
            zone_names=REGIONS,
            reach=np.abs(road[:, None] - road[None, :]) <= 1,
            joined=a.joined,
            away_prone=a.archetype == HOUSEHOLD,
        )

    def ordinary(self, rng, week, week_start, mult, log: EventLog) -> None:
        present = self.acc.joined <= week
        self._cards(rng, week, present, mult, week_start, log)
        self._salaries(rng, week, present, week_start, log)
        self._bills(rng, week, present, week_start, log)
        self._family(rng, present, mult, week_start, log)
        self._friends(rng, present, mult, week_start, log)
        self._cash(rng, present, mult, week_start, log)
        self._business(rng, present, mult, week_start, log)

    def _cards(self, rng, week, present, mult, week_start, log: EventLog) -> None:
        """Card payments, 85 % to favourites, else a popular merchant of the region."""
        a = self.acc
        active = present & (rng.random(len(present)) < a.p_active)
        count = rng.poisson(a.rate * mult) * active
        payer = np.repeat(np.arange(len(count)), count)
        merchant = a.favourites[payer, rng.integers(0, np.maximum(a.n_favourites[payer], 1))]
        explore = rng.random(len(payer)) < 0.15
        open_now = (a.archetype == MERCHANT) & present
        merchant[explore] = _pick_in_region(
            rng, a.region, a.region[payer[explore]], open_now, a.popularity
        )
        ok = merchant >= 0
        seconds = self.rhythm.times(rng, week_start, int(ok.sum()))
        log.add(payer[ok], merchant[ok], seconds, CARD, amounts(rng, 24.0, 0.8, int(ok.sum())))

    def _salaries(self, rng, week, present, week_start, log: EventLog) -> None:
        a = self.acc
        boss = a.employer
        paid = (boss >= 0) & present
        payday = (week + a.pay_phase[boss]) % a.pay_period[boss] == 0
        staff = np.flatnonzero(paid & payday)
        seconds = week_start + DAY_SECONDS + 6 * 3600 + rng.integers(0, 3600, len(staff))
        weight = np.round(a.salary[staff] * rng.uniform(0.97, 1.03, len(staff)), 2)
        log.add(boss[staff], staff, seconds, SALARY, weight)

    def _bills(self, rng, week, present, week_start, log: EventLog) -> None:
        a = self.acc
        due = (a.bills >= 0) & ((week + a.bill_phase) % 4 == 0) & present[:, None]
        payer, slot = np.nonzero(due)
        seconds = self.rhythm.times(rng, week_start, len(payer))
        weight = amounts(rng, 80.0, 0.5, len(payer))
        log.add(payer, a.bills[payer, slot], seconds, BILL, weight)

    def _family(self, rng, present, mult, week_start, log: EventLog) -> None:
        """Family members pay each other (rent shares, pocket money) and pay back."""
        a = self.acc
        member = np.flatnonzero((a.family >= 0) & present)
        count = rng.poisson(0.6 * mult[member])
        payer = np.repeat(member, count)
        fam = a.family[payer]
        order = np.argsort(a.family[member], kind="stable")
        sorted_members, sorted_fam = member[order], a.family[member][order]
        lo = np.searchsorted(sorted_fam, fam)
        hi = np.searchsorted(sorted_fam, fam, side="right")
        payee = sorted_members[lo + (rng.random(len(payer)) * (hi - lo)).astype(np.int64)]
        ok = payee != payer
        seconds = self.rhythm.times(rng, week_start, int(ok.sum()))
        log.add(payer[ok], payee[ok], seconds, TRANSFER, amounts(rng, 60.0, 0.8, int(ok.sum())))

    def _friends(self, rng, present, mult, week_start, log: EventLog) -> None:
        """Households send money to one of three friends in their region now and then."""
        a = self.acc
        count = rng.poisson(0.25 * mult) * (present & (a.archetype == HOUSEHOLD))
        payer = np.repeat(np.arange(len(count)), count)
        friend = a.friends[payer, rng.integers(0, MAX_FRIENDS, len(payer))]
        ok = (friend >= 0) & (friend != payer)
        seconds = self.rhythm.times(rng, week_start, int(ok.sum()))
        log.add(payer[ok], friend[ok], seconds, TRANSFER, amounts(rng, 40.0, 0.9, int(ok.sum())))

    def _cash(self, rng, present, mult, week_start, log: EventLog) -> None:
        a = self.acc
        count = rng.poisson(0.15 * mult) * (present & (a.archetype == HOUSEHOLD))
        payer = np.repeat(np.arange(len(count)), count)
        agent = _pick_in_region(
            rng, a.region, a.region[payer], (a.archetype == AGENT) & present, np.ones(len(count))
        )
        seconds = self.rhythm.times(rng, week_start, len(payer))
        log.add(payer, agent, seconds, CASH, amounts(rng, 150.0, 0.6, len(payer)))

    def _business(self, rng, present, mult, week_start, log: EventLog) -> None:
        """Merchants and agents pay wholesalers, wholesalers invoice employers, refunds."""
        a = self.acc
        rates = {MERCHANT: 1.5, AGENT: 1.0, EMPLOYER: 0.5}
        for code, lam in rates.items():
            who = np.flatnonzero((a.archetype == code) & present)
            payer = np.repeat(who, rng.poisson(lam * mult[who]))
            to = a.suppliers[payer, rng.integers(0, 3, len(payer))]
            seconds = self.rhythm.times(rng, week_start, len(payer))
            log.add(payer, to, seconds, INVOICE, amounts(rng, 900.0, 0.6, len(payer)))
        sellers = np.flatnonzero((a.archetype == WHOLESALER) & present)
        payer = np.repeat(sellers, rng.poisson(1.0 * mult[sellers]))
        employers = (a.archetype == EMPLOYER) & present
        to = _pick_in_region(rng, a.region, a.region[payer], employers, np.ones(len(present)))
        seconds = self.rhythm.times(rng, week_start, len(payer))
        log.add(payer, to, seconds, INVOICE, amounts(rng, 2000.0, 0.6, len(payer)))
        shops = np.flatnonzero((a.archetype == MERCHANT) & present)
        shop = np.repeat(shops, rng.poisson(0.3, len(shops)))
        house = (a.archetype == HOUSEHOLD) & present
        customer = _pick_in_region(rng, a.region, a.region[shop], house, np.ones(len(present)))
        seconds = self.rhythm.times(rng, week_start, len(shop))
        log.add(shop, customer, seconds, CARD, amounts(rng, 30.0, 0.7, len(shop)))

    def eligible(self, change: str) -> np.ndarray:
        a = self.acc
        house = a.archetype == HOUSEHOLD
        return {
            "takeover": house,
            "contact_point": house,
            "funnel": house,
            "season": house,
            "reversal": np.isin(a.archetype, (MERCHANT, AGENT, WHOLESALER)),
            "bridge": house | (a.archetype == MERCHANT),
            "quiet": house | (a.archetype == MERCHANT),
            "volume_control": house & (a.rate >= 3) & (a.rate <= 8) & (a.p_active > 0.8),
        }[change]

    def steady_contacts(self, rng, account: int, avoid: np.ndarray):
        """Three to five favourite merchants it pays, and only pays."""
        a = self.acc
        mine = a.favourites[account, : a.n_favourites[account]]
        mine = np.array(list(dict.fromkeys(mine[(mine >= 0) & ~avoid[mine]].tolist())), np.int64)
        if len(mine) < 3:
            near = np.abs(a.region - a.region[account]) <= 1  # its own or a neighbouring region
            pool = np.flatnonzero((a.archetype == MERCHANT) & near & (a.joined == 0))
            pool = pool[~avoid[pool] & ~np.isin(pool, mine)]
            mine = np.concatenate(
                [mine, rng.choice(pool, min(3 - len(mine), len(pool)), replace=False)]
            )
        return mine[:5].astype(np.int64), 1.0, float(np.clip(a.rate[account], 3.0, 8.0))


def generate(
    seed: int = 0,
    members: int = 3000,
    weeks: int = 16,
    training_weeks: int = 4,
    start: datetime = DEFAULT_START,
    *,
    season_week: int | None = None,
    instances: int | None = None,
    newcomer_rate: float = 0.01,
) -> Scenario:
    """Generate the fictional regional payments network (see the module docstring).

    Parameters are those of :func:`rolewatch.scenario.generate`; ``instances`` defaults to
    about one planted account per type per 300 members (10 at 3,000, at least 3).
    """
    return generate_world(
        Payments,
        name=NAME,
        description="regional payments network: households, merchants, employers (fictional)",
        kinds=KINDS,
        id_stem="pay",
        seed=seed,
        members=members,
        weeks=weeks,
        training_weeks=training_weeks,
        start=start,
        season_week=season_week,
        instances=instances,
        newcomer_rate=newcomer_rate,
        # paid on their own calendar, so not raised in the season window
        extra_meta={"fixed_schedule_kinds": ["salary", "bill"]},
    )
