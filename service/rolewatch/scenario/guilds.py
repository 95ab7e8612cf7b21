"""A fictional online game's item-trading network: guilds, parties, crafters and traders.

Players belong to guilds, and every guild to one of three factions (``dawn``, ``ember``,
``tide``); players of different factions cannot trade, so a planted bridge is the only tie
between factions. Most trades happen inside a guild and inside small fixed parties, and
most are swaps (an item for an item: two events, one each way), so the network is
reciprocal and strongly clustered.

* ``member`` (about 70 %): trades a few times a week (lognormal), mostly with its party of
  three to six, sometimes with any guildmate; swaps, gifts and sales; deposits into the
  guild's stock held by its officer;
* ``officer`` (one per guild): receives the guild's deposits and hands out gifts;
* ``crafter`` (8 % of guild players): buys materials from a few suppliers in its guild and
  sells crafted goods to many, mostly guildmates;
* ``trader`` (3 %): buys from and sells to players of many guilds of its faction;
* ``solo`` (about 20 %, and most newcomers): no guild; bursty, often away for weeks; buys
  from traders and trades with whoever is around.

Weights are item values in gold (whole coins, lognormal by kind). Play peaks in the
evening and at the weekend. All names and data are invented.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

import numpy as np

from .common import (
    WEEK_SECONDS,
    EventLog,
    Members,
    Rhythm,
    later,
    normalised,
)
from .marketplace import DEFAULT_START, Scenario
from .planting import generate_world
from .plants import Act, Style

NAME = "guilds"
KINDS = ("swap", "sale", "gift", "deposit")
SWAP, SALE, GIFT, DEPOSIT = range(4)
ARCHETYPE_NAMES = ("member", "officer", "crafter", "trader", "solo")
MEMBER, OFFICER, CRAFTER, TRADER, SOLO = range(5)
FACTIONS = ("dawn", "ember", "tide")
PARTY_SHARE = 0.85  # a player's trades with its party rather than any guildmate

RHYTHM = Rhythm.of(
    [6, 4, 2, 1, 1, 1, 1, 1, 2, 2, 3, 3, 4, 4, 4, 5, 6, 8, 10, 12, 13, 13, 11, 8],
    [1.0, 1.2, 1.6, 1.5, 0.9, 0.9, 1.0],  # Thursday .. Wednesday; busy weekend
)
STYLE = Style(
    takeover=Act(GIFT, 40.0, 0.8),
    answer=Act(GIFT, 10.0, 0.8),
    contact=Act(GIFT, 60.0, 0.8),
    funnel_in=Act(GIFT, 500.0, 0.6),
    funnel_out=Act(SALE, 3000.0, 0.5),
    bridge=Act(SALE, 150.0, 0.9),
    presence=Act(GIFT, 20.0, 0.8),
    steady=Act(SALE, 120.0, 0.6),
    digits=0,
    fresh_names=("recipient", "farm_bot", "buyer"),
)


def gold(rng: np.random.Generator, median, sigma: float, n: int) -> np.ndarray:
    """Item values in whole gold coins, at least 1."""
    return np.maximum(np.round(rng.lognormal(np.log(median), sigma, n)), 1.0)


@dataclass
class Players:
    """Standing habits of every player, indexed like :class:`Members`."""

    archetype: np.ndarray
    guild: np.ndarray  # -1 for solo players
    faction: np.ndarray
    party: np.ndarray  # -1 outside a party
    joined: np.ndarray
    rate: np.ndarray  # own trades a week when active
    p_active: np.ndarray
    craft_rate: np.ndarray  # crafted goods sold a week (crafters), trades (traders)
    officer: np.ndarray  # each guild's officer
    guild_faction: np.ndarray
    suppliers: np.ndarray  # (n, 3) guildmates a crafter buys materials from


def _membership(rng, members, weeks, newcomer_rate):
    """Guilds with lognormal sizes in three factions; a fifth of players stay solo."""
    guilds = max(6, round(members / 40))
    guild_faction = np.arange(guilds) % len(FACTIONS)
    weight = normalised(rng.lognormal(0.0, 0.8, guilds))
    per_week = rng.poisson(newcomer_rate * members, weeks)
    per_week[0] = 0
    joined = np.concatenate([np.zeros(members, np.int64), np.repeat(np.arange(weeks), per_week)])
    n = len(joined)
    solo = rng.random(n) < np.where(joined > 0, 0.6, 0.2)
    guild = np.where(solo, -1, rng.choice(guilds, size=n, p=weight))
    faction = np.where(solo, rng.integers(0, len(FACTIONS), n), guild_faction[guild])
    u = rng.random(n)
    archetype = np.where(solo, SOLO, np.where(u < 0.08, CRAFTER, MEMBER))
    archetype[rng.random(n) < 0.03] = TRADER
    archetype[joined > 0] = np.where(solo[joined > 0], SOLO, MEMBER)
    officer = np.zeros(guilds, np.int64)
    for g in range(guilds):
        local = np.flatnonzero((guild == g) & (joined == 0) & (archetype == MEMBER))
        if len(local) == 0:  # a guild nobody drew: a solo player of its faction founds it
            free = np.flatnonzero(solo & (faction == guild_faction[g]) & (joined == 0))
            local = rng.choice(free, 1)
            guild[local], solo[local] = g, False
        officer[g] = rng.choice(local)
    archetype[officer] = OFFICER
    return guild, faction, archetype.astype(np.int8), joined, officer, guild_faction


def _parties(rng, guild, faction, archetype, joined) -> np.ndarray:
    """Fixed parties of three to six: inside each guild (members and crafters), and circles
    of friends among the solo players of each faction who are there from the start."""
    party = np.full(len(guild), -1, np.int64)
    groups = [np.flatnonzero((guild == g) & np.isin(archetype, (MEMBER, CRAFTER)))
              for g in range(guild.max() + 1)]  # fmt: skip
    groups += [
        np.flatnonzero((archetype == SOLO) & (faction == f) & (joined == 0))
        for f in range(len(FACTIONS))
    ]
    next_id = 0
    for group in groups:
        pool = rng.permutation(group)
        start = 0
        while len(pool) - start >= 3:
            size = int(rng.integers(3, 7))
            if len(pool) - start - size < 3:
                size = len(pool) - start
            party[pool[start : start + size]] = next_id
            next_id += 1
            start += size
    return party


def draw_players(rng, members: int, weeks: int, newcomer_rate: float) -> Players:
    guild, faction, archetype, joined, officer, guild_faction = _membership(
        rng, members, weeks, newcomer_rate
    )
    n = len(guild)
    rate = np.select(
        [archetype == SOLO, archetype == OFFICER, archetype == TRADER],
        [rng.lognormal(0.0, 0.6, n), rng.lognormal(np.log(3.0), 0.5, n), np.full(n, 2.0)],
        rng.lognormal(np.log(1.4), 0.8, n),
    )
    p_active = np.select(
        [archetype == SOLO, np.isin(archetype, (OFFICER, TRADER))],
        [rng.beta(1.2, 2.5, n), np.full(n, 0.95)],
        rng.beta(4.0, 1.5, n),
    )
    craft_rate = np.select(
        [archetype == CRAFTER, archetype == TRADER],
        [rng.lognormal(np.log(5.0), 0.5, n), rng.lognormal(np.log(10.0), 0.4, n)],
        0.0,
    )
    suppliers = np.full((n, 3), -1, np.int64)
    for c in np.flatnonzero(archetype == CRAFTER):
        mates = np.flatnonzero((guild == guild[c]) & (joined == 0) & (np.arange(n) != c))
        if len(mates):
            suppliers[c] = rng.choice(mates, 3)
    return Players(
        archetype=archetype,
        guild=guild,
        faction=faction,
        party=_parties(rng, guild, faction, archetype, joined),
        joined=joined,
        rate=rate,
        p_active=p_active,
        craft_rate=craft_rate,
        officer=officer,
        guild_faction=guild_faction,
        suppliers=suppliers,
    )


def pick_mates(rng, label: np.ndarray, mask: np.ndarray, actors: np.ndarray) -> np.ndarray:
    """For each actor, a random other member of its group (``label``) within ``mask``.

    -1 where the actor has no such group or is alone in it.
    """
    pool = np.flatnonzero(mask & (label >= 0))
    if len(pool) == 0:
        return np.full(len(actors), -1, np.int64)
    pool = pool[np.argsort(label[pool], kind="stable")]
    keys = label[pool]
    group = label[actors]
    lo = np.searchsorted(keys, group)
    size = np.searchsorted(keys, group, side="right") - lo
    pos = lo + (rng.random(len(actors)) * size).astype(np.int64)
    pos = np.minimum(pos, len(pool) - 1)
    clash = (size > 1) & (pool[pos] == actors)
    pos[clash] = lo[clash] + (pos[clash] - lo[clash] + 1) % size[clash]
    mate = pool[pos]
    return np.where((group >= 0) & (size > 1) & (mate != actors), mate, -1)


def pick_in_faction(rng, faction, mask, weight, wanted) -> np.ndarray:
    out = np.full(len(wanted), -1, np.int64)
    for f in range(len(FACTIONS)):
        pool = np.flatnonzero(mask & (faction == f))
        who = np.flatnonzero(wanted == f)
        if len(pool) and len(who):
            out[who] = rng.choice(pool, size=len(who), p=normalised(weight[pool]))
    return out


class Guilds:
    """The guild-trading world the planting director runs."""

    style = STYLE
    rhythm = RHYTHM

    def __init__(self, rng, members: int, weeks: int, newcomer_rate: float):
        self.p = p = draw_players(rng, members, weeks, newcomer_rate)
        guilds = len(p.officer)
        factions = len(FACTIONS)
        community = np.where(p.guild >= 0, p.guild, guilds + p.faction)
        self.members = Members(
            prefix="pl-",
            initial=members,
            archetype=p.archetype,
            archetype_names=ARCHETYPE_NAMES,
            community=community,
            community_names=[f"guild-{g:03d}" for g in range(guilds)]
            + [f"unaffiliated-{f}" for f in FACTIONS],
            community_zone=np.concatenate([p.guild_faction, np.arange(factions)]),
            zone_names=FACTIONS,
            reach=np.eye(factions, dtype=bool),
            joined=p.joined,
            away_prone=np.isin(p.archetype, (MEMBER, SOLO)),
        )

    def ordinary(self, rng, week, week_start, mult, log: EventLog) -> None:
        p = self.p
        present = p.joined <= week
        active = present & (rng.random(len(present)) < p.p_active)
        self._guild_trades(rng, present, active, mult, week_start, log)
        self._solo_trades(rng, present, active, mult, week_start, log)
        self._guild_stock(rng, present, active, mult, week_start, log)
        self._crafting(rng, present, active, mult, week_start, log)
        self._trading(rng, present, active, mult, week_start, log)

    def _trade(
        self, rng, actor, partner, week_start, log: EventLog, swap_share=0.75, gift_share=0.1
    ) -> None:
        """Swaps (one event each way, seconds apart), gifts, and sales (the rest)."""
        ok = partner >= 0
        actor, partner = actor[ok], partner[ok]
        seconds = self.rhythm.times(rng, week_start, len(actor))
        u = rng.random(len(actor))
        kind = np.where(u < swap_share, SWAP, np.where(u < swap_share + gift_share, GIFT, SALE))
        medians = np.array([80.0, 150.0, 20.0, 300.0])[kind]
        log.add(actor, partner, seconds, kind, gold(rng, medians, 1.0, len(actor)))
        back = kind == SWAP
        back_at = later(rng, seconds[back], week_start + WEEK_SECONDS, 5, 120)
        log.add(partner[back], actor[back], back_at, SWAP, gold(rng, 80.0, 1.0, int(back.sum())))

    def _guild_trades(self, rng, present, active, mult, week_start, log: EventLog) -> None:
        p = self.p
        in_guild = active & (p.guild >= 0)
        actor = np.repeat(np.arange(len(p.guild)), rng.poisson(p.rate * mult) * in_guild)
        partner = pick_mates(rng, p.guild, present, actor)
        with_party = rng.random(len(actor)) < PARTY_SHARE
        party_mate = pick_mates(rng, p.party, present, actor[with_party])
        partner[with_party] = np.where(party_mate >= 0, party_mate, partner[with_party])
        self._trade(rng, actor, partner, week_start, log)

    def _solo_trades(self, rng, present, active, mult, week_start, log: EventLog) -> None:
        """Solo players buy from traders (who often sell back) or trade in their circle of
        friends; newcomers without a circle trade with anyone of their faction."""
        p = self.p
        solo = active & (p.archetype == SOLO)
        count = rng.poisson(p.rate * mult) * solo
        count[solo] = np.maximum(count[solo], 1)
        actor = np.repeat(np.arange(len(p.guild)), count)
        traders = present & (p.archetype == TRADER)
        to_trader = rng.random(len(actor)) < 0.5
        partner = pick_mates(rng, p.party, present, actor)
        anyone = ~to_trader & (partner < 0)
        for who, pool in ((to_trader, traders), (anyone, present)):
            partner[who] = pick_in_faction(
                rng, p.faction, pool, p.rate + 0.5, p.faction[actor[who]]
            )
        self._trade(rng, actor, partner, week_start, log, swap_share=0.5, gift_share=0.1)

    def _guild_stock(self, rng, present, active, mult, week_start, log: EventLog) -> None:
        """Members deposit into the guild's stock; its officer hands out gifts."""
        p = self.p
        giver = np.flatnonzero(active & np.isin(p.archetype, (MEMBER, CRAFTER)) & (p.guild >= 0))
        giver = np.repeat(giver, rng.poisson(0.3 * mult[giver]))
        officer = p.officer[p.guild[giver]]
        seconds = self.rhythm.times(rng, week_start, len(giver))
        log.add(giver, officer, seconds, DEPOSIT, gold(rng, 300.0, 0.7, len(giver)))
        officers = p.officer[present[p.officer]]
        officers = np.repeat(officers, rng.poisson(2.0 * mult[officers]))
        mate = pick_mates(rng, p.guild, present, officers)
        ok = mate >= 0
        seconds = self.rhythm.times(rng, week_start, int(ok.sum()))
        log.add(officers[ok], mate[ok], seconds, GIFT, gold(rng, 120.0, 0.8, int(ok.sum())))

    def _crafting(self, rng, present, active, mult, week_start, log: EventLog) -> None:
        """Crafters buy materials from their suppliers and sell goods, mostly in the guild."""
        p = self.p
        crafters = np.flatnonzero(active & (p.archetype == CRAFTER))
        seller = np.repeat(crafters, rng.poisson(p.craft_rate[crafters] * mult[crafters]))
        buyer = pick_mates(rng, p.guild, present, seller)
        outside = rng.random(len(seller)) < 0.1
        buyer[outside] = pick_in_faction(
            rng, p.faction, present, np.ones(len(present)), p.faction[seller[outside]]
        )
        ok = (buyer >= 0) & (buyer != seller)
        seconds = self.rhythm.times(rng, week_start, int(ok.sum()))
        log.add(seller[ok], buyer[ok], seconds, SALE, gold(rng, 250.0, 0.6, int(ok.sum())))
        buyer = np.repeat(crafters, rng.poisson(1.5 * mult[crafters]))
        supplier = p.suppliers[buyer, rng.integers(0, 3, len(buyer))]
        ok = supplier >= 0
        seconds = self.rhythm.times(rng, week_start, int(ok.sum()))
        log.add(supplier[ok], buyer[ok], seconds, SALE, gold(rng, 60.0, 0.6, int(ok.sum())))

    def _trading(self, rng, present, active, mult, week_start, log: EventLog) -> None:
        """Traders barter with, buy from and sell to players of many guilds of their faction."""
        p = self.p
        traders = np.flatnonzero(active & (p.archetype == TRADER))
        trader = np.repeat(traders, rng.poisson(p.craft_rate[traders] * mult[traders]))
        players = present & (p.archetype != TRADER)
        other = pick_in_faction(rng, p.faction, players, p.rate + 0.5, p.faction[trader])
        buying = rng.random(len(trader)) < 0.5
        actor = np.where(buying, other, trader)
        partner = np.where(other >= 0, np.where(buying, trader, other), -1)
        self._trade(rng, actor, partner, week_start, log, swap_share=0.5, gift_share=0.0)

    def eligible(self, change: str) -> np.ndarray:
        a, p = self.p.archetype, self.p
        ordinary = np.isin(a, (MEMBER, SOLO))
        party_size = np.bincount(p.party[p.party >= 0], minlength=1)
        in_party = np.where(p.party >= 0, party_size[np.maximum(p.party, 0)], 0)
        return {
            "takeover": ordinary,
            "contact_point": ordinary,
            "funnel": ordinary,
            "season": ordinary,
            "reversal": np.isin(a, (CRAFTER, OFFICER)),
            "bridge": np.isin(a, (MEMBER, TRADER)),
            "quiet": np.isin(a, (MEMBER, CRAFTER, TRADER, OFFICER)),
            "volume_control": (a == MEMBER)
            & (p.rate >= 3)
            & (p.rate <= 8)
            & (p.p_active > 0.8)
            & (in_party >= 4),
        }[change]

    def steady_contacts(self, rng, account: int, avoid: np.ndarray):
        """Its party mates (three to five), with whom it swaps: half its events sent."""
        p = self.p
        party = (p.party == p.party[account]) & (p.joined == 0)
        mates = np.flatnonzero(party & (np.arange(len(p.party)) != account))
        mine = mates[~avoid[mates]]
        if len(mine) < 3:
            pool = np.flatnonzero((p.guild == p.guild[account]) & (p.joined == 0))
            pool = pool[~avoid[pool] & (pool != account) & ~np.isin(pool, mine)]
            mine = np.concatenate(
                [mine, rng.choice(pool, min(3 - len(mine), len(pool)), replace=False)]
            )
        return mine[:5].astype(np.int64), 0.5, float(np.clip(p.rate[account], 3.0, 8.0))


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
    """Generate the fictional game item-trading network (see the module docstring).

    Parameters are those of :func:`rolewatch.scenario.generate`; ``instances`` defaults to
    about one planted account per type per 300 members (10 at 3,000, at least 3).
    """
    return generate_world(
        Guilds,
        name=NAME,
        description="online game item trading with guilds and factions (fictional)",
        kinds=KINDS,
        id_stem="gu",
        seed=seed,
        members=members,
        weeks=weeks,
        training_weeks=training_weeks,
        start=start,
        season_week=season_week,
        instances=instances,
        newcomer_rate=newcomer_rate,
    )
